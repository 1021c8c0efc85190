package bridge

import (
	"bytes"
	"context"
	"io"
	"math"
	"sync"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/protobuf/proto"

	"reckon.example/clients/client"
	pb "reckon.example/proto/reckon/v1"
)

// lockedWriter serialises the writes of Forward's two goroutines.
type lockedWriter struct {
	mu sync.Mutex
	b  []byte
}

func (w *lockedWriter) text() string {
	w.mu.Lock()
	defer w.mu.Unlock()
	return string(w.b)
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

	l := startRelink(t, c, cartFrame)
	send := l.send
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
	res := l.end()
	if res.err != nil {
		t.Fatalf("Forward: %v", res.err)
	}
	t.Logf("summary %+v\nlog:\n%s", res.sum, l.log.text())
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

// TestLinkRunStartAcrossOutage: the controller restarts while the service
// is away (a brown-out that resets both, the service slower to come
// back). The run start the decoder makes of the new boot byte is decoded
// while no stream is open; Forward must still send it before the new
// boot's odometry once the stream is open again. Before, it was dropped
// with the odometry, and the new boot's samples, on a clock started again
// near zero, were refused as time_backwards for as long as the link ran.
func TestLinkRunStartAcrossOutage(t *testing.T) {
	dir := t.TempDir()
	addr, stop := serveAt(t, "127.0.0.1:0", dir)
	c, err := client.Dial(addr, client.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	createCarts(t, c)

	l := startRelink(t, c, rebootFrame)
	log, send, robot := l.log, l.send, l.robot
	waitFor := func(stamp int64) {
		for deadline := time.Now().Add(30 * time.Second); robot().GetNewestStampNs() != stamp; time.Sleep(20 * time.Millisecond) {
			if time.Now().After(deadline) {
				r := robot()
				t.Fatalf("the service never saw stamp %d: newest %d in run %d (boot %q); link's log:\n%s", stamp, r.GetNewestStampNs(), r.GetRun(), r.GetBootId(), log.text())
			}
		}
	}
	send(0, 300)
	waitFor(rebootStamp(299))
	stop()
	send(300, 340) // the controller restarted while the service is away
	_, stop = serveAt(t, addr, dir)
	defer stop()
	// Frames until the link is through again (gRPC's own reconnection
	// backs off for seconds) and the robot has all of them.
	k := 340
	for ; k < 3300 && robot().GetNewestStampNs() != rebootStamp(k-1); k += 10 {
		send(k, k+10)
		time.Sleep(50 * time.Millisecond)
	}
	send(k, k+10)
	waitFor(rebootStamp(k + 9))
	res := l.end()
	if res.err != nil {
		t.Fatalf("Forward: %v", res.err)
	}
	t.Logf("summary %+v\nlog:\n%s", res.sum, log.text())
	if r := robot(); r.GetRun() != 2 || r.GetBootId() != BootID(2) {
		t.Errorf("robot in run %d of boot %q, want run 2 of %q", r.GetRun(), r.GetBootId(), BootID(2))
	}
	if n := res.sum.Verdicts[pb.Verdict_VERDICT_INVALID]; n != 0 {
		t.Errorf("%d samples refused: %v", n, res.sum.Reasons)
	}
}

// sendFaults is a stream interceptor on the link's connection: it fails
// the sends it is armed for (the request is not sent and its stream ends,
// as when the connection drops between two sends) and records every
// ingest request sent, so that a test can see whether one client sequence
// went out with two different samples.
type sendFaults struct {
	mu      sync.Mutex
	streams int               // streams opened so far
	fail    []sendFault       // armed, in order: the first is tried on each send
	sent    map[uint64][]byte // a client sequence's sample as first sent
	twice   []uint64          // client sequences sent with another sample
}

// sendFault fails the first send on the stream-th stream (from 1) whose
// request match says.
type sendFault struct {
	stream int
	match  func(*pb.IngestRequest) bool
}

func (f *sendFaults) intercept(ctx context.Context, desc *grpc.StreamDesc, cc *grpc.ClientConn, method string, streamer grpc.Streamer, opts ...grpc.CallOption) (grpc.ClientStream, error) {
	ctx, cancel := context.WithCancel(ctx)
	cs, err := streamer(ctx, desc, cc, method, opts...)
	if err != nil {
		cancel()
		return nil, err
	}
	f.mu.Lock()
	f.streams++
	n := f.streams
	f.mu.Unlock()
	return &faultStream{ClientStream: cs, f: f, n: n, cancel: cancel}, nil
}

type faultStream struct {
	grpc.ClientStream
	f      *sendFaults
	n      int
	cancel context.CancelFunc
	dead   bool // a send failed: every later one fails too (f.mu)
}

func (s *faultStream) SendMsg(m any) error {
	req, ok := m.(*pb.IngestRequest)
	if !ok {
		return s.ClientStream.SendMsg(m)
	}
	f := s.f
	f.mu.Lock()
	if s.dead {
		f.mu.Unlock()
		return io.EOF
	}
	if len(f.fail) > 0 && f.fail[0].stream == s.n && f.fail[0].match(req) {
		f.fail = f.fail[1:]
		s.dead = true
		f.mu.Unlock()
		s.cancel()
		return io.EOF // what a stream that ended answers a send
	}
	f.mu.Unlock()
	if err := s.ClientStream.SendMsg(m); err != nil {
		return err
	}
	b, err := proto.MarshalOptions{Deterministic: true}.Marshal(req.GetSample())
	if err != nil {
		return err
	}
	f.mu.Lock()
	defer f.mu.Unlock()
	if first, ok := f.sent[req.GetClientSequence()]; !ok {
		f.sent[req.GetClientSequence()] = b
	} else if !bytes.Equal(first, b) {
		f.twice = append(f.twice, req.GetClientSequence())
	}
	return nil
}

// TestLinkNeverReusesASequence: the controller restarts, and the
// connection drops first as the new boot's run start is sent, then again
// right after it was sent again, before the sample behind it. Every stream
// the link opens again must go on after every client sequence it gave out:
// the service answers a sample whose number it has seen with the verdict
// it gave that number, and does not take it. Before, the link reopened
// after the last sample it had sent whole, the run start's number went to
// the next odometry sample too, and the service answered that sample as
// the run start.
func TestLinkNeverReusesASequence(t *testing.T) {
	addr, stop := serveAt(t, "127.0.0.1:0", t.TempDir())
	defer stop()
	runStart := func(r *pb.IngestRequest) bool { return r.GetSample().GetRunStart() != nil }
	odometry := func(r *pb.IngestRequest) bool { return r.GetSample().GetOdometry() != nil }
	faults := &sendFaults{sent: map[uint64][]byte{}}
	c, err := client.Dial(addr, client.Options{DialOptions: []grpc.DialOption{grpc.WithStreamInterceptor(faults.intercept)}})
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	createCarts(t, c)
	l := startRelink(t, c, rebootFrame)
	log, send, robot := l.log, l.send, l.robot
	send(0, 300)
	for deadline := time.Now().Add(30 * time.Second); robot().GetNewestStampNs() != rebootStamp(299); time.Sleep(20 * time.Millisecond) {
		if time.Now().After(deadline) {
			t.Fatalf("the service never saw boot 1's last frame; link's log:\n%s", log.text())
		}
	}
	faults.mu.Lock()
	faults.fail = []sendFault{{1, runStart}, {2, odometry}}
	faults.mu.Unlock()
	// Frames, a few at a time, until both faults were met and the robot
	// has every frame sent.
	k := 300
	for deadline := time.Now().Add(60 * time.Second); ; k += 5 {
		if time.Now().After(deadline) {
			t.Fatalf("the link never got through both faults to frame %d; link's log:\n%s", k, log.text())
		}
		send(k, k+5)
		time.Sleep(30 * time.Millisecond)
		faults.mu.Lock()
		armed := len(faults.fail)
		faults.mu.Unlock()
		if armed == 0 && robot().GetNewestStampNs() == rebootStamp(k+4) {
			break
		}
	}
	res := l.end()
	if res.err != nil {
		t.Fatalf("Forward: %v", res.err)
	}
	t.Logf("summary %+v\nlog:\n%s", res.sum, log.text())
	faults.mu.Lock()
	defer faults.mu.Unlock()
	if len(faults.twice) > 0 {
		t.Errorf("client sequences %v went out with two different samples", faults.twice)
	}
	if faults.streams < 3 {
		t.Errorf("%d streams opened: want the link to reopen after each fault", faults.streams)
	}
	if r := robot(); r.GetRun() != 2 || r.GetBootId() != BootID(2) {
		t.Errorf("robot in run %d of boot %q, want run 2 of %q", r.GetRun(), r.GetBootId(), BootID(2))
	}
}

// relink is a link to robots/link that Forward runs with Reconnect over a
// pipe, for the tests of a link across outages and faults.
type relink struct {
	t     *testing.T
	c     *client.Client
	pw    *io.PipeWriter
	log   *lockedWriter
	stop  context.CancelFunc
	done  chan forwardResult
	frame func(int) Frame // the frames send sends
}

// forwardResult is what Forward returned.
type forwardResult struct {
	sum Summary
	err error
}

// startRelink opens a session of robots/link on c and starts Forward on
// it; send sends frame's frames.
func startRelink(t *testing.T, c *client.Client, frame func(int) Frame) *relink {
	sessCtx, endSess := context.WithCancel(context.Background())
	t.Cleanup(endSess)
	sess, err := c.OpenIngest(sessCtx, "robots/link")
	if err != nil {
		t.Fatal(err)
	}
	reopen := func(ctx context.Context, id string, last uint64) (*client.Session, error) {
		return c.OpenIngest(sessCtx, "robots/link", client.Resume(id, last))
	}
	pr, pw := io.Pipe()
	ctx, stop := context.WithCancel(context.Background())
	l := &relink{t: t, c: c, pw: pw, log: &lockedWriter{}, stop: stop, done: make(chan forwardResult, 1), frame: frame}
	go func() {
		var d Decoder
		sum, err := Forward(ctx, pr, &d, sess, Reconnect(reopen, l.log))
		l.done <- forwardResult{sum, err}
	}()
	return l
}

// send writes frames from to to to the link.
func (l *relink) send(from, to int) {
	for k := from; k < to; k++ {
		f := l.frame(k)
		if _, err := l.pw.Write(AppendFrame(nil, &f, nil)); err != nil {
			l.t.Fatal(err)
		}
	}
}

// robot returns robots/link as the service has it (nil: not reached).
func (l *relink) robot() *pb.Robot {
	r, err := l.c.GetRobot(context.Background(), "robots/link")
	if err != nil {
		return nil
	}
	return r
}

// end stops the link and returns what Forward returned.
func (l *relink) end() forwardResult {
	l.stop()
	l.pw.Close()
	return <-l.done
}

// rebootFrame is frame k of a controller that restarts at frame 300: boot
// 1 is the cart's arc; boot 2 drives it on from counts, counter and clock
// started again (10 ms frames from 0.1 s).
func rebootFrame(k int) Frame {
	if k < 300 {
		return cartFrame(k)
	}
	j := k - 300
	return wheels(2, uint32(j), uint64(100_000+cartStepUs*j), int32(185*j), int32(215*j), int32(-10*j))
}

// rebootStamp is rebootFrame k's stamp, nanoseconds.
func rebootStamp(k int) int64 { f := rebootFrame(k); return int64(f.StampUs) * 1000 }
