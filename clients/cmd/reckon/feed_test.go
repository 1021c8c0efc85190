package main

import (
	"context"
	"io"
	"log/slog"
	"net/http"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"reckon.example/server"
	"reckon.example/server/daemon"
)

// TestFeedAndWatch: reckon feed creates a robot from the example YAML file
// and streams the example JSON Lines into a real service; reckon watch reads
// its pose back as CSV; the service's metrics count the inputs.
func TestFeedAndWatch(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	ready := make(chan [2]string, 1)
	done := make(chan error, 1)
	go func() {
		done <- daemon.Serve(ctx, daemon.Config{Listen: "127.0.0.1:0", MetricsListen: "127.0.0.1:0", Ready: func(a, m string) { ready <- [2]string{a, m} },
			Options: server.Options{JournalDir: t.TempDir(), Logger: slog.New(slog.NewTextHandler(io.Discard, nil))}})
	}()
	addrs := <-ready
	defer func() { cancel(); <-done }()
	out, errs, err := runCmd(t, "feed", "-addr", addrs[0], "-robot", "robots/cart", "-create", "../../../testdata/robots/free-wheel-turn.yaml",
		"../../../testdata/samples/greenhouse-10s.jsonl")
	if err != nil {
		t.Fatalf("feed: %v\n%s", err, errs)
	}
	if !strings.Contains(out, "samples sent to robots/cart: applied") || strings.Contains(out, "invalid 1") {
		t.Errorf("feed output:\n%s", out)
	}
	out, errs, err = runCmd(t, "watch", "-addr", addrs[0], "-robot", "robots/cart", "-format", "csv", "-count", "1")
	if err != nil {
		t.Fatalf("watch: %v\n%s", err, errs)
	}
	lines := strings.Split(strings.TrimSpace(out), "\n")
	if len(lines) != 2 || !strings.HasPrefix(lines[0], "stamp_ns,sequence,x_m") || !strings.HasPrefix(lines[1], "10000000000,") {
		t.Errorf("watch output:\n%s", out)
	}
	resp, err := http.Get("http://" + addrs[1] + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	body, _ := io.ReadAll(resp.Body)
	if !strings.Contains(string(body), `reckon_inputs_total{verdict="applied"}`) || !strings.Contains(string(body), "reckon_robots 1") {
		t.Errorf("metrics lack the input counts:\n%.2000s", body)
	}
	if _, _, err := runCmd(t, "feed", "-addr", addrs[0], "-robot", "robots/cart", "/nonexistent.jsonl"); err == nil {
		t.Errorf("feeding a missing file succeeded")
	}
}

// TestFeedFromLinePastTheEnd: -from-line past the file's last line (a
// mistyped number, or another file than the one an earlier feed named)
// sends nothing, and feed says so with exit status 2 (a bad argument)
// instead of reporting "0 samples sent" as done.
func TestFeedFromLinePastTheEnd(t *testing.T) {
	addr, stop := serve(t, "127.0.0.1:0", t.TempDir())
	defer stop()
	samples := "../../../testdata/samples/greenhouse-10s.jsonl"
	b, err := os.ReadFile(samples)
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Count(string(b), "\n")
	out, errs, code := runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-create", exampleConfig, "-from-line", strconv.Itoa(lines+10), samples)
	if code != exitUsage || !strings.Contains(errs, "past its end") || !strings.Contains(errs, strconv.Itoa(lines)+" lines") {
		t.Errorf("feed -from-line %d of a file of %d lines: exit %d\n%s\n%s", lines+10, lines, code, out, errs)
	}
	// The last line is a sample and is sent (to the robot created now: the
	// refused feed created none).
	if out, errs, code := runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-create", exampleConfig, "-from-line", strconv.Itoa(lines), samples); code != exitOK || !strings.Contains(out, "1 samples sent") {
		t.Errorf("feed -from-line %d (the last line): exit %d\n%s\n%s", lines, code, out, errs)
	}
}

