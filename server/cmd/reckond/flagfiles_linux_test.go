package main

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"os/exec"
	"os/signal"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"
)

// TestFlagFilesNotRegular: a -robot configuration, a -token-file, a TLS
// certificate or key that is a named pipe no process writes to, a
// directory or a device is refused at once naming the flag and what the
// file is (a pipe with a writer is read: daemon's TestReadFlagFile). Before,
// a named pipe with no writer held the start for ever (open(2) waits for
// a writer; SIGTERM did not end the wait) and a device was read as a file
// (/dev/zero without end).
func TestFlagFilesNotRegular(t *testing.T) {
	dir := t.TempDir()
	fifo := filepath.Join(dir, "fifo")
	if err := syscall.Mkfifo(fifo, 0o600); err != nil {
		t.Skipf("mkfifo: %v", err)
	}
	cases := []struct {
		args []string
		want string
	}{
		{[]string{"-robot", "cart=" + fifo}, "robot cart: " + fifo + " is a named pipe that no process writes to"},
		{[]string{"-token-file", fifo}, "token-file: " + fifo + " is a named pipe that no process writes to"},
		{[]string{"-tls-cert", fifo, "-tls-key", fifo}, "tls-cert: " + fifo + " is a named pipe that no process writes to"},
		{[]string{"-robot", "cart=" + dir}, "robot cart: " + dir + " is a directory"},
		{[]string{"-robot", "cart=/dev/null"}, "robot cart: /dev/null is a character device"},
		{[]string{"-token-file", "/dev/null"}, "token-file: /dev/null is a character device"},
	}
	for _, c := range cases {
		args := append([]string{"-listen", "127.0.0.1:0", "-journal", filepath.Join(dir, "journal")}, c.args...)
		done := make(chan error, 1)
		go func() { done <- run(context.Background(), args, &bytes.Buffer{}, &bytes.Buffer{}) }()
		var err error
		select {
		case err = <-done:
		case <-time.After(30 * time.Second): // a bound on a hang, not a timing check
			t.Errorf("%v: still waiting for the file after 30 s", c.args)
			// Let the old build's opens go on: a writer that closes at
			// once gives each end of file.
			for err == nil {
				if w, werr := os.OpenFile(fifo, os.O_WRONLY|syscall.O_NONBLOCK, 0); werr == nil {
					w.Close()
				}
				select {
				case err = <-done:
				case <-time.After(10 * time.Millisecond):
				}
			}
		}
		if err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("%v: %v, want an error with %q", c.args, err, c.want)
		}
	}
}

// TestHangupStopsGracefully: SIGHUP stops reckond as SIGTERM does, with
// exit 0 after its graceful stop. Before, the signal was not handled and
// ended the process at once, without a word in its log.
func TestHangupStopsGracefully(t *testing.T) {
	if signal.Ignored(syscall.SIGHUP) {
		t.Skip("SIGHUP is ignored here (under nohup?), so in the child too, which keeps it so (TestHangupIgnoredUnderNohup)")
	}
	cmd, logs := startChild(t, 1024, "-listen 127.0.0.1:0 -journal "+t.TempDir())
	waitServing(t, logs, `msg=serving`)
	cmd.Process.Signal(syscall.SIGHUP)
	if err := cmd.Wait(); err != nil {
		t.Fatalf("reckond after SIGHUP: %v\n%s", err, logs.String())
	}
	if !strings.Contains(logs.String(), "shutting down") {
		t.Errorf("no graceful stop in the log:\n%s", logs.String())
	}
}

// TestHangupIgnoredUnderNohup: reckond started by nohup(1), SIGHUP
// ignored, keeps it ignored once serving, so the terminal's closing leaves
// it running as nohup means. Before, signal.NotifyContext installed a
// handler in the ignore's place (os/signal's documentation says so) and
// the hangup stopped the service. SIGTERM still stops it with exit 0.
func TestHangupIgnoredUnderNohup(t *testing.T) {
	nohup, err := exec.LookPath("nohup")
	if err != nil {
		t.Skip("no nohup")
	}
	checkStillIgnored(t, exec.Command(nohup, os.Args[0], "-test.run=^$"), syscall.SIGHUP,
		"a hangup would stop the service")
}

// TestInterruptIgnoredWhenInherited: a service started with SIGINT
// ignored (in the background by a non-interactive shell, or as here by a
// shell that traps it to nothing; POSIX, sh's trap) keeps it ignored, as
// under nohup with SIGHUP: Ctrl-C in the starting script's terminal is
// not for it.
func TestInterruptIgnoredWhenInherited(t *testing.T) {
	sh, err := exec.LookPath("sh")
	if err != nil {
		t.Skip("no sh")
	}
	checkStillIgnored(t, exec.Command(sh, "-c", `trap "" INT; exec "$0" -test.run='^$'`, os.Args[0]), syscall.SIGINT,
		"the starting terminal's Ctrl-C would stop the service")
}

// checkStillIgnored starts reckond by cmd, which runs this test binary
// with sig ignored, and checks that the service, once serving, still
// ignores it (/proc/PID/status, SigIgn: bit n-1 for signal n, proc(5));
// then that SIGTERM stops it with exit 0.
func checkStillIgnored(t *testing.T, cmd *exec.Cmd, sig syscall.Signal, why string) {
	t.Helper()
	cmd.Env = append(os.Environ(), "RECKOND_TEST_NOFILE=1024", "RECKOND_TEST_ARGS=-listen 127.0.0.1:0 -journal "+t.TempDir())
	logs := &lockedBuffer{}
	cmd.Stderr = logs
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { cmd.Process.Kill() })
	waitServing(t, logs, `msg=serving`)
	status, err := os.ReadFile(fmt.Sprintf("/proc/%d/status", cmd.Process.Pid))
	if err != nil {
		t.Skip(err)
	}
	m := regexp.MustCompile(`(?m)^SigIgn:\s*([0-9a-f]+)$`).FindSubmatch(status)
	if m == nil {
		t.Fatalf("no SigIgn in /proc/PID/status:\n%s", status)
	}
	ign, err := strconv.ParseUint(string(m[1]), 16, 64)
	if err != nil {
		t.Fatal(err)
	}
	if ign&(1<<(sig-1)) == 0 {
		t.Errorf("%v no longer ignored (SigIgn %s): %s", sig, m[1], why)
	}
	cmd.Process.Signal(syscall.SIGTERM)
	if err := cmd.Wait(); err != nil {
		t.Fatalf("reckond after SIGTERM: %v\n%s", err, logs.String())
	}
}
