package server

import (
	"bytes"
	"context"
	"encoding/binary"
	"fmt"
	"log/slog"
	"net/http/httptest"
	"os"
	"strings"
	"testing"

	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// historyOptions make journals of small segments with frequent snapshots,
// so that a short run has a long history of sealed segments.
func historyOptions(dir string) Options {
	return Options{JournalDir: dir, SegmentBytes: 64 << 10, SnapshotEvery: 500}
}

// cartHistory serves a cart with historyOptions in dir, feeds it n samples
// of a greenhouse run in batches of 100 and stops; it returns the robot's
// pose and sequence at the end.
func cartHistory(t *testing.T, dir string, n int) (*pb.FloorPose, uint64) {
	t.Helper()
	s, err := New(historyOptions(dir))
	if err != nil {
		t.Fatal(err)
	}
	samp, cfg := cartRun(21, float64(n)/300+1)
	if len(samp) < n {
		t.Fatalf("%d samples, want %d", len(samp), n)
	}
	if _, err := s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	for i := 0; i < n; i += 100 {
		take(s, requests("robots/cart", "", uint64(i+1), samp[i:min(i+100, n)]))
	}
	pose, seq := memoryPose(s)
	s.Close()
	return pose, seq
}

// memoryPose returns the cart's pose and sequence in the server's memory.
func memoryPose(s *Server) (*pb.FloorPose, uint64) {
	r, _ := s.lookup("robots/cart")
	r.mu.Lock()
	defer r.mu.Unlock()
	return poseNow(r).GetPose(), r.fr.Sequence()
}

// TestRestoreReadsOnlyTheTail: restoring a robot reads from the last
// snapshot the journal's manifest records to the end, and of the older
// segments only the opening record: with 4 times the history (6 and 21
// segments, each of 64 KiB of inputs and a snapshot of about 200 KiB),
// the bytes read stay under two segments and the manifest.
// VerifyHistories then reads the rest. The code before read every
// segment at restore (and fails this).
func TestRestoreReadsOnlyTheTail(t *testing.T) {
	for _, n := range []int{2500, 10000} {
		dir := t.TempDir()
		want, wantSeq := cartHistory(t, dir, n)
		segs, _ := journal.Segments(dir, "cart")
		var total, largest int64
		for _, p := range segs {
			fi, _ := os.Stat(p)
			total += fi.Size()
			largest = max(largest, fi.Size())
		}
		ffs := faultfs.New(journal.OS, nil)
		opt := historyOptions(dir)
		opt.FS = ffs
		opt.Metrics = NewMetrics()
		s, err := New(opt)
		if err != nil {
			t.Fatal(err)
		}
		reports, err := s.Restore()
		read := ffs.BytesRead()
		man, _ := os.Stat(journal.ManifestPath(dir, "cart"))
		if err != nil || len(reports) != 1 || reports[0].State != pb.RobotState_ROBOT_STATE_SERVING || reports[0].Inputs != n {
			t.Fatalf("restore: %v %+v", err, reports)
		}
		if got, seq := memoryPose(s); seq != wantSeq || !proto.Equal(got, want) {
			t.Errorf("restored at input %d, pose %v; before the restart %d, %v", seq, got, wantSeq, want)
		}
		if read > 2*largest+2*man.Size()+8<<10 {
			t.Errorf("%d segments (%d bytes): restore read %d bytes, want at most two segments, the manifest twice and the opening", len(segs), total, read)
		}
		<-s.VerifyHistories()
		if verified := ffs.BytesRead() - read; verified < total/2 {
			t.Errorf("the verification read %d bytes of %d", verified, total)
		}
		hs := httptest.NewServer(opt.Metrics.Handler())
		const metric = `reckon_robot_history_damage{robot="robots/cart"}`
		if v, ok := scrape(t, hs.URL, metric)[metric]; !ok || v != 0 {
			t.Errorf("%s = %v (present %v) for a whole history, want 0", metric, v, ok)
		}
		hs.Close()
		s.Close()
		t.Logf("%d segments, %d bytes: restore read %d", len(segs), total, read)
	}
}

// flipOldBit flips a bit in the sample of an input in the middle of the
// cart's segment 1 in dir (an input acknowledged long before the last
// snapshot) and returns the segment and the offset of the input's frame.
func flipOldBit(t *testing.T, dir string) (string, int) {
	t.Helper()
	bad := journal.SegmentPath(dir, "cart", 1)
	b, err := os.ReadFile(bad)
	if err != nil {
		t.Fatal(err)
	}
	for off := 16; off+8 <= len(b); off += 8 + int(binary.LittleEndian.Uint32(b[off:])) {
		if off > 4096 && b[off+8] == journal.KindInput {
			b[off+20] ^= 0x04
			if err := os.WriteFile(bad, b, 0o644); err != nil {
				t.Fatal(err)
			}
			return bad, off
		}
	}
	t.Fatal("no input to flip")
	return "", 0
}

// TestOldDamageFoundAfterRestore: a bit flipped in an input of a sealed
// segment before the snapshot restore starts from (the input is lost to
// the history) is not read by the restore: the
// robot serves with its acknowledged state (pose and inputs as before the
// restart) and takes input. VerifyHistories then finds the damage and
// reports it with the file and the frame's offset, in the log and in the
// robot's state_detail, and counts it in the robot's metric
// reckon_robot_history_damage (the code before had no metric of it); the
// robot goes on serving. A restart afterwards serves again.
func TestOldDamageFoundAfterRestore(t *testing.T) {
	dir := t.TempDir()
	want, wantSeq := cartHistory(t, dir, 10000)
	bad, frame := flipOldBit(t, dir)
	var logs bytes.Buffer
	opt := historyOptions(dir)
	opt.Logger = slog.New(slog.NewTextHandler(&logs, nil))
	opt.Metrics = NewMetrics()
	hs := httptest.NewServer(opt.Metrics.Handler())
	defer hs.Close()
	const metric = `reckon_robot_history_damage{robot="robots/cart"}`
	s, err := New(opt)
	if err != nil {
		t.Fatal(err)
	}
	reports, err := s.Restore()
	if err != nil || len(reports) != 1 || reports[0].State != pb.RobotState_ROBOT_STATE_SERVING || reports[0].Detail != "" {
		s.Close()
		t.Fatalf("restore: %v %+v", err, reports)
	}
	if got, seq := memoryPose(s); seq != wantSeq || !proto.Equal(got, want) {
		t.Errorf("restored at input %d, pose %v; before the restart %d, %v", seq, got, wantSeq, want)
	}
	if v, ok := scrape(t, hs.URL, metric)[metric]; ok {
		t.Errorf("%s = %v before the verification, want absent", metric, v)
	}
	<-s.VerifyHistories()
	// One bit flipped: two problems, the damaged record and the gap in the
	// inputs it leaves.
	if v, ok := scrape(t, hs.URL, metric)[metric]; v != 2 {
		t.Errorf("%s = %v (present %v) after the verification, want 2", metric, v, ok)
	}
	where := fmt.Sprintf("%s at byte %d", bad, frame)
	r := robotState(t, s, "robots/cart")
	if r.GetState() != pb.RobotState_ROBOT_STATE_SERVING || !strings.Contains(r.GetStateDetail(), where) || !strings.Contains(r.GetStateDetail(), "journal history damaged") {
		t.Errorf("after the verification: %v %q, want serving with a note naming %s", r.GetState(), r.GetStateDetail(), where)
	}
	t.Logf("state_detail: %s", r.GetStateDetail())
	if !strings.Contains(logs.String(), "journal history damaged") || !strings.Contains(logs.String(), where) {
		t.Errorf("log: %s", logs.String())
	}
	samp, _ := cartRun(21, 10000.0/300+3)
	for _, v := range take(s, requests("robots/cart", "", 10001, samp[10000:10100])) {
		if v.GetSequence() == 0 {
			t.Fatalf("a sample after the verification refused: %v", v)
		}
	}
	want, wantSeq = memoryPose(s)
	s.Close()

	s, err = New(historyOptions(dir))
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	if reports, err := s.Restore(); err != nil || reports[0].State != pb.RobotState_ROBOT_STATE_SERVING {
		t.Fatalf("second restore: %v %+v", err, reports)
	}
	if got, seq := memoryPose(s); seq != wantSeq || !proto.Equal(got, want) {
		t.Errorf("restored at input %d, pose %v; before the restart %d, %v", seq, got, wantSeq, want)
	}
}

// TestOldSegmentGoneAtRestore: a sealed segment before the snapshot that
// is missing or cut short is found at restore, as when restore read every
// segment: the robot is quarantined with a gap naming it.
func TestOldSegmentGoneAtRestore(t *testing.T) {
	for _, c := range []string{"missing", "cut"} {
		t.Run(c, func(t *testing.T) {
			dir := t.TempDir()
			cartHistory(t, dir, 10000)
			bad := journal.SegmentPath(dir, "cart", 1)
			b, _ := os.ReadFile(bad)
			if c == "missing" {
				os.Remove(bad)
			} else {
				// Cut inside its last input: that input is lost.
				last := 0
				for off := 16; off+8 <= len(b); off += 8 + int(binary.LittleEndian.Uint32(b[off:])) {
					if b[off+8] == journal.KindInput {
						last = off
					}
				}
				os.WriteFile(bad, b[:last+10], 0o644)
			}
			s, err := New(historyOptions(dir))
			if err != nil {
				t.Fatal(err)
			}
			defer s.Close()
			reports, err := s.Restore()
			if err != nil || len(reports) != 1 || reports[0].State != pb.RobotState_ROBOT_STATE_QUARANTINED ||
				!strings.Contains(reports[0].Detail, "journal gap") || !strings.Contains(reports[0].Detail, "cart.000001.rjl") && !strings.Contains(reports[0].Detail, "segment 000001 missing") {
				t.Errorf("restore: %v %+v", err, reports)
			}
		})
	}
}

// TestOldDamageNotedWhilePaused: damage that VerifyHistories finds while
// the robot is paused (journal disk full) is in its state_detail once it
// serves again, as when it is found while the robot serves. The code
// before noted it only when the robot served at that moment, and the
// resume cleared the detail: the note was lost (only the log kept it).
func TestOldDamageNotedWhilePaused(t *testing.T) {
	dir := t.TempDir()
	cartHistory(t, dir, 10000)
	bad, frame := flipOldBit(t, dir)
	s, err := New(historyOptions(dir))
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	if reports, err := s.Restore(); err != nil || reports[0].State != pb.RobotState_ROBOT_STATE_SERVING {
		t.Fatalf("restore: %v %+v", err, reports)
	}
	r, _ := s.lookup("robots/cart")
	r.mu.Lock()
	s.journalFailed(r, "journal write", fmt.Errorf("test: %w", journal.ErrNoSpace))
	r.mu.Unlock()
	<-s.VerifyHistories()
	s.probePaused()
	where := fmt.Sprintf("%s at byte %d", bad, frame)
	got := robotState(t, s, "robots/cart")
	if got.GetState() != pb.RobotState_ROBOT_STATE_SERVING || !strings.Contains(got.GetStateDetail(), where) {
		t.Errorf("after the pause: %v %q, want serving with a note naming %s", got.GetState(), got.GetStateDetail(), where)
	}
}

// TestRestoreFromTheSegmentBeingWritten: a robot whose journal is still in
// its first segment (64 MiB: hours of a robot's inputs) is restored from
// its newest snapshot, which the journal's snapshot hint names, reading
// about what the snapshot interval holds, not the segment from its start
// (the code before read it whole, and fails this). VerifyHistories then
// reads the segment up to that snapshot while the robot takes input: a
// bit flipped in an input there is not read by the restore (the robot
// serves its acknowledged state) and is then noted with its file and
// offset.
func TestRestoreFromTheSegmentBeingWritten(t *testing.T) {
	for _, flip := range []bool{false, true} {
		dir := t.TempDir()
		opt := Options{JournalDir: dir, SnapshotEvery: 500}
		s, err := New(opt)
		if err != nil {
			t.Fatal(err)
		}
		samp, cfg := cartRun(21, 3300.0/300+3)
		if _, err := s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
			t.Fatal(err)
		}
		for i := 0; i < 3300; i += 100 {
			take(s, requests("robots/cart", "", uint64(i+1), samp[i:i+100]))
		}
		want, wantSeq := memoryPose(s)
		s.Close()
		segs, _ := journal.Segments(dir, "cart")
		fi, _ := os.Stat(segs[0])
		if len(segs) != 1 {
			t.Fatalf("%d segments", len(segs))
		}
		bad, frame := segs[0], 0
		if flip {
			b, _ := os.ReadFile(bad)
			for off := 16; off+8 <= len(b); off += 8 + int(binary.LittleEndian.Uint32(b[off:])) {
				if off > len(b)/3 && b[off+8] == journal.KindInput {
					b[off+20] ^= 0x04
					frame = off
					break
				}
			}
			os.WriteFile(bad, b, 0o644)
		}
		var logs bytes.Buffer
		ffs := faultfs.New(journal.OS, nil)
		opt.FS, opt.Logger = ffs, slog.New(slog.NewTextHandler(&logs, nil))
		if s, err = New(opt); err != nil {
			t.Fatal(err)
		}
		reports, err := s.Restore()
		read := ffs.BytesRead()
		if err != nil || len(reports) != 1 || reports[0].State != pb.RobotState_ROBOT_STATE_SERVING || reports[0].Inputs != 3300 {
			t.Fatalf("restore: %v %+v", err, reports)
		}
		if got, seq := memoryPose(s); seq != wantSeq || !proto.Equal(got, want) {
			t.Errorf("restored at input %d, pose %v; before the restart %d, %v", seq, got, wantSeq, want)
		}
		if read > fi.Size()/3 {
			t.Errorf("restore read %d bytes of a segment of %d", read, fi.Size())
		}
		done := s.VerifyHistories()
		take(s, requests("robots/cart", "", 3301, samp[3300:3400]))
		<-done
		r := robotState(t, s, "robots/cart")
		where := fmt.Sprintf("%s at byte %d", bad, frame)
		switch {
		case r.GetState() != pb.RobotState_ROBOT_STATE_SERVING:
			t.Errorf("after the verification: %v %q", r.GetState(), r.GetStateDetail())
		case flip && !strings.Contains(r.GetStateDetail(), where):
			t.Errorf("state_detail %q, want a note naming %s", r.GetStateDetail(), where)
		case !flip && (r.GetStateDetail() != "" || !strings.Contains(logs.String(), "journal history verified")):
			t.Errorf("undamaged: state_detail %q, log %s", r.GetStateDetail(), logs.String())
		}
		s.Close()
		t.Logf("flip %v: segment of %d bytes, restore read %d", flip, fi.Size(), read)
	}
}
