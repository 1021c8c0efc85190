package server

import (
	"context"
	"math/rand/v2"
	"testing"

	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// TestRetryAcrossRestart: a client that resends what it sent before a
// restart, with the same session id and client sequences, gets the
// original verdicts and nothing is applied twice, whether the verdicts come
// back from the inputs after the last snapshot or from the snapshot itself
// (a client may be thousands of verdicts behind the journal: those in
// flight when the service died).
func TestRetryAcrossRestart(t *testing.T) {
	const n, back = 2000, 1500 // inputs before the restart; how far back the client resends
	for _, every := range []int{1 << 20, 1800} {
		dir := t.TempDir()
		opt := Options{JournalDir: dir, SnapshotEvery: every}
		srv := start(t, testConfig{Options: opt})
		api := stub(t, srv.addr)
		samp, cfg := cartRun(7, 7)
		if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
			t.Fatal(err)
		}
		const sid = "9e2f61d0a4b3c5e7"
		first := feedStub(t, api, "robots/cart", sid, 1, samp[:n])
		srv.stop()
		// The client resends the last 1500, or, with snapshots, the 1500
		// up to the last snapshot, so that their verdicts come back from
		// the snapshot.
		from := n - back
		if every < n {
			_, scan, _ := journal.Replay(dir, "cart", journal.ReplayOptions{FromSnapshot: true})
			if scan.SnapshotSequence < back {
				t.Fatalf("snapshot at %d", scan.SnapshotSequence)
			}
			from = int(scan.SnapshotSequence) - back
		}

		srv = start(t, testConfig{Options: opt})
		api = stub(t, srv.addr)
		again := feedStub(t, api, "robots/cart", sid, uint64(from+1), samp[from:n+50])
		for k, v := range again[:n-from] {
			if !proto.Equal(v, first[from+k]) {
				t.Errorf("snapshot every %d: retry of %d: %v, want the original %v", every, from+1+k, v, first[from+k])
			}
		}
		for k, v := range again[n-from:] {
			if v.GetSequence() != uint64(n+1+k) {
				t.Errorf("snapshot every %d: new sample %d has sequence %d", every, n+1+k, v.GetSequence())
			}
		}
		r, err := api.GetRobot(context.Background(), &pb.GetRobotRequest{Name: "robots/cart"})
		if err != nil || r.GetRobot().GetInputCount() != n+50 {
			t.Errorf("snapshot every %d: %v inputs, want %d (%v)", every, r.GetRobot().GetInputCount(), n+50, err)
		}
		srv.stop()
		if _, seq := offline(t, dir, "cart"); seq != n+50 {
			t.Errorf("journal holds %d inputs, want %d", seq, n+50)
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
	// Verdicts of 1 KiB (events and resolutions) in every session: the
	// robot keeps at most maxSessionBytes of them, forgetting the sessions
	// used longest ago, and the session in use keeps its whole window.
	var big sessions
	kib := make([]byte, 1024)
	for i := 0; i < maxSessions; i++ {
		for q := uint64(1); q <= 1000; q++ {
			big.add(itoa3(i), q, kib)
		}
	}
	var sum int
	for _, l := range big.byID {
		sum += l.bytes
	}
	if big.bytes > maxSessionBytes || sum != big.bytes {
		t.Errorf("%d bytes of verdicts remembered (%d counted by session), want at most %d", big.bytes, sum, maxSessionBytes)
	}
	for q := uint64(1); q <= sessionVerdicts; q++ {
		big.add("last", q, kib)
	}
	if big.lookup("last", 1) == nil || big.lookup("last", sessionVerdicts) == nil || big.bytes > maxSessionBytes {
		t.Errorf("the session in use, among %d sessions of %d bytes: want its whole window kept, at most %d bytes in all", len(big.byID), big.bytes, maxSessionBytes)
	}
}

// TestSnapshotSessionsBudget: a snapshot carries each session's whole
// window while it fits, and at most snapshotSessionBytes of verdicts,
// newest session first; restoring them recognises the same retries.
func TestSnapshotSessionsBudget(t *testing.T) {
	wire, _ := proto.Marshal(&pb.IngestResponse{ClientSequence: 1 << 20, Sequence: 1 << 20, Verdict: pb.Verdict_VERDICT_APPLIED, Nis: 1.5, NisDimension: 2})
	var ss sessions
	for i := 0; i < maxSessions; i++ {
		for q := uint64(1); q <= sessionVerdicts+10; q++ {
			resp := &pb.IngestResponse{}
			proto.Unmarshal(wire, resp)
			resp.ClientSequence = q
			b, _ := proto.Marshal(resp)
			ss.add("session-"+itoa3(i), q, b)
		}
	}
	out, err := ss.toProto()
	if err != nil {
		t.Fatal(err)
	}
	bytes := 0
	for _, js := range out {
		for _, v := range js.GetVerdicts() {
			bytes += proto.Size(v)
		}
	}
	newest := out[len(out)-1]
	if bytes > snapshotSessionBytes || newest.GetSessionId() != "session-063" || len(newest.GetVerdicts()) != sessionVerdicts || len(out) < 8 {
		t.Errorf("snapshot: %d sessions, %d bytes, newest %s with %d verdicts", len(out), bytes, newest.GetSessionId(), len(newest.GetVerdicts()))
	}
	var back sessions
	if err := back.restore(out); err != nil {
		t.Fatal(err)
	}
	if back.lookup("session-063", 11) == nil || back.lookup("session-063", 10) != nil {
		t.Error("the restored window of the newest session is not its last 4096")
	}
}

func itoa3(i int) string {
	return string([]byte{byte('0' + i/100%10), byte('0' + i/10%10), byte('0' + i%10)})
}

// TestSessionLogOrders: a session's log answers like a plain record of its
// newest sessionVerdicts client sequences (a map and a queue, the model
// here), while they rise (searched), once one comes out of order (mapped),
// and for re-added ones (a verdict sent again changed).
func TestSessionLogOrders(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 11))
	for _, c := range []struct {
		name string
		next func(q uint64) uint64
	}{
		{"rising by one", func(q uint64) uint64 { return q + 1 }},
		{"rising with gaps", func(q uint64) uint64 { return q + 1 + uint64(rng.IntN(3)) }},
		{"a restart in the middle", func(q uint64) uint64 {
			if q == 3000 {
				return 7
			}
			return q + 1
		}},
		{"shuffled", func(uint64) uint64 { return uint64(rng.IntN(20000)) + 1 }},
	} {
		var ss sessions
		model := map[uint64]byte{}
		var order []uint64
		q := uint64(0)
		for i := range 3 * sessionVerdicts {
			q = c.next(q)
			w := byte(i)
			if _, ok := model[q]; !ok {
				order = append(order, q)
				if len(order) > sessionVerdicts {
					delete(model, order[0])
					order = order[1:]
				}
			}
			model[q] = w
			ss.add("s", q, []byte{w})
			if i%5 == 0 {
				// Sent again: the newest verdict changes (route).
				model[q] = w + 1
				ss.add("s", q, []byte{w + 1})
			}
			if i%97 == 0 || i > 3*sessionVerdicts-50 {
				probes := []uint64{q, q - 1, q + 1, order[0], order[0] - 1}
				for p := uint64(0); p < q+5; p += 1 + q/50 {
					probes = append(probes, p)
				}
				for _, probe := range probes {
					got := ss.lookup("s", probe)
					want, ok := model[probe]
					if ok != (got != nil) || ok && got[0] != want {
						t.Fatalf("%s, after %d adds: lookup(%d) = %v, want %v (held %v)", c.name, i+1, probe, got, want, ok)
					}
				}
			}
		}
	}
}
