package server

import (
	"context"
	"errors"
	"fmt"
	"path/filepath"
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
	// State is SERVING, or QUARANTINED when the journal could not be
	// restored; Detail then names the problem and the file. For a serving
	// robot Detail is a note ("" if none), such as outputs of an older
	// build that differ on replay.
	State  pb.RobotState
	Detail string
	// Differing counts the replayed outputs, written by another build,
	// that this build computes differently (kept as they are).
	Differing int
	// Build is the build that wrote the replayed outputs.
	Build string
}

// Restore brings back every robot with a journal in the journal directory:
// it replays each journal from its last snapshot, drops a torn or corrupt
// tail (reporting it), and resumes appending. It reads each journal from
// the last snapshot its manifest records; the sealed segments before are
// checked only by their sizes against the manifest, and VerifyHistories
// reads them once the service serves. A robot whose journal cannot
// be restored is kept quarantined and the others serve; the error is only
// for a journal directory that cannot be listed.
func (s *Server) Restore() ([]RestoreReport, error) {
	return s.RestoreContext(context.Background())
}

// RestoreContext is Restore, stopped when ctx is done (the daemon asked
// to stop): between robots, and within a robot's replay every
// stopCheckInputs inputs, before its journal is resumed (which may write).
// It then returns the reports of the robots restored so far and an error
// wrapping ctx's, naming the robot it stopped at; the robot is not
// restored and its journal is as it was. Close the server then.
func (s *Server) RestoreContext(ctx context.Context) ([]RestoreReport, error) {
	if s.opt.JournalDir == "" {
		return nil, nil
	}
	ids, err := journal.RobotsFS(s.opt.FS, s.opt.JournalDir)
	if err != nil {
		return nil, err
	}
	var reports []RestoreReport
	for i, id := range ids {
		if err := ctx.Err(); err != nil {
			return reports, fmt.Errorf("restore stopped before %s (%d of %d robots restored): %w", RobotName(id), i, len(ids), err)
		}
		r, rep, err := s.restoreRobot(ctx, id)
		if err != nil {
			return reports, fmt.Errorf("restore stopped in the replay of %s (%d of %d robots restored): %w", RobotName(id), i, len(ids), err)
		}
		s.mu.Lock()
		s.robots[r.name] = r
		s.robotsChanged()
		s.mu.Unlock()
		if rep.State == pb.RobotState_ROBOT_STATE_QUARANTINED {
			s.opt.Metrics.quarantined(1)
			s.log.Error("robot quarantined", "robot", r.name, "problem", rep.Detail)
		} else {
			s.log.Info("robot restored", "robot", r.name, "inputs", rep.Inputs, "newest_stamp_ns", r.fr.NewestNs(), "note", rep.Detail)
		}
		reports = append(reports, rep)
	}
	return reports, nil
}

// stopCheckInputs is how many inputs a restore replays between two looks
// at whether it is to stop (RestoreContext).
const stopCheckInputs = 4096

// restoreRobot restores one robot, serving or quarantined; the error is
// only ctx's, when it was done during the replay.
func (s *Server) restoreRobot(ctx context.Context, id string) (*robot, RestoreReport, error) {
	name := RobotName(id)
	rep := RestoreReport{Robot: name, State: pb.RobotState_ROBOT_STATE_QUARANTINED}
	r := &robot{name: name, id: id, state: pb.RobotState_ROBOT_STATE_QUARANTINED}
	quarantined := func(err error) (*robot, RestoreReport, error) {
		r.detail = s.problem(id, err)
		rep.Detail = r.detail
		return r, rep, nil
	}
	rp, err := s.replayRobot(ctx, id)
	if cerr := ctx.Err(); cerr != nil && errors.Is(err, cerr) {
		return nil, rep, err
	}
	r.cfg = rp.scan.Opening.GetConfig()
	rep.Inputs, rep.Build, rep.Differing = rp.scan.Pairs, rp.build, rp.differing
	if err != nil {
		return quarantined(err)
	}
	rep.Torn = s.noteDamage(name, rp.scan)
	w, err := journal.Resume(s.opt.JournalDir, id, &rp.scan, s.journalOptions())
	if err != nil {
		return quarantined(err)
	}
	r.fr, r.journal, r.sessions, r.sinceSnapshot, r.holders = rp.fr, s.wrap(openJournal(w)), rp.sessions, rp.scan.Replayed, rp.holders
	if rp.scan.FromSegment > 0 || rp.scan.FromOffset > 0 {
		r.unread, r.historySnap = rp.scan.FromSegment+1, rp.scan.SnapshotSequence
		if rp.scan.FromSegment == rp.scan.Segment {
			r.unreadTo = rp.scan.FromOffset
		}
	}
	r.state, rep.State = pb.RobotState_ROBOT_STATE_SERVING, pb.RobotState_ROBOT_STATE_SERVING
	r.detail, r.note, rep.Detail = rp.note, rp.note, rp.note
	if rp.differing > 0 {
		s.opt.Metrics.differing(rp.differing)
		s.log.Warn("journal written by another build: outputs differ on replay; kept as recorded", "robot", name, "differing", rp.differing, "build", rp.build, "this_build", s.opt.Build)
	}
	r.mu.Lock()
	if rp.build != s.opt.Build {
		// The outputs from here on are this build's: a snapshot says so.
		s.snapshot(r)
	}
	s.observeRobot(r, nil, -1)
	r.mu.Unlock()
	return r, rep, nil
}

