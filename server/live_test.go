package server

import (
	"context"
	"strings"
	"testing"

	"google.golang.org/grpc/codes"

	pb "reckon.example/proto/reckon/v1"
)

// TestLiveConflates: a live view open before a robot is created sees it
// appear; while it does not take, many batches leave one update for the
// robot holding the newest pose, the count of poses it replaced, the newest
// 64 fixes with the rest counted, and the events; the server counts the
// updates conflated. A deleted robot comes out as gone.
func TestLiveConflates(t *testing.T) {
	s, err := New(Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	l, err := s.OpenLive()
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	samp, cfg := cartRun(3, 12)
	ctx := context.Background()
	if _, err := s.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	select {
	case <-l.Notify():
	default:
		t.Fatal("no notice of the new robot")
	}
	if u := l.Take(); len(u) != 1 || u[0].Robot != "robots/cart" || u[0].Pose == nil || u[0].State != pb.RobotState_ROBOT_STATE_SERVING {
		t.Fatalf("after create: %+v", u)
	}
	var last uint64
	fixes, events := 0, 0
	for i, smp := range samp {
		resp := s.ingest("robots/cart", uint64(i+1), smp)
		if resp.GetSequence() > last {
			last = resp.GetSequence()
		}
		if smp.GetFix() != nil && resp.GetSequence() != 0 {
			fixes++
		}
		events += len(resp.GetEvents())
	}
	if fixes <= maxLiveFixes || events == 0 {
		t.Fatalf("the run has %d fixes and %d events; the test needs more than %d and some", fixes, events, maxLiveFixes)
	}
	u := l.Take()
	if len(u) != 1 {
		t.Fatalf("%d updates after the feed, want 1 (conflated)", len(u))
	}
	got := u[0]
	if got.Pose.GetSequence() != last {
		t.Errorf("pose of input %d, want the newest, %d", got.Pose.GetSequence(), last)
	}
	if got.Skipped == 0 || got.Skipped >= uint64(len(samp)) {
		t.Errorf("skipped %d poses of %d inputs", got.Skipped, len(samp))
	}
	if len(got.Fixes) != maxLiveFixes || int(got.FixesDropped)+len(got.Fixes) != fixes {
		t.Errorf("%d fixes kept and %d dropped, want %d kept of %d", len(got.Fixes), got.FixesDropped, maxLiveFixes, fixes)
	}
	if len(got.Events)+int(got.EventsDropped) != events {
		t.Errorf("%d events kept and %d dropped, want %d in all", len(got.Events), got.EventsDropped, events)
	}
	if s.LiveConflated() == 0 {
		t.Error("no update counted as conflated")
	}
	if _, err := s.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart"}); err != nil {
		t.Fatal(err)
	}
	if u := l.Take(); len(u) != 1 || !u[0].Gone || u[0].Pose != nil {
		t.Errorf("after delete: %+v", u)
	}
}

// TestLiveLimit: past MaxViewers open views, another is refused
// RESOURCE_EXHAUSTED naming -max-viewers; a closed view frees its place;
// EndStreams ends the views.
func TestLiveLimit(t *testing.T) {
	s, err := New(Options{Limits: Limits{MaxViewers: 2}})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	a, err := s.OpenLive()
	if err != nil {
		t.Fatal(err)
	}
	if _, err := s.OpenLive(); err != nil {
		t.Fatal(err)
	}
	_, err = s.OpenLive()
	if codeOf(err) != codes.ResourceExhausted || !strings.Contains(err.Error(), "-max-viewers") {
		t.Errorf("third view: %v", err)
	}
	a.Close()
	a.Close() // twice is harmless
	c, err := s.OpenLive()
	if err != nil {
		t.Fatalf("view after one closed: %v", err)
	}
	s.EndStreams()
	select {
	case <-c.Done():
	default:
		t.Error("EndStreams left a view open")
	}
}
