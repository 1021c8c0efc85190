package server

import (
	"context"
	"log/slog"
	"os"
	"testing"
	"time"

	"reckon.example/clients/client"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// running is a service started by a test on a loopback port.
type running struct {
	addr, metrics string
	stop          func()
}

func start(t testing.TB, dc DaemonConfig) *running {
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
