package server

import (
	"context"
	"errors"
	"io"
	"strings"
	"testing"

	"google.golang.org/grpc/codes"

	pb "reckon.example/proto/reckon/v1"
)

// TestWatchEndsNotFoundOnDelete: a watch of a robot that is deleted ends
// with NOT_FOUND naming the deletion, so that a client tells it from the
// service stopping, which ends a watch with OK (and after which it may
// connect again).
func TestWatchEndsNotFoundOnDelete(t *testing.T) {
	srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
	defer srv.stop()
	api := dial(t, srv.addr)
	ctx := context.Background()
	_, cfg := cartRun(3, 1)
	if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	w, err := api.Watch(ctx, &pb.WatchRequest{Robot: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := w.Recv(); err != nil {
		t.Fatalf("first pose: %v", err)
	}
	if _, err := api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart"}); err != nil {
		t.Fatal(err)
	}
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