// VerifyHistories reads, in a goroutine of its own, the part of each
// serving robot's journal that Restore did not read: the segments before
// the snapshot it started from, which it checked only against the
// manifest (journal.Verify; sealed, they are never written again), and the
// part of the snapshot's own segment before it. It returns a
// channel closed when the pass ends; Close stops it. Call it once the
// service serves, after Restore. The robots are read one after another,
// at most Options.VerifyBytesPerSecond on average (pacedFS), so that the
// pass does not take the disk from the journals' writes.
//
// Damage found there (a bad CRC-32C, a missing or cut record, a segment
// that differs from its record in the manifest) is logged with its file
// and offset, noted in the robot's state_detail and counted in its
// metric reckon_robot_history_damage (0 when the history read whole); the
// robot goes on serving. Its state came from a snapshot and the inputs
// after it, which restore read and checked whole, so what it serves is
// what was acknowledged; quarantine would stop a working robot for the
// sake of a record it no longer depends on. The damaged bytes are left
// where they are (the segment is sealed), and the offline tools name the
// gap. A later restore that has to replay from the start (a snapshot of
// another version) reads that history and quarantines the robot if inputs
// are missing, as before.
func (s *Server) VerifyHistories() <-chan struct{} {
	done := make(chan struct{})
	var todo []*robot
	for _, r := range s.list() {
		r.mu.Lock()
		if r.unread > 0 && r.state != pb.RobotState_ROBOT_STATE_QUARANTINED {
			todo = append(todo, r)
		}
		r.mu.Unlock()
	}
	rate := s.opt.VerifyBytesPerSecond
	if rate <= 0 {
		rate = DefaultVerifyBytesPerSecond
	}
	fs := s.opt.FS
	if fs == nil {
		fs = journal.OS
	}
	paced := newPacedFS(s.verifyCtx, fs, rate)
	s.verifying.Add(1)
	go func() {
		defer s.verifying.Done()
		defer close(done)
		for _, r := range todo {
			if s.verifyCtx.Err() != nil {
				return
			}
			s.verifyHistory(r, paced)
		}
	}()
	return done
}

// verifyHistory reads what restore did not read of r's journal and
// reports any damage in it (VerifyHistories).
func (s *Server) verifyHistory(r *robot, fs journal.FS) {
	sc, err := journal.Verify(s.verifyCtx, fs, s.opt.JournalDir, r.id, r.unread-1, r.unreadTo)
	if s.verifyCtx.Err() != nil {
		return
	}
	var problems []string
	for _, d := range sc.Damage {
		problems = append(problems, d.Error())
	}
	if err != nil {
		problems = append(problems, err.Error())
	}
	r.mu.Lock()
	defer r.mu.Unlock()
	if r.deleted {
		return // its journal was set aside, perhaps while it was read
	}
	s.opt.Metrics.historyDamage(r.name, len(problems))
	if len(problems) == 0 {
		s.log.Info("journal history verified", "robot", r.name, "segments", r.unread)
		return
	}
	for _, p := range problems {
		s.log.Warn("journal history damaged; the robot serves from its snapshot", "robot", r.name, "snapshot_input", r.historySnap, "damage", p)
	}
	note := fmt.Sprintf("journal history damaged before the snapshot at input %d that the robot was restored from (its state and the inputs since are intact): %s", r.historySnap, problems[0])
	if len(problems) > 1 {
		note += fmt.Sprintf(" (and %d more, in the log)", len(problems)-1)
	}
	// A paused robot gets the note when it serves again (probePaused).
	r.note = strings.TrimPrefix(r.note+"; "+note, "; ")
	if r.state == pb.RobotState_ROBOT_STATE_SERVING {
		r.detail = r.note
	}
}

// problem names a restore problem and the journal it is in.
func (s *Server) problem(id string, err error) string {
	msg := err.Error()
	if !strings.Contains(msg, s.opt.JournalDir) {
		msg += " (journal " + filepath.Join(s.opt.JournalDir, id+".*"+journal.Ext) + ")"
	}
	return msg
}

// noteDamage logs what the scan found torn or damaged (kept aside by the
// journal, never truncated away) and describes the torn tail ("" if none).
func (s *Server) noteDamage(name string, scan journal.Scan) string {
	for _, d := range scan.Damage {
		s.log.Warn("journal damage kept aside", "robot", name, "damage", d.Error())
	}
	if scan.Torn == nil {
		return ""
	}
	torn := fmt.Sprintf("%s: %v", scan.TornSegment, scan.Torn)
	if scan.TornKept != "" {
		torn += "; the torn bytes are kept in " + scan.TornKept
	}
	s.opt.Metrics.tornTail()
	s.log.Warn("journal tail dropped", "robot", name, "torn", torn)
	return torn
}

