package server

import (
	"context"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "reckon.example/proto/reckon/v1"
)

// TestJournalDirRemoved: a journal directory removed (or replaced by a
// file) while the service runs quarantines its robots, naming the
// directory, within a sync interval or so; samples sent after that get
// no verdict with a sequence number, and a new robot is refused. Before,
// the robots went on answering verdicts for inputs written to files no
// path reached: every one of them was gone at the next restart, and
// nothing said so.
func TestJournalDirRemoved(t *testing.T) {
	for name, change := range map[string]func(dir string) error{
		"removed": os.RemoveAll,
		"replaced by a file": func(dir string) error {
			if err := os.RemoveAll(dir); err != nil {
				return err
			}
			return os.WriteFile(dir, []byte("not a journal\n"), 0o644)
		},
	} {
		t.Run(name, func(t *testing.T) {
			dir := filepath.Join(t.TempDir(), "journal")
			api := serveCart(t, testConfig{Options: Options{JournalDir: dir, SyncInterval: 5 * time.Millisecond}})
			ctx := context.Background()
			samp, _ := cartRun(3, 1)
			f, err := openFeed(ctx, api, "robots/cart")
			if err != nil {
				t.Fatal(err)
			}
			for _, s := range samp[:10] {
				if resp, err := f.apply(s); err != nil || resp.GetSequence() == 0 {
					t.Fatalf("before: %v %v", resp, err)
				}
			}
			if err := change(dir); err != nil {
				t.Fatal(err)
			}
			var got *pb.Robot
			for deadline := time.Now().Add(10 * time.Second); time.Now().Before(deadline); time.Sleep(5 * time.Millisecond) {
				r, err := api.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
				if err != nil {
					t.Fatal(err)
				}
				if got = r.GetRobot(); got.GetState() == pb.RobotState_ROBOT_STATE_QUARANTINED {
					break
				}
			}
			if got.GetState() != pb.RobotState_ROBOT_STATE_QUARANTINED || !strings.Contains(got.GetStateDetail(), dir) {
				t.Fatalf("robot %v %q, want quarantined naming %s", got.GetState(), got.GetStateDetail(), dir)
			}
			resp, err := f.apply(samp[10])
			if err == nil && (resp.GetSequence() != 0 || resp.GetRefusal() != pb.Refusal_REFUSAL_QUARANTINED || !strings.Contains(resp.GetReason(), "journal directory gone")) {
				t.Fatalf("sample after: %v, want no sequence, REFUSAL_QUARANTINED and a reason naming the journal directory", resp)
			}
			_, err = api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart-b", Config: got.GetConfig()})
			if status.Code(err) != codes.FailedPrecondition || !strings.Contains(err.Error(), dir) {
				t.Fatalf("create after: %v, want FAILED_PRECONDITION naming %s", err, dir)
			}
		})
	}
}
