package server

import (
	"context"
	"testing"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// TestPeriodicSyncOnlyAfterWrites: the periodic fsync syncs a robot's
// journal once after it was written and not again while it is idle, and
// follows a rotation to the new segment, where the writer has already
// fsynced the old one; what it synced is in the journal.
func TestPeriodicSyncOnlyAfterWrites(t *testing.T) {
	dir := t.TempDir()
	fsys := faultfs.New(journal.OS, nil)
	s, err := New(Options{JournalDir: dir, FS: fsys, SegmentBytes: 4 << 10})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	samp, cfg := cartRun(4, 2)
	if _, err := s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	const name = "robots/cart"
	syncs := func() int {
		before := fsys.Count(faultfs.OpSync)
		s.SyncJournals()
		return fsys.Count(faultfs.OpSync) - before
	}
	take(s, requests(name, "", 1, samp[:20]))
	if n := syncs(); n != 1 {
		t.Errorf("after writes: %d fsyncs, want 1", n)
	}
	if n := syncs(); n != 0 {
		t.Errorf("idle: %d fsyncs, want 0", n)
	}
	segsBefore, _ := journal.SegmentsFS(fsys, dir, "cart")
	take(s, requests(name, "", 21, samp[20:400]))
	segsAfter, _ := journal.SegmentsFS(fsys, dir, "cart")
	if len(segsAfter) <= len(segsBefore) {
		t.Fatalf("no rotation: %d segments before, %d after; the test needs one", len(segsBefore), len(segsAfter))
	}
	if n := syncs(); n != 1 {
		t.Errorf("after a rotation: %d fsyncs, want 1", n)
	}
	assertMemoryIsJournal(t, s, dir, "cart", 400)
}
