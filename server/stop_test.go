package server

import (
	"context"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc/codes"

	pb "reckon.example/proto/reckon/v1"
)

// TestStopEndsIngest: a robot's controller streams samples for as long as
// the service runs, so a graceful stop that waited for its stream would
// never end. The stop ends the stream instead: every sample received is
// answered, the stream ends with UNAVAILABLE saying the service stops,
// and every sample answered is in the journal.
func TestStopEndsIngest(t *testing.T) {
	dir := t.TempDir()
	srv := start(t, testConfig{Options: Options{JournalDir: dir}})
	api := dial(t, srv.addr)
	samp, cfg := cartRun(11, 120)
	if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	// A bound that only a hang reaches: before EndStreams ended the
	// stream, the stop waited for it for ever.
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	f, err := openFeed(ctx, api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	go func() {
		for _, s := range samp {
			if f.send(s) != nil {
				return
			}
		}
	}()
	var answered, newest uint64
	var ended error
	stopped := make(chan struct{})
	for {
		resp, err := f.Recv()
		if err != nil {
			ended = err
			break
		}
		if resolutionOnly(resp) {
			continue
		}
		if answered++; resp.GetClientSequence() != answered {
			t.Fatalf("verdict %d answers client sequence %d", answered, resp.GetClientSequence())
		}
		newest = max(newest, resp.GetSequence())
		if answered == 2000 {
			go func() { srv.stop(); close(stopped) }()
		}
	}
	select {
	case <-stopped:
	case <-time.After(time.Minute):
		t.Fatal("the stop still waits for the ingest stream a minute after it ended")
	}
	if int(answered) >= len(samp) {
		t.Fatalf("every one of %d samples was answered before the stop", len(samp))
	}
	if codeOf(ended) != codes.Unavailable || !strings.Contains(ended.Error(), "stopping") {
		t.Errorf("the stream ended with %v, want UNAVAILABLE saying the service stops", ended)
	}
	// The journal holds what was answered, no more, no less.
	srv2 := start(t, testConfig{Options: Options{JournalDir: dir}})
	r, err := dial(t, srv2.addr).GetRobot(context.Background(), &pb.GetRobotRequest{Name: "robots/cart"})
	srv2.stop()
	if err != nil || r.GetRobot().GetInputCount() != newest {
		t.Errorf("restored %d inputs (%v), want the %d answered", r.GetRobot().GetInputCount(), err, newest)
	}
}

// TestCloseTwice: a second Close of a server does nothing and returns
// what the first returned (a deferred Close after an explicit one is
// common practice in Go); it panicked closing a closed channel.
func TestCloseTwice(t *testing.T) {
	s, err := New(Options{JournalDir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	_, cfg := cartRun(1, 1)
	if _, err := s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Fatalf("first close: %v", err)
	}
	if err := s.Close(); err != nil {
		t.Fatalf("second close: %v", err)
	}
}
