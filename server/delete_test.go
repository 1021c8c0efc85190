package server

import (
	"context"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

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

// TestHeldResolvedWhenDeleted: a camera's fixes held waiting for odometry
// when their robot is deleted each get a final verdict, VERDICT_INVALID
// with REFUSAL_ROBOT_DELETED and a reason naming the robot, with their
// client sequences: on the camera's stream while it is open; while it is
// gone, on the next stream of its session that sends a request naming the
// robot, whether the name is free (that request refused NOT_FOUND) or names
// a robot created again. The bridge's stream receives none. Before, a held
// fix of a deleted robot was never answered.
func TestHeldResolvedWhenDeleted(t *testing.T) {
	for _, tc := range []struct {
		name               string
		streamGone, create bool
	}{
		{"stream open", false, false},
		{"stream gone, name free", true, false},
		{"stream gone, name created again", true, true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
			defer srv.stop()
			api := dial(t, srv.addr)
			ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
			defer cancel()
			c := heldCamera(t, ctx, api, 33, "camera-d31e")
			odo, cam, held, before, cfg := c.odo, c.cam, c.held, c.before, c.cfg
			if tc.streamGone {
				if err := cam.close(); err != nil {
					t.Fatal(err)
				}
			}
			if _, err := api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart"}); err != nil {
				t.Fatal(err)
			}
			if tc.create {
				if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
					t.Fatal(err)
				}
			}
			if tc.streamGone {
				again, err := openFeed(ctx, api, "robots/cart")
				if err != nil {
					t.Fatal(err)
				}
				again.session = cam.session
				again.sent.Store(cam.sent.Load())
				resp, err := again.apply(before[0])
				wantCode := codes.NotFound
				if tc.create {
					wantCode = codes.OK
				}
				if err != nil || codes.Code(resp.GetStatusCode()) != wantCode {
					t.Fatalf("first request of the new stream: %v, %v; want status %v", resp, err, wantCode)
				}
				cam = again
			}
			if err := cam.close(); err != nil {
				t.Fatal(err)
			}
			seen := map[uint64]bool{}
			for _, r := range cam.resolved {
				if want, ok := held[r.GetSequence()]; !ok || seen[r.GetSequence()] || r.GetClientSequence() != want ||
					r.GetVerdict() != pb.Verdict_VERDICT_INVALID || r.GetRefusal() != pb.Refusal_REFUSAL_ROBOT_DELETED ||
					!strings.Contains(r.GetReason(), "robots/cart was deleted") {
					t.Errorf("resolution %v; want each held input (robot sequence: client sequence %v) once, invalid, robot deleted, naming robots/cart", r, held)
				}
				seen[r.GetSequence()] = true
			}
			if len(seen) != len(held) {
				t.Errorf("%d of %d held inputs resolved", len(seen), len(held))
			}
			if err := odo.close(); err != nil && status.Code(err) != codes.OK {
				t.Fatal(err)
			}
			if len(odo.resolved) != 0 {
				t.Errorf("the odometry stream received %d resolutions", len(odo.resolved))
			}
		})
	}
}

// TestHeldNotResolvedWhenDeleteFails: a deletion whose journal cannot be
// set aside (its manifest's rename fails, EIO) leaves the journal to be
// restored at the next start, the held inputs in it: their senders are
// told nothing then, and after a restart the restored robot decides them,
// each resolution sent once, to the camera's session, none
// REFUSAL_ROBOT_DELETED. Before, the deletion resolved them invalid, never
// to be applied, before the journal was set aside, and the restored robot
// then decided the same inputs again: two final verdicts, the first
// false.
func TestHeldNotResolvedWhenDeleteFails(t *testing.T) {
	dir := t.TempDir()
	ffs := faultfs.New(journal.OS, nil)
	srv := start(t, testConfig{Options: Options{JournalDir: dir, FS: ffs}})
	api := dial(t, srv.addr)
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	c := heldCamera(t, ctx, api, 33, "camera-5b20")
	ffs.SetInject(func(op faultfs.Op, path string) error {
		if op == faultfs.OpRename && strings.HasSuffix(path, "cart.manifest") {
			return syscall.EIO
		}
		return nil
	})
	if _, err := api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart"}); status.Code(err) != codes.Internal {
		t.Fatalf("delete with the rename failing: %v, want INTERNAL", err)
	}
	if err := c.cam.close(); err != nil {
		t.Fatal(err)
	}
	if len(c.cam.resolved) != 0 {
		t.Errorf("the camera received %d resolutions of inputs its journal still holds: %v", len(c.cam.resolved), c.cam.resolved)
	}
	if err := c.odo.close(); err != nil {
		t.Fatal(err)
	}
	srv.stop()

	srv = start(t, testConfig{Options: Options{JournalDir: dir}})
	defer srv.stop()
	api = dial(t, srv.addr)
	odo, err := openFeed(ctx, api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	odo.sent.Store(c.odo.sent.Load())
	applyAll(t, odo, c.after)
	again, err := openFeed(ctx, api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	again.session = c.cam.session
	again.sent.Store(c.cam.sent.Load())
	if _, err := again.apply(c.before[0]); err != nil {
		t.Fatal(err)
	}
	if err := again.close(); err != nil {
		t.Fatal(err)
	}
	checkResolutions(t, again.resolved, c.held)
	for _, r := range again.resolved {
		if r.GetRefusal() == pb.Refusal_REFUSAL_ROBOT_DELETED {
			t.Errorf("the restored robot's resolution %v says it was deleted", r)
		}
	}
	if err := odo.close(); err != nil {
		t.Fatal(err)
	}
}
