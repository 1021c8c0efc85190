package server

import (
	"context"
	"testing"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// TestSnapshotCadenceSurvivesRestarts: restarted every 5,000 inputs with
// SnapshotEvery 20,000, the service still writes a snapshot every 20,000
// inputs (the count since the last one comes from the journal), so a
// restore replays at most about 20,000 inputs.
func TestSnapshotCadenceSurvivesRestarts(t *testing.T) {
	dir := t.TempDir()
	samp, cfg := cartRun(11, 150) // 310 inputs a second
	const every, restartEvery, total = 20000, 5000, 45000
	if len(samp) < total {
		t.Fatalf("run has %d inputs", len(samp))
	}
	opt := Options{JournalDir: dir, SnapshotEvery: every}
	var maxReplayed int
	for at := 0; at < total; at += restartEvery {
		s, err := New(opt)
		if err != nil {
			t.Fatal(err)
		}
		reports, _ := s.Restore()
		if at == 0 {
			s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
		} else if len(reports) != 1 || reports[0].State != pb.RobotState_ROBOT_STATE_SERVING {
			t.Fatalf("restore at %d: %+v", at, reports)
		}
		for i := at; i < at+restartEvery; i += maxBatch {
			j := min(i+maxBatch, at+restartEvery)
			s.ingestBatch(requests("robots/cart", "", uint64(i+1), samp[i:j]))
		}
		s.Close()
		_, scan, err := journal.Replay(dir, "cart", journal.ReplayOptions{FromSnapshot: true})
		if err != nil {
			t.Fatal(err)
		}
		maxReplayed = max(maxReplayed, scan.Replayed)
		if at+restartEvery >= every+maxBatch && scan.SnapshotSequence == 0 {
			t.Fatalf("no snapshot after %d inputs in restarts of %d", at+restartEvery, restartEvery)
		}
	}
	_, scan, _ := journal.Replay(dir, "cart", journal.ReplayOptions{FromSnapshot: true})
	if scan.SnapshotSequence < 2*every || scan.Pairs != total {
		t.Errorf("after %d inputs: last snapshot at %d, %d inputs; want one at 40,000 or later", total, scan.SnapshotSequence, scan.Pairs)
	}
	if maxReplayed > every+maxBatch {
		t.Errorf("a restore replayed %d inputs, more than the snapshot interval", maxReplayed)
	}
}
