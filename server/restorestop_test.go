package server

import (
	"bytes"
	"context"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"sync/atomic"
	"testing"

	pb "reckon.example/proto/reckon/v1"
)

// doneAfter is a context whose Err says Canceled from its n-th call on.
type doneAfter struct {
	context.Context
	calls atomic.Int64
	n     int64
}

func (c *doneAfter) Err() error {
	if c.calls.Add(1) >= c.n {
		return context.Canceled
	}
	return nil
}

// TestRestoreStops: RestoreContext stops when its context is done, before
// a robot or within its replay, names the robot and returns ctx's error;
// nothing is written to the journal, and a later restore restores every
// input. A stop in the replay does not start the replay again from the
// journal's start (as a snapshot that cannot be restored does).
func TestRestoreStops(t *testing.T) {
	dir := t.TempDir()
	srv := start(t, testConfig{Options: Options{JournalDir: dir, SnapshotEvery: 1 << 30}})
	api := dial(t, srv.addr)
	samp, cfg := cartRun(3, 60)
	if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	f, err := openFeed(context.Background(), api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	for _, s := range samp {
		if _, err := f.apply(s); err != nil {
			t.Fatal(err)
		}
	}
	if err := f.close(); err != nil {
		t.Fatal(err)
	}
	srv.stop()
	if len(samp) < 3*stopCheckInputs {
		t.Fatalf("%d samples: too few for a stop within the replay", len(samp))
	}
	before := dirBytes(t, dir)
	for name, ctx := range map[string]context.Context{
		"before": &doneAfter{Context: context.Background(), n: 1},
		// The third look is at input 2*stopCheckInputs of the replay.
		"in the replay": &doneAfter{Context: context.Background(), n: 3},
	} {
		t.Run(name, func(t *testing.T) {
			s, err := New(Options{JournalDir: dir})
			if err != nil {
				t.Fatal(err)
			}
			reports, err := s.RestoreContext(ctx)
			if !errors.Is(err, context.Canceled) || !strings.Contains(err.Error(), "stopped "+name+" of robots/cart") && !strings.Contains(err.Error(), "stopped "+name+" robots/cart") || len(reports) != 0 || len(s.list()) != 0 {
				t.Errorf("restore: %v, %v, %d robots; want context.Canceled naming robots/cart and no robot", reports, err, len(s.list()))
			}
			if err := s.Close(); err != nil {
				t.Fatal(err)
			}
			if !bytes.Equal(dirBytes(t, dir), before) {
				t.Errorf("the stopped restore changed the journal")
			}
		})
	}
	s, err := New(Options{JournalDir: dir})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	if reports, err := s.Restore(); err != nil || len(reports) != 1 || reports[0].Inputs != len(samp) {
		t.Fatalf("restore after: %v %v, want %d inputs", reports, err, len(samp))
	}
}

// dirBytes is every file of dir but LOCK, by name, concatenated.
func dirBytes(t *testing.T, dir string) []byte {
	t.Helper()
	names, err := filepath.Glob(filepath.Join(dir, "*"))
	if err != nil {
		t.Fatal(err)
	}
	var out []byte
	for _, n := range names {
		if filepath.Base(n) == "LOCK" {
			continue
		}
		b, err := os.ReadFile(n)
		if err != nil {
			t.Fatal(err)
		}
		out = append(append(out, n...), b...)
	}
	return out
}