// TestFeedHeldByAnEarlierFeed: a fix that one feed left held (stamped
// after the odometry it had sent) is decided during the next feed on the
// same session. That feed counts it apart, as an earlier feed's sample:
// it took it from its own held count, which went to -1.
func TestFeedHeldByAnEarlierFeed(t *testing.T) {
	addr, stop := serve(t, "127.0.0.1:0", t.TempDir())
	defer stop()
	b, err := os.ReadFile(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.SplitAfter(string(b), "\n")
	const cut = 201 // the line of the odometry at 2.32 s
	if !strings.Contains(lines[cut-1], `"stamp_ns":"2320000000"`) || !strings.Contains(lines[cut-2], `"fix"`) {
		t.Fatalf("the example samples changed: line %d is %q", cut, lines[cut-1])
	}
	held := strings.Replace(lines[cut-2], `"stamp_ns":"2250000000"`, `"stamp_ns":"2330000000"`, 1)
	dir := t.TempDir()
	first, whole := filepath.Join(dir, "first.jsonl"), filepath.Join(dir, "whole.jsonl")
	os.WriteFile(first, []byte(strings.Join(lines[:cut], "")+held), 0o644)
	os.WriteFile(whole, []byte(strings.Join(lines[:cut], "")+held+strings.Join(lines[cut:], "")), 0o644)
	const session = "5e55101ddeadbeef5e55101ddeadbeef"
	out, errs, code := runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-create", exampleConfig, "-session", session, first)
	if code != exitOK || !strings.Contains(out, "held 1") {
		t.Fatalf("first feed: exit %d\n%s\n%s", code, out, errs)
	}
	out, errs, code = runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-session", session, "-from-line", strconv.Itoa(cut+2), whole)
	if code != exitOK || strings.Contains(out, "held -1") || !strings.Contains(out, "and 1 held by an earlier feed on the session decided: applied 1") {
		t.Errorf("second feed: exit %d\n%s\n%s", code, out, errs)
	}
}

// TestFeedCreateChecksFileFirst: feed -create reads and checks the samples
// file before it creates the robot. A file malformed at its seventh line
// (after three samples), a
// file that is not JSON Lines at all (on standard input, where the first
// sample is checked) and -from-line past the end create nothing, and with
// -replace the robot that existed keeps its configuration and its inputs.
// Before, the robot was created (or replaced, its journal set aside)
// first, and the error left a new robot with nothing in it.
func TestFeedCreateChecksFileFirst(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	ctx := context.Background()
	bad := filepath.Join(t.TempDir(), "bad.jsonl")
	if err := os.WriteFile(bad, []byte(firstLines(t, 6)+"{\"odometry\": \n"), 0o644); err != nil {
		t.Fatal(err)
	}
	c := dialService(t, addr)
	for _, tc := range []struct {
		stdin string
		args  []string
		code  int
		says  string
	}{
		{"", []string{bad}, exitRefused, bad + ":7: "},
		{"robot: cart\nwheels: []\n", []string{"-"}, exitRefused, "stdin:1: "},
		{"", []string{"-from-line", "100000", exampleSamples}, exitUsage, "past its end"},
	} {
		args := append([]string{"feed", "-addr", addr, "-robot", "cart", "-create", exampleConfig}, tc.args...)
		out, errs, code := runCode(t, ctx, tc.stdin, args...)
		if code != tc.code || !strings.Contains(errs, tc.says) {
			t.Errorf("%v: exit %d, want %d saying %q\n%s%s", tc.args, code, tc.code, tc.says, out, errs)
		}
		if r, err := c.GetRobot(ctx, "robots/cart"); status.Code(err) != codes.NotFound {
			t.Fatalf("%v: robot after the refusal: %v %v", tc.args, r, err)
		}
	}
	// An existing robot with another configuration, fed; -replace with a
	// malformed file leaves it as it was.
	other := otherConfig(t)
	if _, errs, code := runCode(t, ctx, "", "feed", "-addr", addr, "-robot", "cart", "-create", other, exampleSamples); code != exitOK {
		t.Fatalf("feed: exit %d\n%s", code, errs)
	}
	before, err := c.GetRobot(ctx, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	if _, errs, code := runCode(t, ctx, "", "feed", "-addr", addr, "-robot", "cart", "-create", exampleConfig, "-replace", bad); code != exitRefused || !strings.Contains(errs, bad+":7: ") {
		t.Errorf("feed -replace of a malformed file: exit %d\n%s", code, errs)
	}
	after, err := c.GetRobot(ctx, "robots/cart")
	if err != nil || after.GetInputCount() != before.GetInputCount() || after.GetConfig().GetGateProbability() != 0.9 {
		t.Errorf("the robot after feed -replace of a malformed file: %d inputs (had %d), gate_probability %v (had 0.9), %v",
			after.GetInputCount(), before.GetInputCount(), after.GetConfig().GetGateProbability(), err)
	}
	// Standard input that is not a file (runCode's is a reader, as a pipe)
	// cannot be read twice: only its first sample is checked, so a later
	// malformed line stops the feed after the robot was created and the
	// samples before it were sent, as the help and README say.
	if err := c.DeleteRobot(ctx, "robots/cart"); err != nil {
		t.Fatal(err)
	}
	piped := firstLines(t, 6) + "{\"odometry\": \n"
	if _, errs, code := runCode(t, ctx, piped, "feed", "-addr", addr, "-robot", "cart", "-create", exampleConfig, "-"); code != exitRefused || !strings.Contains(errs, "stdin:7: ") {
		t.Errorf("feed -create of a pipe malformed at line 7: exit %d\n%s", code, errs)
	}
	if r, err := c.GetRobot(ctx, "robots/cart"); err != nil || r.GetInputCount() == 0 {
		t.Errorf("feed -create of a pipe malformed at line 7: the robot %v, %v; want it created with the samples before line 7", r, err)
	}
}

// TestFeedNoSuchRobot: feed to a robot that does not exist exits 4, no
// such robot, and sends nothing, as link and the other commands that name
// a robot do. Before, it sent every sample, each answered "invalid: robot:
// robots/nosuch does not exist", and exited 0.
func TestFeedNoSuchRobot(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	for _, args := range [][]string{
		{"feed", "-addr", addr, "-robot", "nosuch", exampleSamples},
		{"link", "-addr", addr, "-robot", "nosuch", "-udp", "127.0.0.1:0"},
	} {
		out, errs, code := runCode(t, context.Background(), "", args...)
		if code != exitNotFound || !strings.Contains(errs, "robot: robots/nosuch does not exist") || strings.Contains(out, "sent") {
			t.Errorf("%s to a robot that does not exist: exit %d, want %d\n%s%s", args[0], code, exitNotFound, out, errs)
		}
	}
}

// TestFeedSessionTakenBefore: a feed continuing a session (-session) over
// samples an earlier feed on it sent says how many the robot had taken
// already, answered with their first verdicts and not applied again.
// Before, the summary counted them among this feed's verdicts alone
// ("applied 851" for 834 new samples), as if they were applied twice.
func TestFeedSessionTakenBefore(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	ctx := context.Background()
	first := filepath.Join(t.TempDir(), "first.jsonl")
	if err := os.WriteFile(first, []byte(firstLines(t, 20)), 0o644); err != nil {
		t.Fatal(err)
	}
	out, errs, code := runCode(t, ctx, "", "feed", "-addr", addr, "-robot", "cart", "-create", exampleConfig, "-session", "cart-s1", first)
	if code != exitOK || !strings.HasPrefix(out, "17 samples sent") || strings.Contains(out, "earlier feed") {
		t.Fatalf("first feed: exit %d\n%s%s", code, out, errs)
	}
	out, errs, code = runCode(t, ctx, "", "feed", "-addr", addr, "-robot", "cart", "-session", "cart-s1", exampleSamples)
	if code != exitOK || !strings.Contains(out, "; 17 of them taken by an earlier feed on the session, answered with their first verdicts and not applied again") {
		t.Errorf("second feed: exit %d\n%s%s", code, out, errs)
	}
	if r, err := dialService(t, addr).GetRobot(ctx, "robots/cart"); err != nil || r.GetInputCount() != 851 {
		t.Errorf("the robot took %d inputs (%v), want the file's 851 once", r.GetInputCount(), err)
	}
}

// TestFeedRobotQuarantined: a robot quarantined during a feed (its
// journal directory removed) stops the feed at the first sample answered
// so (REFUSAL_QUARANTINED), naming its line and why, with exit 5. Before,
// feed sent the rest of the file, counted each sample invalid and exited
// 0.
func TestFeedRobotQuarantined(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "journal")
	addr, _ := serve(t, "127.0.0.1:0", dir)
	time.AfterFunc(400*time.Millisecond, func() { os.RemoveAll(dir) })
	feedStopped(t, addr, exitRefused, `was answered that the robot takes no input \(robot: robots/cart is quarantined: journal directory gone: .*\); feed stopped there`)
}

// feedStopped feeds the example file to robots/cart at addr at 4 times
// real time, and checks that feed exits with code, its error naming the
// line it stopped at and then matching stop, and that it sent no more
// than the samples in flight when that line's answer came. It returns the
// summary's applied count.
func feedStopped(t *testing.T, addr string, code int, stop string) (applied int) {
	t.Helper()
	out, errs, got := runCode(t, context.Background(), "", "feed", "-addr", addr, "-robot", "cart", "-create", exampleConfig, "-pace", "4", exampleSamples)
	t.Logf("feed:\n%s%s", out, errs)
	m := regexp.MustCompile(`greenhouse-10s.jsonl:(\d+) ` + stop).FindStringSubmatch(errs)
	if got != code || m == nil {
		t.Fatalf("feed: exit %d, want %d naming the line it stopped at\n%s", got, code, errs)
	}
	line, _ := strconv.Atoi(m[1])
	sent := regexp.MustCompile(`(\d+) samples sent to robots/cart: applied (\d+)`).FindStringSubmatch(out)
	if sent == nil {
		t.Fatalf("no summary:\n%s", out)
	}
	// It stops within the samples in flight when the first answer came,
	// well before the file's 854 lines (2.5 s at 4 times real time).
	if n, _ := strconv.Atoi(sent[1]); line < 2 || n >= line+200 {
		t.Errorf("feed sent %d samples, stopping at line %d: it did not stop at the first such verdict", n, line)
	}
	applied, _ = strconv.Atoi(sent[2])
	return applied
}

// TestFeedRobotDeleted: the robot is deleted in the middle of a paced feed.
// Feed stops sending at the first sample answered that the robot is gone
// (status NOT_FOUND: "was deleted", or "does not exist" once the service
// forgot it), names that line and exits 4, as watch does. Before, it sent the
// rest of the file, each sample answered "was deleted", and exited 0.
func TestFeedRobotDeleted(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	time.AfterFunc(400*time.Millisecond, func() {
		if _, errs, code := runCode(t, context.Background(), "", "delete", "-addr", addr, "cart"); code != 0 {
			t.Errorf("delete: exit %d\n%s", code, errs)
		}
	})
	if feedStopped(t, addr, exitNotFound, `was answered that the robot is gone \(robot: robots/cart (?:was deleted|does not exist)\); feed stopped there`) == 0 {
		t.Errorf("the samples sent before the delete lost their verdicts in the summary")
	}
}
