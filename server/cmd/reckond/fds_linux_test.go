package main

import (
	"net"
	"os"
	"os/exec"
	"regexp"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"
)

// TestMain runs reckond itself when RECKOND_TEST_NOFILE is set: with that
// many file descriptors at most (soft and hard limit, as ulimit -n sets
// them) and the arguments in RECKOND_TEST_ARGS.
func TestMain(m *testing.M) {
	if n, _ := strconv.ParseUint(os.Getenv("RECKOND_TEST_NOFILE"), 10, 64); n > 0 {
		if err := syscall.Setrlimit(syscall.RLIMIT_NOFILE, &syscall.Rlimit{Cur: n, Max: n}); err != nil {
			panic(err)
		}
		os.Args = append([]string{"reckond"}, strings.Fields(os.Getenv("RECKOND_TEST_ARGS"))...)
		main()
		os.Exit(0)
	}
	os.Exit(m.Run())
}

// TestOutOfFileDescriptors: reckond with 40 file descriptors and 60 idle
// connections cannot accept more; it says so once, naming the limit, and
// that it accepts again once they close; SIGTERM then stops it with exit
// 0. Before, grpc-go retried the accepts in silence: nothing in the log
// said why no client could connect.
func TestOutOfFileDescriptors(t *testing.T) {
	cmd := exec.Command(os.Args[0], "-test.run=^$")
	cmd.Env = append(os.Environ(), "RECKOND_TEST_NOFILE=40", "RECKOND_TEST_ARGS=-listen 127.0.0.1:0 -journal "+t.TempDir())
	logs := &lockedBuffer{}
	cmd.Stderr = logs
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	defer cmd.Process.Kill()
	waitFor := func(what string) string {
		t.Helper()
		for deadline := time.Now().Add(30 * time.Second); time.Now().Before(deadline); waitABit() {
			if s := logs.String(); strings.Contains(s, what) {
				return s
			}
		}
		t.Fatalf("no %q in the log:\n%s", what, logs.String())
		return ""
	}
	m := regexp.MustCompile(`msg=serving listen=(\S+)`).FindStringSubmatch(waitFor("msg=serving"))
	var held []net.Conn
	for range 60 {
		c, err := net.DialTimeout("tcp", m[1], 5*time.Second)
		if err != nil {
			t.Fatal(err)
		}
		held = append(held, c)
	}
	s := waitFor("accepting connections fails")
	if n := strings.Count(s, "accepting connections fails"); n != 1 || !strings.Contains(s, "ulimit -n") {
		t.Errorf("the failing accepts logged %d times, want once naming ulimit -n:\n%s", n, s)
	}
	for _, c := range held {
		c.Close()
	}
	waitFor("accepting connections works again")
	cmd.Process.Signal(syscall.SIGTERM)
	if err := cmd.Wait(); err != nil {
		t.Fatalf("reckond after SIGTERM: %v\n%s", err, logs.String())
	}
}
