package server

import (
	"context"
	"flag"
	"math/rand/v2"
	"syscall"
	"testing"
	"time"

	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// soakCycles is how many SIGKILL restart cycles TestSIGKILLSoak runs: CI
// runs 10 (go test ./server -run TestSIGKILLSoak -soak-cycles 10), a
// developer 100 or more.
var soakCycles = flag.Int("soak-cycles", 2, "SIGKILL restart cycles of TestSIGKILLSoak")

// TestSIGKILLSoak starts the daemon as a child process (see TestMain),
// feeds it on one ingest session, kills it with SIGKILL after a random
// number of verdicts, and restarts it on the same journal, -soak-cycles
// times (the kill-and-restart soak of storage systems, in the manner of
// TestCrashSafety). After every kill: every acknowledged input is in the
// journal with the verdict that was sent, and no client sequence is in it
// twice (the client resends everything it has no verdict for, with the
// same session id, and the service answers what it already took with the
// original verdict; the client here also forgets up to 50 verdicts it had,
// so that every cycle retries); after every restart the robot equals an offline
// replay of its journal.
func TestSIGKILLSoak(t *testing.T) {
	cycles := *soakCycles
	dir := t.TempDir()
	samp, cfg := cartRun(21, float64(20*cycles+30))
	rng := rand.New(rand.NewPCG(21, uint64(cycles)))
	const sid = "soak-3c9d1e7a"
	next := 0 // index of the first sample without a verdict
	var acked, resent int
	start := time.Now()
	for c := 0; c < cycles; c++ {
		cmd, addr := startChild(t, dir)
		t.Cleanup(func() { cmd.Process.Kill() })
		api := stub(t, addr)
		if c == 0 {
			if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
				cmd.Process.Kill()
				t.Fatal(err)
			}
		}
		journaled := checkRestored(t, api, dir)
		kill := 100 + rng.IntN(3000)
		got, dups := soakFeed(t, api, sid, samp, next, kill, journaled, func() { cmd.Process.Signal(syscall.SIGKILL) })
		cmd.Wait()
		acked += len(got)
		resent += dups
		// The client also resends the last few it had verdicts for, as
		// one that lost them with its own crash would.
		next += len(got) - rng.IntN(min(50, len(got)))
		checkAcknowledged(t, dir, got)
		if next >= len(samp)-3000 {
			t.Fatalf("ran out of samples after %d cycles", c+1)
		}
	}
	cmd, addr := startChild(t, dir)
	defer cmd.Process.Kill()
	checkRestored(t, stub(t, addr), dir)
	t.Logf("%d SIGKILL cycles in %v: %d verdicts, %d retried inputs answered with their original verdict, none lost, none applied twice",
		cycles, time.Since(start).Round(time.Millisecond), acked, resent)
}

// soakFeed sends samples from next on, with client sequence index+1, and
// collects verdicts until the kill after kill verdicts ends the stream.
// It returns the verdicts and how many were for samples the journal held
// before (sequence up to journaled: retries answered with the original
// verdict).
func soakFeed(t *testing.T, api pb.FusionServiceClient, sid string, samp []*pb.Sample, next, kill int, journaled uint64, killNow func()) ([]*pb.IngestResponse, int) {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	st, err := api.Ingest(ctx)
	if err != nil {
		t.Fatal(err)
	}
	go func() {
		for i := next; i < len(samp); i++ {
			if st.Send(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: uint64(i + 1), Sample: samp[i], SessionId: sid}) != nil {
				return
			}
		}
	}()
	var got []*pb.IngestResponse
	dups := 0
	for {
		resp, err := st.Recv()
		if err != nil {
			if len(got) < kill {
				t.Fatalf("stream ended after %d verdicts: %v", len(got), err)
			}
			return got, dups
		}
		if want := uint64(next + len(got) + 1); resp.GetClientSequence() != want {
			t.Fatalf("verdict for client sequence %d, want %d", resp.GetClientSequence(), want)
		}
		if s := resp.GetSequence(); s != 0 && s <= journaled {
			dups++
		}
		got = append(got, resp)
		if len(got) == kill {
			killNow()
		}
	}
}

// checkAcknowledged checks that every acknowledged input is in the journal
// as sent and that no client sequence was taken twice.
func checkAcknowledged(t *testing.T, dir string, acked []*pb.IngestResponse) {
	t.Helper()
	journaled := map[uint64]*pb.IngestResponse{}
	clientSeqs := map[uint64]uint64{}
	clientSeqOf := map[uint64]uint64{}
	_, err := journal.Read(dir, "cart", journal.Visitor{Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
		if first, ok := clientSeqs[in.GetClientSequence()]; ok {
			t.Fatalf("client sequence %d applied twice: inputs %d and %d", in.GetClientSequence(), first, in.GetSequence())
		}
		clientSeqs[in.GetClientSequence()] = in.GetSequence()
		clientSeqOf[in.GetSequence()] = in.GetClientSequence()
		journaled[in.GetSequence()] = out.GetResponse()
		return nil
	}})
	if err != nil {
		t.Fatal(err)
	}
	for _, resp := range acked {
		if resp.GetSequence() != 0 && !proto.Equal(journaled[resp.GetSequence()], journaledForm(t, resp, clientSeqOf)) {
			t.Fatalf("acknowledged input %d (client sequence %d) is not in the journal as sent", resp.GetSequence(), resp.GetClientSequence())
		}
	}
}

// checkRestored checks that the restarted robot is what an offline replay
// of its journal gives, and returns its input count.
func checkRestored(t *testing.T, api pb.FusionServiceClient, dir string) uint64 {
	t.Helper()
	want, _, err := journal.Replay(dir, "cart", journal.ReplayOptions{Check: true})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	r, err := api.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil || r.GetRobot().GetState() != pb.RobotState_ROBOT_STATE_SERVING || r.GetRobot().GetInputCount() != want.Sequence() {
		t.Fatalf("restored robot %v (%v); the journal replays to %d inputs", r.GetRobot(), err, want.Sequence())
	}
	if want.Sequence() == 0 {
		return 0
	}
	p, err := api.GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: "robots/cart", StampNs: want.NewestNs()})
	if err != nil {
		t.Fatal(err)
	}
	if wp := want.Pose().Pose; p.GetPose().GetPose().GetXM() != wp.X || p.GetPose().GetPose().GetYM() != wp.Y || p.GetPose().GetPose().GetHeadingRad() != wp.Heading {
		t.Fatalf("restored pose %v, offline replay %+v", p.GetPose().GetPose(), wp)
	}
	return want.Sequence()
}
