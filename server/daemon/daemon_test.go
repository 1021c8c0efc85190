package daemon

import (
	"context"
	"crypto/tls"
	"log/slog"
	"net"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// running is a daemon started by a test on a loopback port.
type running struct {
	addr, metrics string
	stop          func()
}

func start(t testing.TB, dc Config) *running {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	ready := make(chan [2]string, 1)
	done := make(chan error, 1)
	dc.Listen = "127.0.0.1:0"
	dc.Ready = func(a, m string) { ready <- [2]string{a, m} }
	if dc.Logger == nil {
		dc.Logger = slog.New(slog.NewTextHandler(os.Stderr, &slog.HandlerOptions{Level: slog.LevelWarn}))
	}
	go func() { done <- Serve(ctx, dc) }()
	select {
	case a := <-ready:
		r := &running{addr: a[0], metrics: a[1]}
		r.stop = func() {
			cancel()
			if err := <-done; err != nil {
				t.Errorf("Serve: %v", err)
			}
		}
		return r
	case err := <-done:
		cancel()
		t.Fatalf("Serve: %v", err)
	case <-time.After(10 * time.Second):
		cancel()
		t.Fatal("service did not start")
	}
	cancel()
	return nil
}

// fileLog is a logger at level writing to a file of the test, and a
// function reading what it wrote so far, which a test may call while the
// daemon logs (the handler writes each record with one write).
func fileLog(t testing.TB, level slog.Level) (*slog.Logger, func() string) {
	t.Helper()
	f, err := os.Create(filepath.Join(t.TempDir(), "reckond.log"))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { f.Close() })
	return slog.New(slog.NewTextHandler(f, &slog.HandlerOptions{Level: level})), func() string {
		b, err := os.ReadFile(f.Name())
		if err != nil {
			t.Fatal(err)
		}
		return string(b)
	}
}

// bearer is a token sent as "authorization: Bearer <token>" with every
// call. It does not require transport security, so that a test can send it
// in plain text and see the TLS listener refuse the connection.
type bearer string

func (b bearer) GetRequestMetadata(context.Context, ...string) (map[string]string, error) {
	return map[string]string{"authorization": "Bearer " + string(b)}, nil
}

func (bearer) RequireTransportSecurity() bool { return false }

// dial connects to addr for the rest of the test with the generated stubs
// (the client library is a layer above; DEVELOPERS.md, "Design: Layers"):
// with TLS if tc is set, else in plain text, and with token unless empty.
func dial(t testing.TB, addr string, tc *tls.Config, token string) pb.FusionServiceClient {
	t.Helper()
	creds := insecure.NewCredentials()
	if tc != nil {
		creds = credentials.NewTLS(tc)
	}
	opts := []grpc.DialOption{grpc.WithTransportCredentials(creds)}
	if token != "" {
		opts = append(opts, grpc.WithPerRPCCredentials(bearer(token)))
	}
	conn, err := grpc.NewClient(addr, opts...)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	return pb.NewFusionServiceClient(conn)
}

// samples returns a scenario's inputs as wire samples in arrival order, and
// the robot configuration.
func samples(sc fusiontest.Scenario) ([]*pb.Sample, *pb.RobotConfig) {
	s := fusiontest.New(sc)
	var out []*pb.Sample
	for in, ok := s.Next(); ok; in, ok = s.Next() {
		switch {
		case in.Odometry != nil:
			out = append(out, convert.OdometryToProto(in.Odometry))
		case in.Heading != nil:
			out = append(out, convert.HeadingToProto(in.Heading))
		default:
			out = append(out, convert.FixToProto(in.Fix))
		}
	}
	return out, convert.ConfigToProto(s.Config())
}

// TestServeRefusesMessagesLargerThanRecords: a message limit under which a
// sample could outgrow a journal record (which would stop its robot) is a
// configuration error, named before anything listens.
func TestServeRefusesMessagesLargerThanRecords(t *testing.T) {
	err := Serve(context.Background(), Config{Listen: "127.0.0.1:0", MaxMessageBytes: journal.MaxRecordBytes})
	if err == nil || !strings.Contains(err.Error(), "max message bytes") {
		t.Fatalf("Serve with max message bytes %d: %v", journal.MaxRecordBytes, err)
	}
}

// TestServeNamesATakenAddressFirst: an address that cannot be listened on
// (another process has it) is said before the journal is touched: the
// directory is not even made, let alone locked or restored.
func TestServeNamesATakenAddressFirst(t *testing.T) {
	taken, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer taken.Close()
	dir := filepath.Join(t.TempDir(), "journal")
	err = Serve(context.Background(), Config{Listen: taken.Addr().String(), Options: server.Options{JournalDir: dir}})
	if err == nil || !strings.Contains(err.Error(), "address already in use") {
		t.Fatalf("Serve on a taken address: %v", err)
	}
	if _, serr := os.Stat(dir); !os.IsNotExist(serr) {
		t.Errorf("the journal directory was made before the address failed: %v", serr)
	}
}
