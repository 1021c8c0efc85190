package server

import (
	"context"
	"fmt"
	"testing"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// TestLandmarkBlocksRestore: a robot whose marker map has a survey error
// (landmark blocks in its state, given to the markers in turns) is
// journaled with snapshots every 2,000 inputs and restarted three times;
// each restore serves (the inputs after the last snapshot replay to the
// journaled outputs bit for bit, snapshot version 10), and the restored
// robot ends where an offline replay of the whole journal does.
func TestLandmarkBlocksRestore(t *testing.T) {
	for _, lat := range []float64{1e-6, 0.05} {
		t.Run(fmt.Sprintf("latency %g s", lat), func(t *testing.T) { landmarkBlocksRestore(t, lat) })
	}
}

// landmarkBlocksRestore is TestLandmarkBlocksRestore with fixes delivered
// lat to 6 lat seconds after their capture: held for the odometry that
// reaches them (1 us), or inserted late (50 ms).
func landmarkBlocksRestore(t *testing.T, lat float64) {
	dir := t.TempDir()
	samp, _, cfg := samples(fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, MarkerCount: 16, Seed: 41, DurationS: 40,
		LatencyMinS: lat, LatencyMaxS: 6 * lat, Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}})
	cfg.LandmarkPositionStdM = 0.03
	restartedServes(t, dir, samp, cfg)
}

// restartedServes feeds samp to robots/cart of configuration cfg, journaled
// in dir with snapshots every 2,000 inputs, in four parts with a restart
// before each of the last three: each restore serves the pose the robot
// had before the restart, and the last pose is where an offline replay of
// the whole journal ends. It returns the served poses after each part.
func restartedServes(t *testing.T, dir string, samp []*pb.Sample, cfg *pb.RobotConfig) []*pb.FusedPose {
	t.Helper()
	opt := Options{JournalDir: dir, SnapshotEvery: 2000}
	quarter := len(samp) / 4
	poseNow := func(s *Server) *pb.FusedPose {
		got, err := s.GetRobot(context.Background(), &pb.GetRobotRequest{Name: "robots/cart"})
		if err != nil {
			t.Fatal(err)
		}
		at, err := s.GetPoseAt(context.Background(), &pb.GetPoseAtRequest{Robot: "robots/cart", StampNs: got.GetRobot().GetNewestStampNs()})
		if err != nil {
			t.Fatal(err)
		}
		return at.GetPose()
	}
	var last *pb.FusedPose
	var served []*pb.FusedPose
	for part := range 4 {
		s, err := New(opt)
		if err != nil {
			t.Fatal(err)
		}
		reports, _ := s.Restore()
		if part == 0 {
			if _, err := s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
				t.Fatal(err)
			}
		} else {
			if len(reports) != 1 || reports[0].State != pb.RobotState_ROBOT_STATE_SERVING {
				t.Fatalf("restore %d: %+v", part, reports)
			}
			if got := poseNow(s); !proto.Equal(got, last) {
				t.Fatalf("restore %d: pose %v, before the restart %v", part, got, last)
			}
		}
		for i := part * quarter; i < (part+1)*quarter; i += maxBatch {
			j := min(i+maxBatch, (part+1)*quarter)
			s.ingestBatch(requests("robots/cart", "", uint64(i+1), samp[i:j]))
		}
		last = poseNow(s)
		served = append(served, last)
		s.Close()
	}
	_, scan, err := journal.Replay(dir, "cart", journal.ReplayOptions{FromSnapshot: true})
	if err != nil || scan.SnapshotSequence == 0 {
		t.Fatalf("no snapshot in the journal (%v)", err)
	}
	pose, _ := offline(t, dir, "cart")
	p := last.GetPose()
	if p.GetXM() != pose.GetXM() || p.GetYM() != pose.GetYM() || p.GetHeadingRad() != pose.GetHeadingRad() {
		t.Errorf("served %v, offline replay %v", p, pose)
	}
	return served
}
