package daemon

import (
	"context"
	"errors"
	"io"
	"log/slog"
	"net"
	"net/http"
	"os"
	"regexp"
	"strconv"
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

// TestHTTPConnectionLimit: with MaxHTTPConnections 4, four idle
// connections held on the view and four on the metrics listener, each
// further connection to either is closed at once without an answer to its
// request, while the gRPC service serves: a robot's ingest takes every
// sample, and its journal restores them all after a restart. The limits
// are apart: the view's flood leaves the metrics served, and the
// refusals are counted by server. Once the held connections close, the
// metrics serve again. Before, every connection was served, each holding
// a file descriptor the journals need.
func TestHTTPConnectionLimit(t *testing.T) {
	samp, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 5, DurationS: 2})
	dir := t.TempDir()
	logger, logs := fileLog(t, slog.LevelInfo)
	viewAddr := make(chan string, 1)
	dc := Config{MetricsListen: "127.0.0.1:0", ViewListen: "127.0.0.1:0", ViewReady: func(a string) { viewAddr <- a },
		Robots:  map[string]*pb.RobotConfig{"cart": cfg},
		Options: server.Options{JournalDir: dir, Limits: server.Limits{MaxHTTPConnections: 4, MaxViewers: 2}, Logger: logger}}
	srv := start(t, dc)
	view := <-viewAddr
	hold := func(addr string) []net.Conn {
		var held []net.Conn
		for range 4 {
			c, err := net.Dial("tcp", addr)
			if err != nil {
				t.Fatal(err)
			}
			held = append(held, c)
		}
		return held
	}
	// refused checks that connections past the limit get no answer to a
	// request: the server closed them unread.
	refused := func(addr, path string) {
		t.Helper()
		for i := range 10 {
			c, err := net.Dial("tcp", addr)
			if err != nil {
				t.Fatal(err)
			}
			c.Write([]byte("GET " + path + " HTTP/1.1\r\nHost: reckon\r\n\r\n"))
			c.SetReadDeadline(time.Now().Add(20 * time.Second))
			got, _ := io.ReadAll(c)
			c.Close()
			if len(got) > 0 {
				t.Fatalf("%s connection %d past the limit answered:\n%s", addr, i+1, got)
			}
		}
	}
	heldView := hold(view)
	refused(view, "/")
	if got := httpMetric(t, srv.metrics, "reckon_http_connections_refused_total", "view"); got < 10 {
		t.Errorf(`reckon_http_connections_refused_total{server="view"} = %v, want at least 10`, got)
	}
	heldMetrics := hold(srv.metrics)
	refused(srv.metrics, "/metrics")
	api := dial(t, srv.addr, nil, "")
	if n := feedAll(t, api, "", samp); n != len(samp) {
		t.Errorf("%d of %d samples taken with both HTTP listeners at their limit", n, len(samp))
	}
	for _, c := range append(heldView, heldMetrics...) {
		c.Close()
	}
	// The server sees the closes when it reads them: wait for a place.
	var got float64
	for deadline := time.Now().Add(30 * time.Second); ; time.Sleep(10 * time.Millisecond) {
		if body, err := scrape(srv.metrics); err == nil {
			got = httpMetricIn(t, body, "reckon_http_connections_refused_total", "metrics")
			break
		} else if time.Now().After(deadline) {
			t.Fatalf("the metrics after the held connections closed: %v", err)
		}
	}
	if got < 10 {
		t.Errorf(`reckon_http_connections_refused_total{server="metrics"} = %v, want at least 10`, got)
	}
	srv.stop()
	s := logs()
	for _, server := range []string{"view", "metrics"} {
		if n := strings.Count(s, "connections at the limit: new ones are closed at once until one closes (-max-http-connections)\" server="+server); n != 1 {
			t.Errorf("the %s limit logged %d times, want once naming -max-http-connections:\n%s", server, n, s)
		}
	}
	// The journal holds every sample: a restart restores them.
	dc.Robots, dc.ViewListen, dc.ViewReady = nil, "", nil
	again := start(t, dc)
	defer again.stop()
	r, err := dial(t, again.addr, nil, "").GetRobot(context.Background(), &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	if r.GetRobot().GetInputCount() != uint64(len(samp)) {
		t.Errorf("restored %d inputs, want %d", r.GetRobot().GetInputCount(), len(samp))
	}
}

// scrape returns the metrics' text, or why it could not.
func scrape(addr string) (string, error) {
	resp, err := http.Get("http://" + addr + "/metrics")
	if err != nil {
		return "", err
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return string(b), err
}

// httpMetric scrapes the metric name of the HTTP server server.
func httpMetric(t *testing.T, addr, name, server string) float64 {
	t.Helper()
	body, err := scrape(addr)
	if err != nil {
		t.Fatal(err)
	}
	return httpMetricIn(t, body, name, server)
}

// httpMetricIn reads the metric name of the HTTP server server from a
// scrape's text.
func httpMetricIn(t *testing.T, body, name, server string) float64 {
	t.Helper()
	m := regexp.MustCompile(`(?m)^` + name + `\{server="` + server + `"\} (\S+)$`).FindStringSubmatch(body)
	if m == nil {
		t.Fatalf("no metric %s{server=%q}", name, server)
	}
	v, err := strconv.ParseFloat(m[1], 64)
	if err != nil {
		t.Fatal(err)
	}
	return v
}
