package server

import (
	"fmt"
	"os"
	"strings"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// RestoreReport says what Restore found for one robot.
type RestoreReport struct {
	Robot  string
	Inputs int
	// Torn describes a torn or corrupt tail that was dropped ("" if none).
	Torn string
}

// Replay runs a journal's inputs through a new fusion robot and checks that
// every verdict and pose equals the one recorded. It returns the robot and
// the scan.
func Replay(dir, id string) (*fusion.Robot, journal.Scan, error) {
	return replay(dir, id, false)
}

// replay replays a journal; fromSnapshot starts from its last snapshot
// (what a restart does) instead of the first input.
func replay(dir, id string, fromSnapshot bool) (*fusion.Robot, journal.Scan, error) {
	var fr *fusion.Robot
	var cfg fusion.Config
	v := journal.Visitor{Opening: func(op *pb.JournalOpening) error {
		var err error
		if cfg, err = convert.ConfigFromProto(op.GetConfig()); err != nil {
			return fmt.Errorf("opening record: %w", err)
		}
		fr, err = fusion.New(cfg)
		return err
	}, Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
		return replayOne(fr, in, out)
	}}
	if fromSnapshot {
		v.Snapshot = func(s *pb.JournalSnapshot) error {
			r, err := fusion.RestoreSnapshot(cfg, s.GetState())
			if err != nil {
				return err
			}
			if r.Sequence() != s.GetSequence() {
				return fmt.Errorf("snapshot at sequence %d holds sequence %d", s.GetSequence(), r.Sequence())
			}
			fr = r
			return nil
		}
	}
	scan, err := journal.Read(dir, id, v)
	if err != nil {
		return nil, scan, err
	}
	return fr, scan, nil
}

// replayOne applies one journaled input and compares the outcome.
func replayOne(fr *fusion.Robot, in *pb.JournalInput, out *pb.JournalOutput) error {
	got, taken := convert.Take(fr, in.GetSample(), out.GetResponse().GetClientSequence())
	if !taken {
		return fmt.Errorf("journal input %d is refused on replay: %s", in.GetSequence(), got.GetReason())
	}
	if !proto.Equal(got, out.GetResponse()) {
		return fmt.Errorf("journal replay diverged at input %d: verdict %v, recorded %v", in.GetSequence(), got.GetVerdict(), out.GetResponse().GetVerdict())
	}
	if out.GetPose() == nil {
		return nil
	}
	pose := convert.PoseToProto(out.GetPose().GetRobot(), fr.Pose(), got.GetSequence())
	if !proto.Equal(pose, out.GetPose()) {
		return fmt.Errorf("journal replay diverged at input %d: pose %v, recorded %v", in.GetSequence(), pose.GetPose(), out.GetPose().GetPose())
	}
	return nil
}

// Restore brings back every robot with a journal in the journal directory:
// it replays each journal (checking every recorded output), drops a torn or
// corrupt tail (reporting it), and resumes appending.
func (s *Server) Restore() ([]RestoreReport, error) {
	if s.opt.JournalDir == "" {
		return nil, nil
	}
	ids, err := journal.Robots(s.opt.JournalDir)
	if err != nil {
		return nil, err
	}
	var reports []RestoreReport
	for _, id := range ids {
		fr, scan, err := replay(s.opt.JournalDir, id, true)
		if err != nil {
			return reports, fmt.Errorf("restore %s: %w", id, err)
		}
		rep := RestoreReport{Robot: "robots/" + id, Inputs: scan.Pairs}
		if scan.Torn != nil {
			rep.Torn = fmt.Sprintf("%s: %v", scan.TornSegment, scan.Torn)
			if len(scan.DroppedSegments) > 0 {
				rep.Torn += fmt.Sprintf("; set aside %d later segments", len(scan.DroppedSegments))
			}
			for _, d := range scan.DroppedSegments {
				if err := os.Rename(d, strings.TrimSuffix(d, journal.Ext)+".torn"); err != nil {
					return reports, err
				}
			}
			s.opt.Metrics.tornTail()
			s.log.Warn("journal tail dropped", "robot", rep.Robot, "torn", rep.Torn)
		}
		j, err := journal.Resume(s.opt.JournalDir, id, scan.Segment, scan.Good, s.journalOptions())
		if err != nil {
			return reports, fmt.Errorf("restore %s: %w", id, err)
		}
		r := &robot{name: "robots/" + id, id: id, cfg: scan.Opening.GetConfig(), fr: fr, journal: j}
		s.mu.Lock()
		s.robots[r.name] = r
		s.opt.Metrics.robots(len(s.robots))
		s.mu.Unlock()
		s.log.Info("robot restored", "robot", r.name, "inputs", scan.Pairs, "newest_stamp_ns", fr.NewestNs())
		reports = append(reports, rep)
	}
	return reports, nil
}
