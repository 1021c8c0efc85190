package server

import (
	"context"
	"strings"
	"sync"
	"testing"
	"time"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// TestCreateWhileDeleting: a robot is created again under the name of one
// whose deletion is still setting its journal aside (here held at the
// rename of its manifest). The create waits for the deletion and succeeds,
// instead of failing INTERNAL because the old journal's files are still
// there; the new robot takes samples; restarted, the service restores the
// new robot, not the deleted one.
func TestCreateWhileDeleting(t *testing.T) {
	dir := t.TempDir()
	entered, release := make(chan struct{}), make(chan struct{})
	var once sync.Once
	ffs := faultfs.New(journal.OS, nil)
	srv := start(t, testConfig{Options: Options{JournalDir: dir, FS: ffs}})
	ctx := context.Background()
	api := dial(t, srv.addr)
	samp, _, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 2, DurationS: 1})
	if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	f, err := openFeed(ctx, api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	for _, s := range samp[:10] {
		if _, err := f.apply(s); err != nil {
			t.Fatal(err)
		}
	}
	ffs.SetInject(func(op faultfs.Op, path string) error {
		if op == faultfs.OpRename && strings.HasSuffix(path, "cart.manifest") {
			once.Do(func() { close(entered); <-release })
		}
		return nil
	})
	deleted := make(chan error, 1)
	go func() {
		_, err := api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart"})
		deleted <- err
	}()
	<-entered
	created := make(chan error, 1)
	go func() {
		_, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
		created <- err
	}()
	select {
	case err := <-created:
		t.Fatalf("create while the deletion sets the journal aside returned before it: %v", err)
	case <-time.After(100 * time.Millisecond):
	}
	close(release)
	if err := <-deleted; err != nil {
		t.Fatalf("delete: %v", err)
	}
	if err := <-created; err != nil {
		t.Fatalf("create after the deletion: %v", err)
	}
	for _, s := range samp[:5] {
		resp, err := f.apply(s)
		if err != nil || resp.GetSequence() == 0 {
			t.Fatalf("the new robot did not take a sample: %v %v", resp, err)
		}
	}
	if err := f.close(); err != nil {
		t.Fatal(err)
	}
	srv.stop()
	srv = start(t, testConfig{Options: Options{JournalDir: dir}})
	defer srv.stop()
	r, err := dial(t, srv.addr).GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil || r.GetRobot().GetInputCount() != 5 {
		t.Errorf("restored robot: %v inputs, want the new robot's 5 (%v)", r.GetRobot().GetInputCount(), err)
	}
}
