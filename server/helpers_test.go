package server

import (
	"errors"
	"log/slog"
	"net"
	"os"
	"testing"

	"google.golang.org/grpc"

	"reckon.example/clients/client"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// testConfig is what a test starts a service with.
type testConfig struct {
	Options
	MaxMessageBytes int
}

// running is a service started by a test on a loopback port.
type running struct {
	addr string
	stop func()
}

// serveLoopback serves a new Server, restored from its journal directory,
// on a loopback port with the service's gRPC options (what the daemon adds
// around it, package daemon, is not needed here). stop ends it gracefully.
func serveLoopback(tc testConfig) (addr string, stop func() error, err error) {
	opts, err := ServiceOptions(tc.MaxMessageBytes)
	if err != nil {
		return "", nil, err
	}
	srv, err := New(tc.Options)
	if err != nil {
		return "", nil, err
	}
	if _, err := srv.Restore(); err != nil {
		srv.Close()
		return "", nil, err
	}
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		srv.Close()
		return "", nil, err
	}
	gs := grpc.NewServer(opts...)
	pb.RegisterFusionServiceServer(gs, srv)
	served := make(chan error, 1)
	go func() { served <- gs.Serve(lis) }()
	return lis.Addr().String(), func() error {
		srv.EndWatches()
		gs.GracefulStop()
		return errors.Join(<-served, srv.Close())
	}, nil
}

func start(t testing.TB, tc testConfig) *running {
	t.Helper()
	if tc.Logger == nil {
		tc.Logger = slog.New(slog.NewTextHandler(os.Stderr, &slog.HandlerOptions{Level: slog.LevelWarn}))
	}
	addr, stop, err := serveLoopback(tc)
	if err != nil {
		t.Fatalf("serve: %v", err)
	}
	return &running{addr: addr, stop: func() {
		if err := stop(); err != nil {
			t.Errorf("serve: %v", err)
		}
	}}
}

func dial(t testing.TB, addr string, opt client.Options) *client.Client {
	t.Helper()
	c, err := client.Dial(addr, opt)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { c.Close() })
	return c
}

// toProto turns a simulator input into a wire sample.
func toProto(in *fusiontest.Input) *pb.Sample {
	switch {
	case in.Odometry != nil:
		return convert.OdometryToProto(in.Odometry)
	case in.Heading != nil:
		return convert.HeadingToProto(in.Heading)
	default:
		return convert.FixToProto(in.Fix)
	}
}

// samples returns a scenario's inputs as wire samples in arrival order, and
// the robot configuration.
func samples(sc fusiontest.Scenario) ([]*pb.Sample, []fusiontest.Input, *pb.RobotConfig) {
	s := fusiontest.New(sc)
	cfg := convert.ConfigToProto(s.Config())
	var out []*pb.Sample
	var ins []fusiontest.Input
	for {
		in, ok := s.Next()
		if !ok {
			return out, ins, cfg
		}
		out = append(out, toProto(&in))
		ins = append(ins, in)
	}
}

func wireConfig(c fusion.Config) *pb.RobotConfig { return convert.ConfigToProto(c) }
