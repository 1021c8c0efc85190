package daemon

import (
	"context"
	"errors"
	"io"
	"log/slog"
	"net"
	"os"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

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

// TestConnectionLimit: with MaxConnections 3 open (a robot feeding, a
// client asking, a silent connection), every further connection is closed
// at once, without hurting the three: the robot's ingest takes every
// sample and the client keeps asking. The log says once that the limit is
// reached and once, when a connection closes, that it no longer is; the
// refusals are counted; a new client then gets in. Before, every
// connection was served, each holding a file descriptor the journals
// need.
func TestConnectionLimit(t *testing.T) {
	samp, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 5, DurationS: 4})
	logger, logs := fileLog(t, slog.LevelInfo)
	srv := start(t, Config{MetricsListen: "127.0.0.1:0", HandshakeTimeout: time.Minute, Robots: map[string]*pb.RobotConfig{"cart": cfg},
		Options: server.Options{Limits: server.Limits{MaxConnections: 3}, Logger: logger}})
	defer srv.stop()
	robot := dial(t, srv.addr, nil, "")
	half := len(samp) / 2
	if n := feedAll(t, robot, "", samp[:half]); n != half {
		t.Fatalf("%d of %d samples taken before the limit", n, half)
	}
	client := dial(t, srv.addr, nil, "")
	ctx := context.Background()
	if _, err := client.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"}); err != nil {
		t.Fatal(err)
	}
	silent, err := net.Dial("tcp", srv.addr)
	if err != nil {
		t.Fatal(err)
	}
	// The listener takes connections in the order they came: the silent
	// one is the third, and these are past the limit.
	for i := range 5 {
		c, err := net.Dial("tcp", srv.addr)
		if err != nil {
			t.Fatal(err)
		}
		// Far below HandshakeTimeout: only the limit closes it this soon,
		// and before the server says anything (its HTTP/2 settings).
		c.SetReadDeadline(time.Now().Add(20 * time.Second))
		got, err := io.ReadAll(c)
		c.Close()
		if len(got) > 0 || err != nil {
			t.Fatalf("connection %d past the limit: read %d bytes, then %v; want it closed at once", i+1, len(got), err)
		}
	}
	over := dial(t, srv.addr, nil, "")
	if _, err := over.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"}); status.Code(err) != codes.Unavailable {
		t.Errorf("a call on a connection past the limit: %v, want UNAVAILABLE", err)
	}
	if n := feedAll(t, robot, "", samp[half:]); n != len(samp)-half {
		t.Errorf("%d of %d samples taken at the limit", n, len(samp)-half)
	}
	if _, err := client.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"}); err != nil {
		t.Errorf("a client under the limit: %v", err)
	}
	if got := metric(t, srv.metrics, "reckon_connections_refused_total"); got < 6 {
		t.Errorf("reckon_connections_refused_total = %v, want at least 6", got)
	}
	if got := metric(t, srv.metrics, "reckon_connections"); got != 3 {
		t.Errorf("reckon_connections = %v, want 3", got)
	}
	silent.Close()
	if _, err := over.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"}, grpc.WaitForReady(true)); err != nil {
		t.Errorf("a new connection once one closed: %v", err)
	}
	s := logs()
	if n := strings.Count(s, "connections at the limit"); n != 1 || !strings.Contains(s, "-max-connections") {
		t.Errorf("the limit logged %d times, want once naming -max-connections:\n%s", n, s)
	}
	if n := strings.Count(s, "connections below the limit again"); n != 1 {
		t.Errorf("the end of the limit logged %d times, want once:\n%s", n, s)
	}
}
