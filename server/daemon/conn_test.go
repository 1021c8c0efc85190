package daemon

import (
	"context"
	"errors"
	"log/slog"
	"net"
	"os"
	"strings"
	"testing"
	"time"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
)

// TestSilentConnectionClosed: a connection that sends nothing, or half of
// HTTP/2's connection preface, is closed once HandshakeTimeout passes, and
// gives its file descriptor back. Before, grpc-go's default kept it
// 120 s, so that a few hundred such connections could take every
// descriptor of a coprocessor's reckond.
func TestSilentConnectionClosed(t *testing.T) {
	srv := start(t, Config{HandshakeTimeout: 200 * time.Millisecond})
	defer srv.stop()
	for name, send := range map[string]string{"nothing": "", "half a preface": "PRI * HTTP/2.0\r\n"} {
		t.Run(name, func(t *testing.T) {
			c, err := net.Dial("tcp", srv.addr)
			if err != nil {
				t.Fatal(err)
			}
			defer c.Close()
			if _, err := c.Write([]byte(send)); err != nil {
				t.Fatal(err)
			}
			// Far beyond HandshakeTimeout, far below grpc-go's 120 s.
			c.SetReadDeadline(time.Now().Add(60 * time.Second))
			b := make([]byte, 256)
			for {
				_, err = c.Read(b)
				if err != nil {
					break
				}
			}
			if errors.Is(err, os.ErrDeadlineExceeded) {
				t.Fatalf("the connection is still open after 60 s")
			}
		})
	}
}

// TestStopDuringRestore: a stop asked while the journal is being restored
// (SIGTERM to a reckond restoring many robots) ends Serve with no error
// before it serves, and the log says so. Before, the restore went on to the
// end, the service said "serving", and only then stopped: a long restore
// outlasted a supervisor's stop timeout and was killed.
func TestStopDuringRestore(t *testing.T) {
	dir := t.TempDir()
	_, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 3, DurationS: 1})
	start(t, Config{Options: server.Options{JournalDir: dir}, Robots: map[string]*pb.RobotConfig{"cart": cfg}}).stop()
	var logs strings.Builder
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	err := Serve(ctx, Config{Listen: "127.0.0.1:0", Options: server.Options{JournalDir: dir, Logger: slog.New(slog.NewTextHandler(&logs, nil))}})
	if err != nil || strings.Contains(logs.String(), "msg=serving") || !strings.Contains(logs.String(), "stopped before serving") {
		t.Fatalf("Serve: %v, want nil, stopped before serving:\n%s", err, logs.String())
	}
}
