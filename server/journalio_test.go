package server

import (
	"context"
	"slices"
	"testing"
	"time"

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
	// The test syncs by itself: a periodic round in between would take
	// the sync it counts (it did, under load in CI).
	s, err := New(Options{JournalDir: dir, FS: fsys, SegmentBytes: 4 << 10, SyncInterval: time.Hour})
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

// TestPeriodicSyncWhole: with the operating system's file system (Linux
// 5.8 on), the periodic sync covers the journals of several written
// robots with one syncfs, which opens none of their segments, and notes
// each as synced; when the syncfs fails it syncs each journal with its
// own descriptor instead. Either way the next round finds nothing to do.
func TestPeriodicSyncWhole(t *testing.T) {
	dir := t.TempDir()
	// The test syncs by itself (a periodic round in between would be
	// another syncfs).
	s, err := New(Options{JournalDir: dir, SyncInterval: time.Hour})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	if s.whole == nil {
		t.Skip("no syncfs that reports errors here")
	}
	samp, cfg := cartRun(4, 2)
	ids := []string{"cart-a", "cart-b", "cart-c"}
	for _, id := range ids {
		if _, err := s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: id, Config: cfg}); err != nil {
			t.Fatal(err)
		}
	}
	write := func(first int) {
		for _, id := range ids {
			take(s, requests(RobotName(id), "", uint64(first), samp[first-1:first+19]))
		}
	}
	// state returns, per robot, whether its syncer is current and whether
	// it holds a descriptor.
	state := func() (current, open []bool) {
		for _, r := range s.list() {
			r.mu.Lock()
			path, writes := r.journal.SyncPoint()
			j := r.journal
			r.mu.Unlock()
			current = append(current, r.sync.current(j, path, writes))
			r.sync.mu.Lock()
			open = append(open, r.sync.f != nil)
			r.sync.mu.Unlock()
		}
		return current, open
	}
	write(1)
	if cur, _ := state(); slices.Contains(cur, true) {
		t.Fatalf("written, not synced yet: current %v", cur)
	}
	s.SyncJournals()
	if cur, open := state(); slices.Contains(cur, false) || slices.Contains(open, true) {
		t.Errorf("after one syncfs: current %v (want all), descriptors open %v (want none)", cur, open)
	}
	// A failing syncfs (on a directory closed since): each journal by
	// itself.
	closed, err := journal.OpenWholeSync(dir)
	if err != nil {
		t.Fatal(err)
	}
	closed.Close()
	open := s.whole
	defer func() { s.whole = open }()
	s.whole = closed
	write(21)
	s.SyncJournals()
	if cur, open := state(); slices.Contains(cur, false) || slices.Contains(open, false) {
		t.Errorf("after a failed syncfs: current %v (want all), descriptors open %v (want all)", cur, open)
	}
	for _, id := range ids {
		r, _ := s.lookup(RobotName(id))
		if r.state != pb.RobotState_ROBOT_STATE_SERVING {
			t.Errorf("%s: %v (%s) after its own fdatasync succeeded", id, r.state, r.detail)
		}
		assertMemoryIsJournal(t, s, dir, id, 40)
	}
}
