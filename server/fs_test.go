package server

import (
	"context"
	"errors"
	"testing"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// TestServerOnMemFS: the server keeps its journal, lock included, on the
// file system of Options.FS, and restores from it.
func TestServerOnMemFS(t *testing.T) {
	mem := faultfs.NewMem()
	s, err := New(Options{JournalDir: "/j", FS: mem})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := New(Options{JournalDir: "/j", FS: mem}); !errors.As(err, new(*journal.LockedError)) {
		t.Errorf("second server: %v, want a *journal.LockedError", err)
	}
	if _, err := s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: &pb.RobotConfig{}}); err != nil {
		t.Fatal(err)
	}
	s.Close()
	if ids, _ := journal.RobotsFS(mem, "/j"); len(ids) != 1 {
		t.Fatalf("robots on the MemFS: %v", ids)
	}
	s, err = New(Options{JournalDir: "/j", FS: mem})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	if reports, err := s.Restore(); err != nil || len(reports) != 1 {
		t.Fatalf("restore: %v %v", reports, err)
	}
}
