package main

import (
	"context"
	"io"
	"log/slog"
	"os"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"reckon.example/server"
	"reckon.example/server/daemon"
)

// TestFeedServiceStops: the service stops in the middle of a paced feed
// (SIGTERM; it ends the stream with UNAVAILABLE, EndStreams). Feed
// says that the stream ended with the service's status message, names the first
// line without a verdict and exits 3 (unreachable), not "EOF" and 1. Every
// sample answered is in the journal: restarted, the robot holds at least
// the samples before that line, and at most those and the ones without a
// verdict.
func TestFeedServiceStops(t *testing.T) {
	samples := "../../../testdata/samples/greenhouse-10s.jsonl"
	dir := t.TempDir()
	ctx, cancel := context.WithCancel(context.Background())
	ready := make(chan string, 1)
	done := make(chan error, 1)
	go func() {
		done <- daemon.Serve(ctx, daemon.Config{Listen: "127.0.0.1:0", Ready: func(a, _ string) { ready <- a }, ShutdownGrace: 100 * time.Millisecond,
			Options: server.Options{JournalDir: dir, Logger: slog.New(slog.NewTextHandler(io.Discard, nil))}})
	}()
	addr := <-ready
	time.AfterFunc(500*time.Millisecond, cancel)
	out, errs, code := runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-create", "../../../testdata/robots/free-wheel-turn.yaml", "-pace", "1", samples)
	if err := <-done; err != nil {
		t.Fatalf("serve: %v", err)
	}
	t.Logf("feed:\n%s%s", out, errs)
	// The line is the first sent without a verdict, or, when every sample
	// sent was answered, the one whose send failed.
	m := regexp.MustCompile(`greenhouse-10s.jsonl:(\d+) (?:is the first of (\d+) samples sent without a verdict(?: \(and line \d+ was not sent\))?|was not sent): the stream ended \(the service is stopping: [^)]*\); feed again from there, on the same session \(.*\): -from-line (\d+) -session ([0-9a-f]+)`).FindStringSubmatch(errs)
	if code != exitUnreachable || m == nil || m[1] != m[3] {
		t.Fatalf("feed exit %d, want %d naming the line to feed again from\nstderr:\n%s", code, exitUnreachable, errs)
	}
	line, _ := strconv.Atoi(m[1])
	pending, _ := strconv.Atoi(m[2])
	b, err := os.ReadFile(samples)
	if err != nil {
		t.Fatal(err)
	}
	before := 0
	for _, l := range strings.Split(string(b), "\n")[:line-1] {
		if l != "" && l[0] != '#' {
			before++
		}
	}
	addr, _ = serve(t, "127.0.0.1:0", dir)
	if got := robotInputs(t, addr, "robots/cart"); got < uint64(before) || got > uint64(before+pending) {
		t.Errorf("restarted robot holds %d inputs, want %d to %d", got, before, before+pending)
	}
	// Fed again on the same session, from the first line (more than the
	// feed said, as a cautious operator might), the file's every sample is
	// in the robot once: those it took are answered with their first
	// verdicts (the session's verdicts restored with the robot), not taken
	// again. On a new session the IMU headings and fixes before the stop
	// would be taken a second time.
	out, errs, code = runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-from-line", "1", "-session", m[4], samples)
	if code != 0 {
		t.Fatalf("feed again on session %s: exit %d\n%s%s", m[4], code, out, errs)
	}
	total := 0
	for _, l := range strings.Split(string(b), "\n") {
		if l != "" && l[0] != '#' {
			total++
		}
	}
	if got := robotInputs(t, addr, "robots/cart"); got != uint64(total) {
		t.Errorf("after feeding again on the same session the robot holds %d inputs, want the file's %d", got, total)
	}
}

// TestFeedPaceAcrossRuns: a paced feed of two runs (a controller restart
// between them, each run's stamps from 0 on its own clock) paces the
// second run too, instead of sending it at once because its stamps lie
// before those already sent. At 20 times real time the two 5 s runs take
// at least 0.45 s together; the second alone, sent at once, left 0.25 s.
func TestFeedPaceAcrossRuns(t *testing.T) {
	one, err := os.ReadFile("../../../testdata/samples/greenhouse-reboot-1.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	two, err := os.ReadFile("../../../testdata/samples/greenhouse-reboot-2.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	file := t.TempDir() + "/two-runs.jsonl"
	if err := os.WriteFile(file, append(append(one, []byte("{\"run_start\":{\"boot_id\":\"boot-2\"}}\n")...), two...), 0o644); err != nil {
		t.Fatal(err)
	}
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	start := time.Now()
	out, errs, code := runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-create", "../../../testdata/robots/free-wheel-turn.yaml", "-pace", "20", file)
	took := time.Since(start)
	if code != 0 || !strings.Contains(out, "invalid 0") {
		t.Fatalf("feed exit %d\n%s%s", code, out, errs)
	}
	if took < 450*time.Millisecond {
		t.Errorf("two 5 s runs fed at 20 times real time in %v, want at least 0.45 s: the second run was not paced", took)
	}
}
