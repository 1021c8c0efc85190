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
)

func TestFlagErrors(t *testing.T) {
	dir := t.TempDir()
	bad := filepath.Join(dir, "bad.yaml")
	os.WriteFile(bad, []byte("wheels:\n  - {y_m: 0.1}\n"), 0o644)
	cases := []struct {
		args []string
		want string
	}{
		{[]string{"-fsync", "sometimes"}, "fsync"},
		{[]string{"-robot", "Cart=x.yaml"}, "ID=CONFIG.yaml"},
		{[]string{"-robot", "cart=" + filepath.Join(dir, "missing.yaml")}, "robot cart"},
		{[]string{"-robot", "cart=" + bad}, "wheels"},
		// The second file used in silence before; an invalid port ends
		// the run if the flag is taken.
		{[]string{"-journal", dir, "-listen", "127.0.0.1:-1", "-robot", "cart=a.yaml", "-robot", "cart=b.yaml"}, `"cart=b.yaml" for flag -robot: robot cart is given twice (cart=a.yaml)`},
		{[]string{"-log-level", "loud"}, "log-level"},
		{[]string{"-token-file", filepath.Join(dir, "none")}, "token-file"},
		{[]string{"-journal", dir, "-listen", "127.0.0.1:0", "-tls-client-ca", bad}, "tls-client-ca needs tls-cert"},
		// Out of range, each was taken as its default before.
		{[]string{"-segment-bytes", "100"}, "segment-bytes: 100 is not between"},
		{[]string{"-segment-bytes", "4294967296"}, "segment-bytes"},
		{[]string{"-verify-mib-per-s", "0"}, "verify-mib-per-s: 0 is not between 1 and"},
		{[]string{"-snapshot-every", "-1"}, "snapshot-every"},
		{[]string{"-max-robots", "0"}, "max-robots"},
		{[]string{"-max-watchers", "0"}, "max-watchers: 0"},
		{[]string{"-max-watchers-per-robot", "-2"}, "max-watchers-per-robot"},
		{[]string{"-max-viewers", "-1"}, "max-viewers"},
		{[]string{"-max-http-connections", "1"}, "max-http-connections: 1 is not between 2 and"},
		{[]string{"-journal", dir, "-view", "127.0.0.1:0", "-max-http-connections", "16"}, "max-http-connections: 16 is not more than -max-viewers (16)"},
		{[]string{"-max-connections", "0"}, "max-connections: 0"},
		{[]string{"-max-string-bytes", "0"}, "max-string-bytes"},
		{[]string{"-max-message-bytes", "-1"}, "max-message-bytes"},
		// The range named the upper bound 2^40 before, which a second
		// check refused past 2 MiB in other words.
		{[]string{"-max-message-bytes", "999999999999"}, "max-message-bytes: 999999999999 is not between 1024 and 2097152"},
		{[]string{"-max-pending-bytes", "0"}, "max-pending-bytes: 0 is not between 1048576 and 68719476736"},
		{[]string{"-max-pending-bytes", "-5"}, "max-pending-bytes: -5 is not between"},
		{[]string{"-max-pending-bytes", "1000"}, "max-pending-bytes: 1000 is not between"},
		{[]string{"-max-pending-bytes", "1099511627776"}, "max-pending-bytes: 1099511627776 is not between 1048576 and 68719476736"},
		{[]string{"-fsync-interval", "-1s"}, "fsync-interval: -1s is not between"},
		{[]string{"-fsync-interval", "0"}, "fsync-interval"},
	}
	for _, c := range cases {
		var out, errb bytes.Buffer
		err := run(context.Background(), c.args, &out, &errb)
		if err == nil || !strings.Contains(err.Error()+errb.String(), c.want) {
			t.Errorf("%v: error %v, want one naming %q", c.args, err, c.want)
		}
	}
}

// TestStartAndStop: the daemon starts with a robot from a YAML file and
// stops cleanly when its context ends (as on SIGINT or SIGTERM), leaving
// the robot's journal.
func TestStartAndStop(t *testing.T) {
	dir := t.TempDir()
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	errb := &lockedBuffer{}
	go func() {
		done <- run(ctx, []string{"-listen", "127.0.0.1:0", "-journal", dir, "-robot", "cart=../../../testdata/robots/drive-wheel-turn.yaml"}, &bytes.Buffer{}, errb)
	}()
	for i := 0; i < 500 && !strings.Contains(errb.String(), "serving"); i++ {
		select {
		case err := <-done:
			t.Fatalf("daemon stopped: %v\n%s", err, errb.String())
		default:
		}
		waitABit()
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatalf("stop: %v", err)
	}
	if _, err := os.Stat(filepath.Join(dir, "cart.000000.rjl")); err != nil {
		t.Errorf("no journal left: %v", err)
	}
}

func waitABit() { <-time.After(10 * time.Millisecond) }

// lockedBuffer is a buffer that the daemon's logger and the test share.
type lockedBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *lockedBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *lockedBuffer) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

// TestHelp: -h prints the usage and the flags on standard output and is
// no failure, as reckon's -h (it returned flag.ErrHelp before, and reckond
// exited 1 with "flag: help requested" after the usage on standard error).
func TestHelp(t *testing.T) {
	for _, arg := range []string{"-h", "-help"} {
		var out, errb bytes.Buffer
		if err := run(context.Background(), []string{arg}, &out, &errb); err != nil {
			t.Errorf("%s: %v", arg, err)
		}
		if !strings.HasPrefix(out.String(), "usage: reckond") || !strings.Contains(out.String(), "-max-message-bytes") || errb.Len() != 0 {
			t.Errorf("%s: standard output %q, standard error %q", arg, out.String(), errb.String())
		}
	}
}

// TestBadFlagSaidOnce: a flag reckond does not know is named once, by the
// error run returns (which main prints), and the usage follows on
// standard error; the flag package's own copy of the error was printed
// before the usage too.
func TestBadFlagSaidOnce(t *testing.T) {
	var stdout, stderr bytes.Buffer
	err := run(context.Background(), []string{"-no-such-flag"}, &stdout, &stderr)
	if err == nil || !strings.Contains(err.Error(), "no-such-flag") {
		t.Fatalf("run: %v", err)
	}
	if strings.Contains(stderr.String(), "no-such-flag") || !strings.Contains(stderr.String(), "usage: reckond") {
		t.Errorf("standard error: %q, want the usage without the error (main prints it)", stderr.String())
	}
}
