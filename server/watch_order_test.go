package server

import (
	"context"
	"sync"
	"sync/atomic"
	"testing"

	pb "reckon.example/proto/reckon/v1"
)

// pauseAfterRun is an Options.afterRun that, once armed, holds the next
// run of samples after it released its robot's lock until released: the
// moment a goroutine may lose the core.
type pauseAfterRun struct {
	armed   atomic.Bool
	entered chan struct{}
	release chan struct{}
}

func newPauseAfterRun() *pauseAfterRun {
	return &pauseAfterRun{entered: make(chan struct{}), release: make(chan struct{})}
}

func (p *pauseAfterRun) hook() {
	if p.armed.CompareAndSwap(true, false) {
		close(p.entered)
		<-p.release
	}
}

// reseedAt re-seeds robot at the origin and returns the input's sequence.
func reseedAt(t *testing.T, api pb.FusionServiceClient, robot string) uint64 {
	t.Helper()
	resp, err := api.ReseedRobot(context.Background(), &pb.ReseedRobotRequest{Robot: robot, Reseed: &pb.Reseed{
		Pose: &pb.FloorPose{}, Covariance: &pb.Covariance{Dimension: 3, Values: []float64{1e-2, 0, 0, 0, 1e-2, 0, 0, 0, 1e-2}}}})
	if err != nil || resp.GetSequence() == 0 {
		t.Errorf("reseed: %v %v", resp, err)
		return 0
	}
	return resp.GetSequence()
}

// TestWatchKeepsRobotOrder: two inputs of one robot from two clients (a
// controller's bridge and a vision process feed one robot at once). The
// first releases the robot's lock and then loses the core (afterRun)
// while the second is taken and its pose watched. A watcher gets the
// robot's poses in the robot's order and ends with the newest: before,
// the first input's pose was published after the second's and replaced it,
// so the watcher went back to an older pose, and would stay there while
// the robot took nothing more.
func TestWatchKeepsRobotOrder(t *testing.T) {
	pause := newPauseAfterRun()
	api := serveCart(t, testConfig{Options: Options{JournalDir: t.TempDir(), afterRun: pause.hook}})
	w := openWatch(t, context.Background(), api, "robots/cart")
	var last uint64
	until := func(seq uint64) {
		t.Helper()
		for last != seq {
			resp, err := w.Recv()
			if err != nil {
				t.Fatalf("watch ended before pose %d: %v", seq, err)
			}
			s := resp.GetPose().GetSequence()
			if s < last {
				t.Fatalf("watch went back from pose %d to pose %d", last, s)
			}
			last = s
		}
	}
	pause.armed.Store(true)
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		reseedAt(t, api, "robots/cart")
	}()
	<-pause.entered
	second := reseedAt(t, api, "robots/cart")
	until(second)
	close(pause.release)
	wg.Wait()
	// The first input's pose, published late, would come before this
	// one's.
	until(reseedAt(t, api, "robots/cart"))
}

// TestLiveGoneStaysGone: an input of a robot releases the robot's lock and
// loses the core (afterRun) while the robot is deleted. A live view then
// holds the robot as gone: before, the input's pose was published after
// the deletion and brought the robot back on every open view.
func TestLiveGoneStaysGone(t *testing.T) {
	pause := newPauseAfterRun()
	s, err := New(Options{afterRun: pause.hook})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	ctx := context.Background()
	_, cfg := cartRun(3, 1)
	if _, err := s.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	l, err := s.OpenLive()
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	l.Take()
	pause.armed.Store(true)
	taken := make(chan *pb.IngestResponse, 1)
	go func() {
		taken <- s.ingest("robots/cart", 1, &pb.Sample{Sample: &pb.Sample_Reseed{Reseed: &pb.Reseed{
			Pose: &pb.FloorPose{}, Covariance: &pb.Covariance{Dimension: 3, Values: []float64{1e-2, 0, 0, 0, 1e-2, 0, 0, 0, 1e-2}}}}})
	}()
	<-pause.entered
	if _, err := s.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart"}); err != nil {
		t.Fatal(err)
	}
	close(pause.release)
	if resp := <-taken; resp.GetSequence() == 0 {
		t.Fatalf("the input before the deletion was not taken: %v", resp)
	}
	u := l.Take()
	if len(u) != 1 || !u[0].Gone {
		t.Errorf("live view after the deletion: %+v, want the robot gone", u)
	}
}
