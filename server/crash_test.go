package server

import (
	"context"
	"errors"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// TestMain lets the test binary run as the daemon in a child process.
func TestMain(m *testing.M) {
	if dir := os.Getenv("RECKON_TEST_DAEMON_JOURNAL"); dir != "" {
		ready := os.Getenv("RECKON_TEST_DAEMON_READY")
		addr, _, err := serveLoopback(testConfig{Options: Options{JournalDir: dir}})
		if err != nil {
			os.Stderr.WriteString(err.Error() + "\n")
			os.Exit(2)
		}
		os.WriteFile(ready+".tmp", []byte(addr), 0o644)
		os.Rename(ready+".tmp", ready)
		select {} // until the test kills it
	}
	os.Exit(m.Run())
}

func startChild(t *testing.T, dir string) (*exec.Cmd, string) {
	t.Helper()
	ready := filepath.Join(t.TempDir(), "addr")
	cmd := exec.Command(os.Args[0], "-test.run=^$")
	cmd.Env = append(os.Environ(), "RECKON_TEST_DAEMON_JOURNAL="+dir, "RECKON_TEST_DAEMON_READY="+ready)
	cmd.Stderr = os.Stderr
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	for i := 0; i < 500; i++ {
		if b, err := os.ReadFile(ready); err == nil {
			return cmd, strings.TrimSpace(string(b))
		}
		time.Sleep(10 * time.Millisecond)
	}
	cmd.Process.Kill()
	t.Fatal("child daemon did not start")
	return nil, ""
}

// TestCrashSafety kills the daemon (SIGKILL, a child process) in the middle
// of ingest, restarts it on the same journal, and checks that every
// acknowledged sample is in the journal with the verdict that was sent, that
// the robot resumes at the pose a replay of the journal gives, and that it
// goes on taking samples.
func TestCrashSafety(t *testing.T) {
	dir := t.TempDir()
	cmd, addr := startChild(t, dir)
	defer cmd.Process.Kill()
	c := dial(t, addr)
	ctx := context.Background()
	samp, _, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 8, DurationS: 60, OutlierFraction: 0.05})
	if _, err := c.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	sess, err := openFeed(ctx, c, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	// Pipeline: send everything; collect verdicts; kill after 3000.
	acked := map[uint64]*pb.IngestResponse{}
	killed := make(chan struct{})
	go func() {
		for _, s := range samp {
			if err := sess.send(s); err != nil {
				return
			}
		}
	}()
	for {
		resp, err := sess.Recv()
		if err != nil {
			if len(acked) < 3000 {
				t.Fatalf("stream ended after %d verdicts: %v", len(acked), err)
			}
			break
		}
		acked[resp.GetSequence()] = resp
		if len(acked) == 3000 {
			cmd.Process.Signal(syscall.SIGKILL)
			close(killed)
		}
	}
	<-killed
	cmd.Wait()
	if len(acked) >= len(samp) {
		t.Fatalf("all %d samples were acknowledged before the kill", len(samp))
	}
	// Every acknowledged verdict is in the journal, as sent.
	journaled := map[uint64]*pb.IngestResponse{}
	clientSeq := map[uint64]uint64{}
	_, err = journal.Read(dir, "cart", journal.Visitor{Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
		journaled[in.GetSequence()] = out.GetResponse()
		clientSeq[in.GetSequence()] = in.GetClientSequence()
		return nil
	}})
	if err != nil {
		t.Fatal(err)
	}
	var maxAck uint64
	for seq, resp := range acked {
		if !proto.Equal(journaled[seq], journaledForm(t, resp, clientSeq)) {
			t.Fatalf("acknowledged sample %d is not in the journal as sent", seq)
		}
		maxAck = max(maxAck, seq)
	}
	t.Logf("%d acknowledged before the kill, %d in the journal", len(acked), len(journaled))

	// Restart on the same journal.
	want, _, err := journal.Replay(dir, "cart", journal.ReplayOptions{Check: true})
	if err != nil {
		t.Fatal(err)
	}
	srv := start(t, testConfig{Options: Options{JournalDir: dir}})
	defer srv.stop()
	c2 := dial(t, srv.addr)
	got, err := c2.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	n := got.GetRobot().GetInputCount()
	if n < maxAck {
		t.Fatalf("restored robot has %d inputs; %d were acknowledged", n, maxAck)
	}
	resp, err := c2.GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: "robots/cart", StampNs: want.NewestNs()})
	if err != nil {
		t.Fatal(err)
	}
	if p, wp := resp.GetPose().GetPose(), want.Pose().Pose; p.GetXM() != wp.X || p.GetYM() != wp.Y {
		t.Errorf("restored pose %v, journal replay %+v", p, wp)
	}
	// It resumes: the rest of the run goes in, every sample taken.
	sess2, err := openFeed(ctx, c2, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	applied := 0
	for _, s := range samp[n:] {
		resp, err := sess2.apply(s)
		if err != nil {
			t.Fatal(err)
		}
		if v := resp.GetVerdict(); v != pb.Verdict_VERDICT_INVALID && v != pb.Verdict_VERDICT_TOO_OLD {
			applied++
		}
	}
	if applied != len(samp[n:]) {
		t.Errorf("after restart %d of %d samples taken", applied, len(samp[n:]))
	}
	if err := sess2.close(); err != nil && !errors.Is(err, io.EOF) {
		t.Fatal(err)
	}
}
