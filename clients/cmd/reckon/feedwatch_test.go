package main

import (
	"bytes"
	"context"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"reckon.example/server/convert"
)

// firstLines is the first n lines of the example samples.
func firstLines(t *testing.T, n int) string {
	b, err := os.ReadFile(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.SplitAfter(string(b), "\n")
	return strings.Join(lines[:n], "")
}

// TestFeedStdinPaced feeds a second of samples from standard input at ten
// times real time, and the same samples from a file as fast as possible:
// the verdicts agree, and the paced feed takes about a tenth of the
// samples' time span (checked only loosely: at least half of it).
func TestFeedStdinPaced(t *testing.T) {
	ctx := context.Background()
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	text := firstLines(t, 90)
	var first, last int64
	sr := convert.NewSampleReader(strings.NewReader(text))
	for i := 0; ; i++ {
		s, err := sr.Next()
		if err != nil {
			break
		}
		if i == 0 {
			first = convert.SampleStamp(s)
		}
		last = max(last, convert.SampleStamp(s))
	}
	span := time.Duration(last - first)
	if span < 500*time.Millisecond {
		t.Fatalf("the samples span only %v", span)
	}
	file := filepath.Join(t.TempDir(), "first.jsonl")
	os.WriteFile(file, []byte(text), 0o644)
	start := time.Now()
	paced, errs, code := runCode(t, ctx, text, "feed", "-addr", addr, "-robot", "paced", "-create", exampleConfig, "-pace", "10", "-")
	elapsed := time.Since(start)
	if code != exitOK {
		t.Fatalf("paced feed: exit %d\n%s", code, errs)
	}
	if elapsed < span/10/2 {
		t.Errorf("a feed at ten times real time of %v of samples took %v", span, elapsed)
	}
	fast, errs, code := runCode(t, ctx, "", "feed", "-addr", addr, "-robot", "fast", "-create", exampleConfig, file)
	if code != exitOK {
		t.Fatalf("feed: exit %d\n%s", code, errs)
	}
	_, pv, _ := strings.Cut(paced, ":")
	_, fv, _ := strings.Cut(fast, ":")
	if !strings.HasPrefix(paced, "87 samples sent to robots/paced: applied ") || pv != fv {
		t.Errorf("paced:\n%s\nas fast as possible:\n%s", paced, fast)
	}
}

// TestFeedErrorsNameTheLine: a line that is not a sample stops the feed
// with file:line and exit 5; a sample the robot refuses is reported with
// its file and line.
func TestFeedErrorsNameTheLine(t *testing.T) {
	ctx := context.Background()
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	text := firstLines(t, 6) + // three comment lines, then samples at lines 4 to 6
		`{"odometry":{"stamp_ns":"60000000", "counts":{"counts":["1"]}}}` + "\n" + // line 7: one count for three wheels
		"\n" + // line 8: blank
		`{"odometry":{"stamp_ns":"80000000"` + "\n" // line 9: broken
	file := filepath.Join(t.TempDir(), "bad.jsonl")
	os.WriteFile(file, []byte(text), 0o644)
	// Not -create, which checks the whole file before it creates the robot
	// (TestFeedCreateChecksFileFirst).
	if _, errs, code := runCode(t, ctx, "", "create", "cart", "-addr", addr, "-config", exampleConfig); code != exitOK {
		t.Fatalf("create: exit %d, %s", code, errs)
	}
	out, errs, code := runCode(t, ctx, "", "feed", "-addr", addr, "-robot", "cart", file)
	if code != exitRefused || !strings.Contains(errs, "reckon feed: "+file+":9: ") || strings.Contains(errs, "line 9") {
		t.Errorf("exit %d, stderr %q", code, errs)
	}
	if !strings.HasPrefix(out, "4 samples sent to robots/cart:") || !strings.Contains(out, "invalid 1") || !strings.Contains(out, "\n  "+file+":7: invalid: ") {
		t.Errorf("stdout:\n%s", out)
	}
	_, errs, code = runCode(t, ctx, "{}\n", "feed", "-addr", addr, "-robot", "cart", "-")
	if code != exitRefused || !strings.Contains(errs, "reckon feed: stdin:1: none of odometry") {
		t.Errorf("stdin: exit %d, stderr %q", code, errs)
	}
	if _, errs, code = runCode(t, ctx, "", "feed", "-addr", addr, "-robot", "cart", "/nonexistent.jsonl"); code != exitFailure {
		t.Errorf("a missing file: exit %d, %s", code, errs)
	}
}

// TestFeedGoesOnPastAnUnknownSensor: a fix naming a sensor the robot's
// configuration lacks is refused alone (NOT_FOUND naming sensor_id), and
// feed goes on with the file and exits 0. Before, it took that NOT_FOUND
// for the robot deleted: it stopped there, saying "the robot is gone", and
// exited 4.
func TestFeedGoesOnPastAnUnknownSensor(t *testing.T) {
	ctx := context.Background()
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	b, err := os.ReadFile(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	text := strings.Replace(string(b), `"sensor_id":"camera"`, `"sensor_id":"front-camera"`, 1)
	if text == string(b) {
		t.Fatal("the example samples name no camera fix")
	}
	file := filepath.Join(t.TempDir(), "misnamed.jsonl")
	if err := os.WriteFile(file, []byte(text), 0o644); err != nil {
		t.Fatal(err)
	}
	out, errs, code := runCode(t, ctx, "", "feed", "-addr", addr, "-robot", "cart", "-create", exampleConfig, file)
	if code != exitOK || strings.Contains(errs, "gone") {
		t.Errorf("feed: exit %d, want %d\n%s%s", code, exitOK, out, errs)
	}
	if !strings.HasPrefix(out, "851 samples sent to robots/cart:") || !strings.Contains(out, "invalid 1") || !strings.Contains(out, `unknown sensor: sensor_id "front-camera"`) {
		t.Errorf("stdout:\n%s", out)
	}
}

// TestInterrupted: feed (paced at real time) and watch, interrupted, print
// their summary and exit 130 without the context's error.
func TestInterrupted(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	ctx, cancel := context.WithTimeout(context.Background(), 300*time.Millisecond)
	defer cancel()
	out, errs, code := runCode(t, ctx, "", "feed", "-addr", addr, "-robot", "cart", "-create", exampleConfig, "-pace", "1", exampleSamples)
	if code != exitInterrupted || !strings.Contains(out, " samples sent to robots/cart: applied ") ||
		!strings.Contains(errs, "reckon feed: interrupted after "+exampleSamples+":") || strings.Contains(errs, "context") {
		t.Errorf("feed: exit %d, stdout %q, stderr %q", code, out, errs)
	}
	ctx, cancel = context.WithTimeout(context.Background(), 300*time.Millisecond)
	defer cancel()
	out, errs, code = runCode(t, ctx, "", "watch", "-addr", addr, "-robot", "cart", "-format", "csv")
	if code != exitInterrupted || !strings.HasPrefix(out, "stamp_ns,") || errs != "reckon watch: 1 poses of robots/cart printed, 0 reconnections\n" {
		t.Errorf("watch: exit %d, stdout %q, stderr %q", code, out, errs)
	}
}

// TestWatchNegativeFlags: a negative -count, -interval or -reconnect is a
// usage error (exit 2). Before, -count -1 watched until interrupted, as 0
// does, and the others were taken as 0, all without a word.
func TestWatchNegativeFlags(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	if _, errs, code := runCode(t, context.Background(), "", "create", "cart", "-config", exampleConfig, "-addr", addr); code != exitOK {
		t.Fatalf("create: exit %d, %s", code, errs)
	}
	for _, flag := range [][]string{{"-count", "-1"}, {"-interval", "-1s", "-count", "1"}, {"-reconnect", "-1s", "-count", "1"}} {
		// The old code watched on until the context ended (exit 130).
		ctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
		_, errs, code := runCode(t, ctx, "", append([]string{"watch", "-addr", addr, "-robot", "cart"}, flag...)...)
		cancel()
		if code != exitUsage || !strings.Contains(errs, "none may be negative") {
			t.Errorf("watch %v: exit %d, want %d\n%s", flag, code, exitUsage, errs)
		}
	}
}

// syncBuffer is a bytes.Buffer safe for one writer and one reader.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

// waitFor polls cond for up to 20 s.
func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	for deadline := time.Now().Add(20 * time.Second); !cond(); time.Sleep(20 * time.Millisecond) {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
	}
}

// TestWatchReconnect stops the service under a running watch and starts it
// again on the same port with the same journal: the watch says it lost the
// robot, reconnects, says so, and prints the restored robot's pose. When the
// robot is then deleted, the watch exits 4.
func TestWatchReconnect(t *testing.T) {
	ctx := context.Background()
	dir := t.TempDir()
	addr, stop := serve(t, "127.0.0.1:0", dir)
	if _, errs, code := runCode(t, ctx, "", "feed", "-addr", addr, "-robot", "cart", "-create", exampleConfig, exampleSamples); code != exitOK {
		t.Fatalf("feed: exit %d\n%s", code, errs)
	}
	var out, errb syncBuffer
	done := make(chan error, 1)
	go func() {
		done <- run(ctx, []string{"watch", "-addr", addr, "-robot", "cart", "-format", "csv", "-interval", "0", "-reconnect", "30s"}, nil, &out, &errb)
	}()
	rows := func() []string { return strings.Split(strings.TrimSpace(out.String()), "\n") }
	waitFor(t, "the first pose", func() bool { return len(rows()) >= 2 })
	stop()
	waitFor(t, "the watch to notice", func() bool { return strings.Contains(errb.String(), "reckon watch: lost robots/cart: ") })
	serve(t, addr, dir)
	waitFor(t, "the reconnection", func() bool { return strings.Contains(errb.String(), "reckon watch: reconnected to robots/cart after ") })
	waitFor(t, "the pose after reconnecting", func() bool { return len(rows()) >= 3 })
	r := rows()
	if before, after := strings.Split(r[1], ","), strings.Split(r[2], ","); before[0] != "10000000000" || after[0] != before[0] || after[1] != before[1] {
		t.Errorf("stamp and sequence before and after the restart differ:\n%s\n%s", r[1], r[2])
	}
	if _, errs, code := runCode(t, ctx, "", "delete", "cart", "-addr", addr); code != exitOK {
		t.Fatalf("delete: exit %d, %s", code, errs)
	}
	select {
	case err := <-done:
		if code := exitCode(err); code != exitNotFound {
			t.Errorf("watch of a deleted robot: %v, exit %d, want %d\n%s", err, code, exitNotFound, errb.String())
		}
	case <-time.After(20 * time.Second):
		t.Fatalf("the watch did not end after the robot was deleted\n%s", errb.String())
	}
}

// TestWatchGivesUp: a watch whose service stays away longer than
// -reconnect exits 3.
func TestWatchGivesUp(t *testing.T) {
	ctx := context.Background()
	addr, stop := serve(t, "127.0.0.1:0", t.TempDir())
	if _, errs, code := runCode(t, ctx, "", "create", "cart", "-config", exampleConfig, "-addr", addr); code != exitOK {
		t.Fatalf("create: exit %d, %s", code, errs)
	}
	var out, errb syncBuffer
	done := make(chan error, 1)
	go func() {
		done <- run(ctx, []string{"watch", "-addr", addr, "-robot", "cart", "-format", "jsonl", "-reconnect", "300ms"}, nil, &out, &errb)
	}()
	waitFor(t, "the first pose", func() bool { return strings.Contains(out.String(), "\n") })
	stop()
	select {
	case err := <-done:
		if code := exitCode(err); code != exitUnreachable || !strings.Contains(err.Error(), "gave up reconnecting to robots/cart after 300ms") {
			t.Errorf("%v: exit %d, want %d\n%s", err, code, exitUnreachable, errb.String())
		}
	case <-time.After(20 * time.Second):
		t.Fatalf("the watch did not give up\n%s", errb.String())
	}
}
