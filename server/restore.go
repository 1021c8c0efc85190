package server

import (
	"fmt"

	"reckon.example/server/journal"
)

// RestoreReport says what Restore found for one robot.
type RestoreReport struct {
	Robot  string
	Inputs int
	// Torn describes a torn or corrupt tail that was dropped ("" if none).
	Torn string
}

// Restore brings back every robot with a journal in the journal directory:
// it replays each journal (checking every recorded output), drops a torn or
// corrupt tail (reporting it), and resumes appending.
func (s *Server) Restore() ([]RestoreReport, error) {
	if s.opt.JournalDir == "" {
		return nil, nil
	}
	ids, err := journal.RobotsFS(s.opt.FS, s.opt.JournalDir)
	if err != nil {
		return nil, err
	}
	var reports []RestoreReport
	for _, id := range ids {
		fr, scan, err := journal.Replay(s.opt.JournalDir, id, journal.ReplayOptions{FromSnapshot: true, Check: true, FS: s.opt.FS})
		if err != nil {
			return reports, fmt.Errorf("restore %s: %w", id, err)
		}
		rep := RestoreReport{Robot: RobotName(id), Inputs: scan.Pairs}
		if scan.Torn != nil {
			rep.Torn = fmt.Sprintf("%s: %v", scan.TornSegment, scan.Torn)
			s.opt.Metrics.tornTail()
			s.log.Warn("journal tail dropped", "robot", rep.Robot, "torn", rep.Torn)
		}
		j, err := journal.Resume(s.opt.JournalDir, id, scan.Segment, scan.Good, s.journalOptions())
		if err != nil {
			return reports, fmt.Errorf("restore %s: %w", id, err)
		}
		r := &robot{name: RobotName(id), id: id, cfg: scan.Opening.GetConfig(), fr: fr, journal: j}
		s.mu.Lock()
		s.robots[r.name] = r
		s.opt.Metrics.robots(len(s.robots))
		s.mu.Unlock()
		s.log.Info("robot restored", "robot", r.name, "inputs", scan.Pairs, "newest_stamp_ns", fr.NewestNs())
		reports = append(reports, rep)
	}
	return reports, nil
}
