package main

import (
	"context"
	"net"
	"os"
	"os/exec"
	"regexp"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	pb "reckon.example/proto/reckon/v1"
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

// startChild starts reckond in a child process (TestMain) with nofile
// file descriptors at most and the arguments args; it returns the process
// and its log (standard error), and kills it when the test ends.
func startChild(t *testing.T, nofile int, args string) (*exec.Cmd, *lockedBuffer) {
	t.Helper()
	cmd := exec.Command(os.Args[0], "-test.run=^$")
	cmd.Env = append(os.Environ(), "RECKOND_TEST_NOFILE="+strconv.Itoa(nofile), "RECKOND_TEST_ARGS="+args)
	logs := &lockedBuffer{}
	cmd.Stderr = logs
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { cmd.Process.Kill() })
	return cmd, logs
}

// waitServing waits until logs match the regular expression re (a
// "serving" line) and returns the match and its groups.
func waitServing(t *testing.T, logs *lockedBuffer, re string) []string {
	t.Helper()
	var m []string
	for deadline := time.Now().Add(30 * time.Second); m == nil; waitABit() {
		m = regexp.MustCompile(re).FindStringSubmatch(logs.String())
		if m == nil && time.Now().After(deadline) {
			t.Fatalf("not serving:\n%s", logs.String())
		}
	}
	return m
}

// TestOutOfFileDescriptors: reckond with 40 file descriptors and 60 idle
// connections cannot accept more; it says so once, naming the limit, and
// that it accepts again once they close; SIGTERM then stops it with exit
// 0. Before, grpc-go retried the accepts in silence: nothing in the log
// said why no client could connect.
func TestOutOfFileDescriptors(t *testing.T) {
	cmd, logs := startChild(t, 40, "-listen 127.0.0.1:0 -journal "+t.TempDir())
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

// TestHTTPFloodLeavesDescriptors: reckond with 64 file descriptors, the
// metrics and the live view on, and 100 idle connections opened to each
// of their ports still serves a gRPC client that creates a robot (its
// journal files) and feeds it, and never runs out of descriptors:
// -max-http-connections (8 here) closes the connections past it at once.
// Before, the HTTP servers took every connection and the process ran out
// of descriptors: no client could connect, nor a robot be created, until
// the servers closed the idle connections 5 s later.
func TestHTTPFloodLeavesDescriptors(t *testing.T) {
	cmd, logs := startChild(t, 64, "-listen 127.0.0.1:0 -metrics-listen 127.0.0.1:0 -view 127.0.0.1:0 -max-http-connections 8 -max-viewers 4 -journal "+t.TempDir())
	m := waitServing(t, logs, `msg=serving listen=(\S+) .*metrics=(\S+) view=(\S+)`)
	var held []net.Conn
	defer func() {
		for _, c := range held {
			c.Close()
		}
	}()
	for _, addr := range m[2:] {
		for range 100 {
			c, err := net.DialTimeout("tcp", addr, 5*time.Second)
			if err != nil {
				t.Fatal(err)
			}
			held = append(held, c)
		}
	}
	conn, err := grpc.NewClient(m[1], grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	api := pb.NewFusionServiceClient(conn)
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	cfg := &pb.RobotConfig{Wheels: []*pb.EncoderWheel{{Name: "left", YM: 0.2}, {Name: "right", YM: -0.2}}, NoSideSlip: true}
	if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatalf("CreateRobot with the HTTP ports flooded: %v\n%s", err, logs.String())
	}
	st, err := api.Ingest(ctx)
	if err != nil {
		t.Fatal(err)
	}
	for k := range int64(10) {
		odo := &pb.Sample{Sample: &pb.Sample_Odometry{Odometry: &pb.OdometrySample{StartNs: k * 100e6, StampNs: (k + 1) * 100e6,
			Motion: &pb.OdometrySample_Travel{Travel: &pb.WheelTravel{TravelM: []float64{0.1, 0.1}}}}}}
		if err := st.Send(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: uint64(k + 1), Sample: odo}); err != nil {
			t.Fatal(err)
		}
		resp, err := st.Recv()
		if err != nil || resp.GetVerdict() != pb.Verdict_VERDICT_APPLIED {
			t.Fatalf("sample %d with the HTTP ports flooded: %v, %v\n%s", k+1, resp, err, logs.String())
		}
	}
	st.CloseSend()
	cmd.Process.Signal(syscall.SIGTERM)
	if err := cmd.Wait(); err != nil {
		t.Fatalf("reckond after SIGTERM: %v\n%s", err, logs.String())
	}
	// The HTTP servers close an idle connection after 5 s (its header's
	// timeout), which let the robot be created in the end before; the
	// log says whether descriptors ran out meanwhile.
	s := logs.String()
	if strings.Contains(s, "too many open files") || strings.Contains(s, "accepting connections fails") {
		t.Errorf("reckond ran out of file descriptors:\n%s", s)
	}
	if !strings.Contains(s, "-max-http-connections") {
		t.Errorf("the log does not name -max-http-connections:\n%s", s)
	}
}
