package server

import (
	"context"
	"testing"

	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// TestRetryAcrossRestart: a client that resends what it sent before a
// restart, with the same session id and client sequences, gets the
// original verdicts and nothing is applied twice, whether the verdicts come
// back from the inputs after the last snapshot or from the snapshot itself.
func TestRetryAcrossRestart(t *testing.T) {
	for _, every := range []int{1 << 20, 100} {
		dir := t.TempDir()
		opt := Options{JournalDir: dir, SnapshotEvery: every}
		srv := start(t, testConfig{Options: opt})
		api := stub(t, srv.addr)
		samp, cfg := cartRun(7, 2)
		if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
			t.Fatal(err)
		}
		const sid = "9e2f61d0a4b3c5e7"
		first := feedStub(t, api, "robots/cart", sid, 1, samp[:250])
		srv.stop()
		// The client resends from 30 before the end, or, with snapshots,
		// the 30 up to the last snapshot, so that their verdicts come back
		// from the snapshot.
		from := 220
		if every < 250 {
			_, scan, _ := journal.Replay(dir, "cart", journal.ReplayOptions{FromSnapshot: true})
			if scan.SnapshotSequence < 30 {
				t.Fatalf("snapshot at %d", scan.SnapshotSequence)
			}
			from = int(scan.SnapshotSequence) - 30
		}

		srv = start(t, testConfig{Options: opt})
		api = stub(t, srv.addr)
		again := feedStub(t, api, "robots/cart", sid, uint64(from+1), samp[from:300])
		for k, v := range again[:250-from] {
			if !proto.Equal(v, first[from+k]) {
				t.Errorf("snapshot every %d: retry of %d: %v, want the original %v", every, from+1+k, v, first[from+k])
			}
		}
		for k, v := range again[250-from:] {
			if v.GetSequence() != uint64(251+k) {
				t.Errorf("snapshot every %d: new sample %d has sequence %d", every, 251+k, v.GetSequence())
			}
		}
		r, err := api.GetRobot(context.Background(), &pb.GetRobotRequest{Name: "robots/cart"})
		if err != nil || r.GetRobot().GetInputCount() != 300 {
			t.Errorf("snapshot every %d: %v inputs, want 300 (%v)", every, r.GetRobot().GetInputCount(), err)
		}
		srv.stop()
		if _, seq := offline(t, dir, "cart"); seq != 300 {
			t.Errorf("journal holds %d inputs, want 300", seq)
		}
	}
}

// TestSessionBounds: a robot remembers at most maxSessions sessions, the
// least recently used forgotten first, and sessionVerdicts verdicts of each.
func TestSessionBounds(t *testing.T) {
	var ss sessions
	for i := 0; i < maxSessions+10; i++ {
		ss.add(string(rune('A'+i%26))+itoa3(i), 1, []byte{byte(i)})
	}
	if len(ss.byID) != maxSessions {
		t.Errorf("%d sessions remembered, want %d", len(ss.byID), maxSessions)
	}
	if ss.lookup("A000", 1) != nil || ss.lookup(string(rune('A'+(maxSessions+9)%26))+itoa3(maxSessions+9), 1) == nil {
		t.Error("the oldest session was not the one forgotten")
	}
	var one sessions
	for q := uint64(1); q <= sessionVerdicts+100; q++ {
		one.add("s", q, []byte{1})
	}
	if one.lookup("s", 100) != nil || one.lookup("s", 101) == nil || one.lookup("s", sessionVerdicts+100) == nil {
		t.Error("a session does not keep exactly its newest verdicts")
	}
	if got := one.byID["s"].recent(3); len(got) != 3 || got[2].clientSeq != sessionVerdicts+100 || got[0].clientSeq != sessionVerdicts+98 {
		t.Errorf("recent: %+v", got)
	}
}

func itoa3(i int) string {
	return string([]byte{byte('0' + i/100%10), byte('0' + i/10%10), byte('0' + i%10)})
}