// replayedRobot is a robot brought back from its journal.
type replayedRobot struct {
	fr       *fusion.Robot
	scan     journal.Scan
	sessions sessions
	// build wrote the replayed outputs: the snapshot's, or the opening's.
	build string
	// differing counts replayed outputs that differ from those recorded;
	// first is the first one's sequence.
	differing int
	first     uint64
	note      string
	// holders are the senders of the inputs held at the end of the
	// replay that came with a session id (from the snapshot's sessions and
	// the inputs after it): their resolutions go to the session's next
	// stream.
	holders map[uint64]holder
}

// replayRobot replays a robot's journal from its last snapshot (from the
// start when that snapshot cannot be restored, as one of another format
// version), rebuilding its sessions and comparing every output. Outputs that
// differ are a note when another build wrote them (an upgrade; the records
// stay as they are) and damage when this build did.
func (s *Server) replayRobot(ctx context.Context, id string) (*replayedRobot, error) {
	rp, err := s.replayFrom(ctx, id, true)
	if err != nil && ctx.Err() == nil && rp.scan.SnapshotSequence != 0 && rp.fr == nil && !rp.snapUsed {
		skipped := fmt.Sprintf("snapshot at input %d not restored (%v); replayed from the start", rp.scan.SnapshotSequence, err)
		if rp, err = s.replayFrom(ctx, id, false); err == nil {
			rp.note = skipped
			s.log.Warn("journal snapshot skipped", "robot", RobotName(id), "why", skipped)
		}
	}
	if err != nil {
		return &rp.replayedRobot, err
	}
	if rp.build == "" && !rp.snapUsed {
		rp.build = rp.scan.Opening.GetBuild()
	}
	if rp.differing > 0 {
		if rp.build == s.opt.Build {
			return &rp.replayedRobot, fmt.Errorf("journal replay diverged at input %d (%d outputs differ) with the build that wrote it (%s)", rp.first, rp.differing, rp.build)
		}
		note := fmt.Sprintf("%d journaled outputs of build %q differ on replay by this build (first at input %d); kept as recorded", rp.differing, rp.build, rp.first)
		rp.note = strings.TrimPrefix(rp.note+"; "+note, "; ")
	}
	return &rp.replayedRobot, nil
}

// replaying is one pass of replayRobot.
type replaying struct {
	replayedRobot
	snapUsed bool
	// ctx stops the replay (RestoreContext); inputs counts the inputs
	// replayed, for its look every stopCheckInputs.
	ctx    context.Context
	inputs int
}

func (s *Server) replayFrom(ctx context.Context, id string, fromSnapshot bool) (*replaying, error) {
	rp := &replaying{ctx: ctx}
	rp.holders = map[uint64]holder{}
	opt := journal.ReplayOptions{FromSnapshot: fromSnapshot,
		Snapshot: func(sn *pb.JournalSnapshot) error {
			rp.snapUsed, rp.build = true, sn.GetBuild()
			rp.holders = map[uint64]holder{}
			for _, js := range sn.GetSessions() {
				for _, v := range js.GetVerdicts() {
					noteHeld(rp.holders, v, js.GetSessionId())
				}
			}
			return rp.sessions.restore(sn.GetSessions())
		},
		Input: rp.input, FS: s.opt.FS}
	fr, scan, err := journal.Replay(s.opt.JournalDir, id, opt)
	rp.fr, rp.scan = fr, scan
	if fr != nil {
		rp.holders = pruneHolders(rp.holders, fr.Stats().Held)
	}
	return rp, err
}

// input compares a replayed input's outcome with the recorded output and
// remembers its session's verdict.
func (rp *replaying) input(x *journal.Replayed) error {
	if rp.inputs++; rp.inputs%stopCheckInputs == 0 {
		if err := rp.ctx.Err(); err != nil {
			return err
		}
	}
	if !x.Taken || !sameOutput(x) {
		if rp.differing == 0 {
			rp.first = x.Input.GetSequence()
		}
		rp.differing++
	}
	sid := x.Input.GetSessionId()
	resp := sentForm(x.Recorded.GetResponse(), sid, rp.holders)
	if sid == "" {
		return nil
	}
	noteHeld(rp.holders, resp, sid)
	return rp.sessions.addMessage(sid, resp)
}

// sameOutput tells whether a replayed input gives the recorded verdict and,
// where one was recorded, pose.
func sameOutput(x *journal.Replayed) bool {
	if !proto.Equal(x.Response, x.Recorded.GetResponse()) {
		return false
	}
	want := x.Recorded.GetPose()
	if want == nil {
		return true
	}
	return proto.Equal(convert.PoseToProto(want.GetRobot(), x.Robot.Pose(), x.Response.GetSequence()), want)
}
