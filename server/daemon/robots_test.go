package daemon

import (
	"bytes"
	"context"
	"log/slog"
	"strings"
	"testing"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
)

// TestRobotFlagDiffersFromJournal: a robot given with -robot is created
// from its file the first time; restarted with a file that differs (say,
// calibrated since), the robot keeps its journal's configuration, and the
// daemon says so in a warning naming the robot and the fields that differ,
// rather than ignoring the file in silence. The same file again logs no
// warning.
func TestRobotFlagDiffersFromJournal(t *testing.T) {
	dir := t.TempDir()
	_, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 1, DurationS: 1})
	serve := func(cfg *pb.RobotConfig) (got *pb.RobotConfig, log string) {
		var buf bytes.Buffer
		r := start(t, Config{Options: server.Options{JournalDir: dir, Logger: slog.New(slog.NewTextHandler(&buf, &slog.HandlerOptions{Level: slog.LevelWarn}))},
			Robots: map[string]*pb.RobotConfig{"cart": cfg}})
		resp, err := dial(t, r.addr, nil, "").GetRobot(context.Background(), &pb.GetRobotRequest{Name: "robots/cart"})
		r.stop()
		if err != nil {
			t.Fatal(err)
		}
		return resp.GetRobot().GetConfig(), buf.String()
	}
	if got, log := serve(cfg); !proto.Equal(got, cfg) || log != "" {
		t.Fatalf("first start: robot's configuration equal to the file's: %v; log %q", proto.Equal(got, cfg), log)
	}
	if _, log := serve(cfg); log != "" {
		t.Errorf("restart with the same file logged %q", log)
	}
	other := proto.CloneOf(cfg)
	other.Wheels[0].CountsPerM *= 1.03
	other.MaxExtrapolationNs = 1e8
	got, log := serve(other)
	if !proto.Equal(got, cfg) {
		t.Errorf("restart with another file changed the robot's configuration")
	}
	for _, want := range []string{"level=WARN", "robots/cart", "wheels", "max_extrapolation_ns", "create -replace"} {
		if !strings.Contains(log, want) {
			t.Errorf("restart with another file: log %q lacks %q", log, want)
		}
	}
}
