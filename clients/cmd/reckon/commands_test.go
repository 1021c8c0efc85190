package main

import (
	"bytes"
	"context"
	"io"
	"log/slog"
	"net"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/daemon"
)

const (
	exampleConfig  = "../../../testdata/robots/free-wheel-turn.yaml"
	exampleSamples = "../../../testdata/samples/greenhouse-10s.jsonl"
)

// runCode runs reckon with stdin and returns its output and exit code.
func runCode(t *testing.T, ctx context.Context, stdin string, args ...string) (stdout, stderr string, code int) {
	t.Helper()
	var out, errb bytes.Buffer
	err := run(ctx, args, strings.NewReader(stdin), &out, &errb)
	code = report(err, &errb)
	return out.String(), errb.String(), code
}

// serve runs a service on listen ("127.0.0.1:0" for any port) with its
// journal in dir; stop stops it and waits for it to end.
func serve(t *testing.T, listen, dir string) (addr string, stop func()) {
	t.Helper()
	return serveWith(t, listen, server.Options{JournalDir: dir})
}

// serveWith is serve with the service's options (a discarding logger if
// they name none).
func serveWith(t *testing.T, listen string, opt server.Options) (addr string, stop func()) {
	t.Helper()
	if opt.Logger == nil {
		opt.Logger = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	ctx, cancel := context.WithCancel(context.Background())
	ready := make(chan string, 1)
	done := make(chan error, 1)
	go func() {
		done <- daemon.Serve(ctx, daemon.Config{Listen: listen, Ready: func(a, _ string) { ready <- a }, Options: opt})
	}()
	select {
	case addr = <-ready:
	case err := <-done:
		cancel()
		t.Fatalf("serve %s: %v", listen, err)
	}
	var once sync.Once
	stop = func() {
		once.Do(func() {
			cancel()
			if err := <-done; err != nil {
				t.Errorf("serve: %v", err)
			}
		})
	}
	t.Cleanup(stop)
	return addr, stop
}

// freeAddr is a loopback address where nothing listens.
func freeAddr(t *testing.T) string {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	addr := l.Addr().String()
	l.Close()
	return addr
}

// otherConfig writes the example configuration with another gate probability.
func otherConfig(t *testing.T) string {
	b, err := os.ReadFile(exampleConfig)
	if err != nil {
		t.Fatal(err)
	}
	s := strings.Replace(string(b), "gate_probability: 0.99", "gate_probability: 0.9", 1)
	if s == string(b) {
		t.Fatal("the example configuration has no gate_probability: 0.99")
	}
	p := filepath.Join(t.TempDir(), "other.yaml")
	if err := os.WriteFile(p, []byte(s), 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

// TestHelpAndUsage: -h and --help print the usage on stdout and exit 0 for
// every command; an unknown flag exits 2 with the flag package's message.
func TestHelpAndUsage(t *testing.T) {
	ctx := context.Background()
	for _, c := range commands() {
		if c.run == nil {
			continue
		}
		t.Run(c.name, func(t *testing.T) {
			for _, h := range []string{"-h", "--help"} {
				out, errs, code := runCode(t, ctx, "", c.name, h)
				if code != exitOK || !strings.HasPrefix(out, "usage: reckon "+c.name) || errs != "" {
					t.Errorf("%s %s: exit %d, stdout %q, stderr %q", c.name, h, code, out, errs)
				}
			}
			out, errs, code := runCode(t, ctx, "", c.name, "-no-such-flag")
			if code != exitUsage || out != "" || !strings.Contains(errs, "flag provided but not defined: -no-such-flag") || !strings.Contains(errs, "usage: reckon "+c.name) {
				t.Errorf("%s -no-such-flag: exit %d, stdout %q, stderr %q", c.name, code, out, errs)
			}
		})
	}
	for _, args := range [][]string{{"help"}, {"-h"}, {"--help"}} {
		if out, _, code := runCode(t, ctx, "", args...); code != exitOK || !strings.Contains(out, "  robots ") || !strings.Contains(out, "130 interrupted") {
			t.Errorf("%v: exit %d, stdout %q", args, code, out)
		}
	}
	for _, args := range [][]string{{}, {"fly"}, {"pose"}, {"pose", "a", "b"}, {"pose", "Not_A_Name"}, {"stats", "cart", "-addr"},
		{"feed", "-robot", "cart"}, {"feed", "-robot", "cart", "-pace", "-1", "x.jsonl"}, {"feed", "-robot", "cart", "-replace", "x.jsonl"},
		{"reseed", "cart", "-x", "1"}, {"reseed", "cart", "-x", "1", "-y", "1", "-heading", "0", "-cov", "1,2"},
		{"create", "cart"}, {"watch"}, {"version", "extra"}, {"replay"}, {"review"}, {"demo", "-layout", "tricycle"},
		{"tune"}, {"tune", "run.jsonl"}, {"tune", "-config", "a.yaml", "-out", "a.yaml", "run.jsonl"}, {"tune", "-config", "a.yaml", "-max-se", "0", "run.jsonl"}} {
		if _, errs, code := runCode(t, ctx, "", args...); code != exitUsage || !strings.Contains(errs, "usage") && !strings.Contains(errs, "robot name") && !strings.Contains(errs, "layout") && !strings.Contains(errs, "name a run") {
			t.Errorf("%v: exit %d, want %d; stderr %q", args, code, exitUsage, errs)
		}
	}
}

func TestVersion(t *testing.T) {
	out, _, code := runCode(t, context.Background(), "", "version")
	if code != exitOK || !strings.HasPrefix(out, "reckon reckon.example") || !strings.Contains(out, " go1.") {
		t.Errorf("version: exit %d, %q", code, out)
	}
}

// TestAdminCommands: create, its refusal of another configuration and
// -replace, robots, stats, pose, reseed and delete against a real service,
// with the exit codes each can produce.
func TestAdminCommands(t *testing.T) {
	ctx := context.Background()
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	rc := func(stdin string, args ...string) (string, string, int) {
		t.Helper()
		return runCode(t, ctx, stdin, append(args, "-addr", addr)...)
	}
	other := otherConfig(t)
	steps := []struct {
		args []string
		code int
		want string // in stdout, or in stderr when the exit code is not 0
	}{
		{[]string{"robots"}, exitOK, "ROBOT"},
		{[]string{"create", "cart", "-config", exampleConfig}, exitOK, "robots/cart created"},
		{[]string{"create", "robots/cart", "-config", exampleConfig}, exitOK, "robots/cart unchanged"},
		{[]string{"create", "cart", "-config", other}, exitRefused, "differs in gate_probability"},
		{[]string{"feed", "-robot", "cart", "-create", other, exampleSamples}, exitRefused, "differs in gate_probability"},
		{[]string{"link", "-robot", "cart", "-create", other, "-udp", "127.0.0.1:0"}, exitRefused, "differs in gate_probability"},
		{[]string{"create", "cart", "-config", other, "-replace"}, exitOK, "robots/cart replaced"},
		{[]string{"create", "cart", "-config", exampleConfig, "-replace"}, exitOK, "robots/cart replaced"},
		{[]string{"create", "cart", "-config", "/nonexistent.yaml"}, exitFailure, "nonexistent.yaml"},
		{[]string{"robots"}, exitOK, "no inputs yet"},
		{[]string{"feed", "-robot", "cart", exampleSamples}, exitOK, "samples sent to robots/cart: applied"},
		{[]string{"robots"}, exitOK, "robots/cart"},
		{[]string{"stats", "cart"}, exitOK, "consistency (mean NIS"},
		{[]string{"stats", "cart"}, exitOK, "sensor camera"},
		{[]string{"stats", "cart", "-json"}, exitOK, `"odometry":{"applied":`},
		{[]string{"pose", "cart"}, exitOK, "    10.000 "},
		{[]string{"pose", "cart", "-at", "9500000000", "-format", "csv"}, exitOK, "\n9500000000,"},
		{[]string{"pose", "cart", "-at", "1000000000000"}, exitRefused, "stamp_ns"},
		{[]string{"reseed", "cart", "-x", "1.5", "-y", "-2", "-heading", "0.5"}, exitOK, "robots/cart reseeded at 10.000 s to x 1.500 m, y -2.000 m, heading 28.6 deg"},
		// A heading beyond a full turn was given in degrees: refused before
		// it reaches the robot (the pose below is still the reseed's).
		// Before, 90 was taken as 90 rad (116.6 degrees once wrapped).
		{[]string{"reseed", "cart", "-x", "1.5", "-y", "-2", "-heading", "90"}, exitUsage, "-heading 90 is more than a full turn (2 pi rad): degrees? It is in radians"},
		{[]string{"start-run", "cart", "-x", "1.5", "-y", "-2", "-heading", "-180"}, exitUsage, "-heading -180 is more than a full turn"},
		{[]string{"reseed", "cart", "-x", "1.5", "-y", "-2", "-heading", "0.5", "-std-rad", "10"}, exitUsage, "-std-rad 10 is more than a full turn"},
		{[]string{"pose", "cart", "-format", "csv"}, exitOK, "\n10000000000,"},
		// The reseed's pose and covariance: 0.05^2 and 0.035^2 as float64 computes them.
		{[]string{"pose", "cart", "-format", "csv"}, exitOK, ",1.5,-2,0.5,0.0025000000000000005,0,0,0.0025000000000000005,0,0.0012250000000000002,"},
		{[]string{"reseed", "cart", "-x", "0", "-y", "0", "-heading", "0", "-at", "1"}, exitRefused, "too_old"},
		{[]string{"reseed", "cart", "-x", "0", "-y", "0", "-heading", "0", "-cov", "1,0,0,0,1,0,0,0,-1"}, exitRefused, "reseed"},
		{[]string{"stats", "nobody"}, exitNotFound, "robots/nobody"},
		{[]string{"pose", "nobody"}, exitNotFound, "robots/nobody"},
		{[]string{"delete", "nobody"}, exitNotFound, "robots/nobody"},
		{[]string{"delete", "cart"}, exitOK, "robots/cart deleted"},
		{[]string{"stats", "cart"}, exitNotFound, "robots/cart"},
	}
	for _, s := range steps {
		out, errs, code := rc("", s.args...)
		text := out
		if s.code != exitOK {
			text = errs
		}
		if code != s.code || !strings.Contains(text, s.want) {
			t.Errorf("%v: exit %d (want %d), stdout %q, stderr %q; want %q", s.args, code, s.code, out, errs, s.want)
		}
	}
	// robots/cart was deleted: the listing holds only its header.
	out, _, code := rc("", "robots")
	if code != exitOK || strings.Contains(out, "robots/cart") {
		t.Errorf("robots after delete: exit %d\n%s", code, out)
	}
	// Nothing listens: exit 3.
	down := freeAddr(t)
	for _, args := range [][]string{{"robots"}, {"stats", "cart"}, {"create", "cart", "-config", exampleConfig}, {"watch", "-robot", "cart"}, {"feed", "-robot", "cart", exampleSamples}} {
		if _, errs, code := runCode(t, ctx, "", append(args, "-addr", down)...); code != exitUnreachable {
			t.Errorf("%v against %s: exit %d, want %d; %s", args, down, code, exitUnreachable, errs)
		}
	}
	// A bad configuration file: exit 5, naming the file and line.
	bad := filepath.Join(t.TempDir(), "bad.yaml")
	os.WriteFile(bad, []byte("imu_mode: absolute\nwheels:\n  - {y_m: 0.1, spokes: 3}\n"), 0o644)
	if _, errs, code := rc("", "create", "cart", "-config", bad); code != exitRefused || !strings.Contains(errs, "bad.yaml: robot configuration file: line 3") {
		t.Errorf("bad configuration: exit %d, %s", code, errs)
	}
}

// TestGatedWhy: a sensor called overconfident although its mean NIS lies
// inside its band was gated more than its gate allows, and stats says so;
// one whose mean NIS is above the band needs no such word.
func TestGatedWhy(t *testing.T) {
	over := pb.ConsistencyVerdict_CONSISTENCY_VERDICT_OVERCONFIDENT
	for _, c := range []struct {
		s    *pb.SensorConsistency
		want string
	}{
		{&pb.SensorConsistency{MeanNis: 2.87, BandLow: 2.44, BandHigh: 3.35, Verdict: over, Counts: &pb.VerdictCounts{Applied: 90, Gated: 10}}, " (10 of 100 fixes gated, more than its gate allows)"},
		{&pb.SensorConsistency{MeanNis: 5.26, BandLow: 2.28, BandHigh: 3.51, Verdict: over, Counts: &pb.VerdictCounts{Applied: 49, Gated: 51}}, ""},
		{&pb.SensorConsistency{MeanNis: 2.9, BandLow: 2.44, BandHigh: 3.35, Verdict: pb.ConsistencyVerdict_CONSISTENCY_VERDICT_CONSISTENT, Counts: &pb.VerdictCounts{Applied: 99, Gated: 1}}, ""},
	} {
		if got := gatedWhy(c.s); got != c.want {
			t.Errorf("%v: %q, want %q", c.s, got, c.want)
		}
	}
}

// TestStatsSaysWhatHeldCounts: the held column counts fixes held on
// arrival, in all, and the last line the samples held now. Before, the
// table's "held 250" stood beside "held now 0" with nothing to tell them
// apart.
func TestStatsSaysWhatHeldCounts(t *testing.T) {
	var b strings.Builder
	st := &pb.RobotStatistics{Odometry: &pb.VerdictCounts{Applied: 900}, Measurements: &pb.VerdictCounts{Applied: 240, Held: 250, Gated: 10}}
	if err := printStats(&b, "cart", st); err != nil {
		t.Fatal(err)
	}
	out := b.String()
	for _, want := range []string{"held: held on arrival, in all; each is counted again under its final verdict", "samples waiting for odometry now 0"} {
		if !strings.Contains(out, want) {
			t.Errorf("stats does not say %q:\n%s", want, out)
		}
	}
	if strings.Contains(out, "held now") {
		t.Errorf("stats says \"held now\" beside a held column that counts first verdicts:\n%s", out)
	}
}

// TestPrefaceHint: a listener that closes each connection before speaking
// gRPC, as a service serving TLS does to a plain-text client (reckond
// -tls-cert, tried by hand: the same error), leaves
// grpc-go's "error reading server preface: EOF"; reckon adds what to check.
func TestPrefaceHint(t *testing.T) {
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer lis.Close()
	go func() {
		for {
			c, err := lis.Accept()
			if err != nil {
				return
			}
			// It reads the client's first bytes (a TLS server, its
			// record header) and closes.
			c.Read(make([]byte, 1024))
			c.Close()
		}
	}()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	_, errs, code := runCode(t, ctx, "", "robots", "-addr", lis.Addr().String())
	if code != exitUnreachable || !strings.Contains(errs, "server preface") || !strings.Contains(errs, "-tls-ca") {
		t.Errorf("exit %d, stderr %q; want exit %d with the hint", code, errs, exitUnreachable)
	}
}

// TestOnlineErrorsPlain: an online command's error from the service is
// printed as the status message after the command's name, "reckon stats:
// robot: robots/nosuch does not exist", not in grpc-go's form "rpc error:
// code = NotFound desc = ..."; the exit code still follows the status code.
func TestOnlineErrorsPlain(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	for _, args := range [][]string{
		{"stats", "nosuch"},
		{"pose", "nosuch"},
		{"delete", "nosuch"},
		{"reseed", "nosuch", "-x", "1", "-y", "2", "-heading", "0"},
		{"feed", "-robot", "nosuch", exampleSamples},
	} {
		_, errs, code := runCode(t, context.Background(), "", append(args, "-addr", addr)...)
		if want := "reckon " + args[0] + ": robot: robots/nosuch does not exist\n"; code != exitNotFound || errs != want {
			t.Errorf("%s of a robot that does not exist: exit %d, stderr %q; want %d, %q", args[0], code, errs, exitNotFound, want)
		}
	}
}

// TestLimitRefused: a call the service refuses at one of its limits
// (RESOURCE_EXHAUSTED: here a robot past -max-robots) exits 5, input
// refused, as its other refusals do. Before, it exited 1, any other
// failure.
func TestLimitRefused(t *testing.T) {
	addr, _ := serveWith(t, "127.0.0.1:0", server.Options{JournalDir: t.TempDir(), Limits: server.Limits{MaxRobots: 1}})
	ctx := context.Background()
	if _, errs, code := runCode(t, ctx, "", "create", "cart", "-config", exampleConfig, "-addr", addr); code != exitOK {
		t.Fatalf("create cart: exit %d: %s", code, errs)
	}
	_, errs, code := runCode(t, ctx, "", "create", "cart-b", "-config", exampleConfig, "-addr", addr)
	if code != exitRefused || !strings.Contains(errs, "-max-robots") {
		t.Errorf("create past -max-robots: exit %d, stderr %q; want %d naming -max-robots", code, errs, exitRefused)
	}
}
