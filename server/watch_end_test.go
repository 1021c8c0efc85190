package server

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"strings"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// TestWatchEndsNotFoundOnDelete: a watch of a robot that is deleted ends
// with NOT_FOUND naming the deletion, so that a client tells it from the
// service stopping, which ends a watch with OK (and after which it may
// connect again).
func TestWatchEndsNotFoundOnDelete(t *testing.T) {
	api := serveCart(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
	ctx := context.Background()
	w := openWatch(t, ctx, api, "robots/cart")
	if _, err := api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart"}); err != nil {
		t.Fatal(err)
	}
	var err error
	for {
		_, err = w.Recv()
		if err != nil {
			break
		}
	}
	if errors.Is(err, io.EOF) || codeOf(err) != codes.NotFound || !strings.Contains(err.Error(), "deleted") {
		t.Errorf("watch of a deleted robot ended with %v, want NOT_FOUND naming the deletion", err)
	}
}

// TestWatchEndsWhenQuarantined: a watch of a robot whose journal fails for
// good (quarantined) ends with FAILED_PRECONDITION naming the problem, as
// a new watch of it is refused; before, it stayed open waiting for poses
// that no longer came, and a dashboard showed the last pose as current.
func TestWatchEndsWhenQuarantined(t *testing.T) {
	s, js := faultyServer(t, Options{JournalDir: t.TempDir()})
	opts, err := ServiceOptions(0)
	if err != nil {
		t.Fatal(err)
	}
	gs := grpc.NewServer(opts...)
	Register(gs, s)
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	go gs.Serve(lis)
	defer gs.Stop()
	api := dial(t, lis.Addr().String())
	ctx := context.Background()
	samp := createCart(t, api, 4)
	f, err := openFeed(ctx, api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	for _, smp := range samp[:10] {
		if _, err := f.apply(smp); err != nil {
			t.Fatal(err)
		}
	}
	// A watch that would outlive the test on the old code ends with it.
	wctx, cancel := context.WithTimeout(ctx, 10*time.Second)
	defer cancel()
	w := openWatch(t, wctx, api, "robots/cart")
	s.mu.RLock()
	r := s.robots["robots/cart"]
	s.mu.RUnlock()
	r.mu.Lock()
	js["0"].failAfter, js["0"].err = 0, fmt.Errorf("journal cart.000000.rjl: %w: %w", journal.ErrBroken, syscall.EIO)
	r.mu.Unlock()
	if resp, err := f.apply(samp[10]); err != nil || codes.Code(resp.GetStatusCode()) != codes.Unavailable {
		t.Fatalf("sample whose journal write failed: %v %v", resp, err)
	}
	for err == nil {
		_, err = w.Recv()
	}
	if codeOf(err) != codes.FailedPrecondition || !strings.Contains(err.Error(), "quarantined") || !strings.Contains(err.Error(), "input/output error") {
		t.Errorf("watch of a quarantined robot ended with %v, want FAILED_PRECONDITION naming the problem", err)
	}
}

// TestWatchNegativeInterval: a watch asking for a negative least interval
// between poses is refused with INVALID_ARGUMENT naming min_interval_ns,
// as ListRobots refuses a negative page_size; before, it was taken as 0
// without a word.
func TestWatchNegativeInterval(t *testing.T) {
	api := serveCart(t, testConfig{})
	w, err := api.Watch(context.Background(), &pb.WatchRequest{Robot: "robots/cart", MinIntervalNs: -1})
	if err == nil {
		_, err = w.Recv()
	}
	if codeOf(err) != codes.InvalidArgument || !strings.Contains(err.Error(), "min_interval_ns") {
		t.Errorf("watch with min_interval_ns -1: %v, want INVALID_ARGUMENT naming min_interval_ns", err)
	}
}

// TestWatchCancelledNotOK: a watch whose client cancels it (or whose
// deadline passes) ends with CANCELLED (DEADLINE_EXCEEDED), as the
// handler's own status. It ended with OK, which says that the service
// stops: a client with a deadline that got the service's status before
// its own took its deadline for a stop. The handler's status is read by
// an interceptor on the real server, as the client, once cancelled, no
// longer receives it.
func TestWatchCancelledNotOK(t *testing.T) {
	ended := make(chan error, 1)
	_, api, _ := serveServer(t, Options{JournalDir: t.TempDir()}, grpc.ChainStreamInterceptor(func(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, handler grpc.StreamHandler) error {
		err := handler(srv, ss)
		if strings.HasSuffix(info.FullMethod, "/Watch") {
			ended <- err
		}
		return err
	}))
	_, cfg := cartRun(3, 1)
	if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	openWatch(t, ctx, api, "robots/cart")
	cancel()
	if err := <-ended; codeOf(err) != codes.Canceled {
		t.Errorf("a cancelled watch's handler returned %v (%v), want CANCELLED", err, codeOf(err))
	}
}
