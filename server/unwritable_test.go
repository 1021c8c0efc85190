package server

import (
	"context"
	"strings"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc/codes"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal/faultfs"
)

// TestUnwritableJournalPauses: a journal whose writes fail twice in a row
// for another reason than a full disk (EROFS: an SD card's file system
// remounted read-only after an error) pauses the robot, its state_detail naming the
// error, and the samples after are refused UNAVAILABLE without reading the
// journal again; once writes work, the robot serves by itself. Before, the
// robot stayed SERVING with no detail, and each sample was taken, failed
// to be written and was undone by a replay of the journal from its last
// snapshot.
func TestUnwritableJournalPauses(t *testing.T) {
	ffs := faultfs.New(faultfs.NewMem(), nil)
	srv := start(t, testConfig{Options: Options{JournalDir: "/j", FS: ffs, ProbeInterval: 20 * time.Millisecond}})
	defer srv.stop()
	api := dial(t, srv.addr)
	samp := createCart(t, api, 3)
	f, err := openFeed(context.Background(), api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	for _, s := range samp[:5] {
		if r, err := f.apply(s); err != nil || r.GetSequence() == 0 {
			t.Fatalf("before: %v %v", r, err)
		}
	}
	ffs.SetInject(faultfs.From(faultfs.OpWrite, "", 0, syscall.EROFS))
	robot := func() *pb.Robot {
		g, err := api.GetRobot(context.Background(), &pb.GetRobotRequest{Name: "robots/cart"})
		if err != nil {
			t.Fatal(err)
		}
		return g.GetRobot()
	}
	var read int64
	for i, s := range samp[5:25] {
		r, err := f.apply(s)
		if err != nil || r.GetSequence() != 0 || codes.Code(r.GetStatusCode()) != codes.Unavailable || !strings.Contains(r.GetReason(), "read-only file system") {
			t.Fatalf("sample %d while unwritable: %v %v, want UNAVAILABLE naming the error", 5+i, r, err)
		}
		if i == 1 {
			// The second failure in a row pauses (the first is retried
			// with the next batch, as a fault once is).
			read = ffs.BytesRead()
			if g := robot(); g.GetState() != pb.RobotState_ROBOT_STATE_PAUSED || !strings.Contains(g.GetStateDetail(), "read-only file system") {
				t.Fatalf("robot %v %q, want paused naming the error", g.GetState(), g.GetStateDetail())
			}
		}
	}
	if more := ffs.BytesRead() - read; more != 0 {
		t.Errorf("the journal was read again (%d bytes) for samples refused while paused", more)
	}
	ffs.SetInject(nil)
	for deadline := time.Now().Add(10 * time.Second); robot().GetState() != pb.RobotState_ROBOT_STATE_SERVING && time.Now().Before(deadline); {
		time.Sleep(10 * time.Millisecond)
	}
	if r, err := f.apply(samp[5]); err != nil || r.GetSequence() != 6 {
		t.Fatalf("after: %v %v, want sequence 6", r, err)
	}
}
