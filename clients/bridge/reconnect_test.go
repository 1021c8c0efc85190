package bridge

import (
	"context"
	"io"
	"math"
	"sync"
	"testing"
	"time"

	"reckon.example/clients/client"
)

// lockedWriter serialises the writes of Forward's two goroutines.
type lockedWriter struct {
	mu sync.Mutex
	b  []byte
}

func (w *lockedWriter) Write(p []byte) (int, error) {
	w.mu.Lock()
	defer w.mu.Unlock()
	w.b = append(w.b, p...)
	return len(p), nil
}

// TestLinkReconnects: the service stops while the link forwards (an
// upgrade, a crash) and starts again on the same address and journal.
// With Reconnect, Forward says so, drops the frames read while no stream
// is open, opens the session again and goes on: the robot ends where the
// same frames fed without the outage leave a robot (the cart drives one
// arc, so cumulative counts lose nothing by the dropped frames; to 1e-9 as
// in link). Before, the link ended at the first frame after the stop.
func TestLinkReconnects(t *testing.T) {
	dir := t.TempDir()
	addr, stop := serveAt(t, "127.0.0.1:0", dir)
	c, err := client.Dial(addr, client.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	createCarts(t, c)
	want, lastNs := cleanPose(t, c)

	sessCtx, endSess := context.WithCancel(context.Background())
	defer endSess()
	sess, err := c.OpenIngest(sessCtx, "robots/link")
	if err != nil {
		t.Fatal(err)
	}
	reopen := func(ctx context.Context, id string, last uint64) (*client.Session, error) {
		return c.OpenIngest(sessCtx, "robots/link", client.Resume(id, last))
	}
	pr, pw := io.Pipe()
	log := &lockedWriter{}
	ctx, stopForward := context.WithCancel(context.Background())
	type result struct {
		sum Summary
		err error
	}
	done := make(chan result, 1)
	go func() {
		var d Decoder
		sum, err := Forward(ctx, pr, &d, sess, Reconnect(reopen, log))
		done <- result{sum, err}
	}()
	send := func(from, to int) {
		for k := from; k < to; k++ {
			f := cartFrame(k)
			if _, err := pw.Write(AppendFrame(nil, &f, nil)); err != nil {
				t.Fatal(err)
			}
		}
	}
	newest := func() int64 {
		r, err := c.GetRobot(context.Background(), "robots/link")
		if err != nil {
			return -1
		}
		return r.GetNewestStampNs()
	}
	waitFor := func(stamp int64) {
		for deadline := time.Now().Add(30 * time.Second); newest() != stamp; time.Sleep(20 * time.Millisecond) {
			if time.Now().After(deadline) {
				t.Fatalf("the service never saw stamp %d: newest %d", stamp, newest())
			}
		}
	}
	stampOf := func(k int) int64 { return int64(cartStartUs+cartStepUs*k) * 1000 }
	send(0, 600)
	waitFor(stampOf(599))
	stop()
	send(600, 700) // the service is away
	_, stop = serveAt(t, addr, dir)
	defer stop()
	// Frames until the link is through again.
	k := 700
	for ; k < cartFrames-1 && newest() < stampOf(700); k += 10 {
		send(k, k+10)
		time.Sleep(20 * time.Millisecond)
	}
	send(k, cartFrames)
	waitFor(lastNs)
	stopForward()
	pw.Close()
	res := <-done
	if res.err != nil {
		t.Fatalf("Forward: %v", res.err)
	}
	t.Logf("summary %+v\nlog:\n%s", res.sum, log.b)
	if res.sum.Reconnects < 1 || res.sum.Dropped < 1 {
		t.Errorf("%d reconnects, %d dropped: want the outage seen", res.sum.Reconnects, res.sum.Dropped)
	}
	p, err := c.PoseAt(context.Background(), "robots/link", lastNs)
	if err != nil {
		t.Fatal(err)
	}
	got := p.GetPose()
	if math.Abs(got.GetXM()-want.GetXM()) > 1e-9 || math.Abs(got.GetYM()-want.GetYM()) > 1e-9 || math.Abs(got.GetHeadingRad()-want.GetHeadingRad()) > 1e-9 {
		t.Errorf("final pose across the outage %v, without it %v", got, want)
	}
}
