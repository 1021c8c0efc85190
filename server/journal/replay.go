package journal

import (
	"errors"
	"fmt"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// ReplayOptions say how Replay runs a journal. The zero value replays every
// input with the journal's own configuration and checks nothing.
type ReplayOptions struct {
	// Config, if set, replaces the configuration of the opening record: the
	// run is replayed as if the robot had been configured so.
	Config *pb.RobotConfig
	// FromSnapshot starts from the journal's last snapshot, as a restart
	// does, instead of from the first input.
	FromSnapshot bool
	// Check stops the replay with an error at the first input whose
	// recomputed response or pose differs, bit for bit, from the one
	// recorded, or that the robot now refuses.
	Check bool
	// SkipOutputs leaves the recorded outputs undecoded (Replayed.Recorded
	// is nil and inputs are taken with client sequence 0). Not with Check.
	SkipOutputs bool
	// Opened, if set, is called with the robot made from the opening record,
	// before any input (with FromSnapshot, a snapshot may then replace it:
	// Replayed.Robot is always the robot replaying).
	Opened func(*fusion.Robot) error
	// Snapshot, if set, is called with the snapshot a FromSnapshot replay
	// starts from, after the robot was restored from it.
	Snapshot func(*pb.JournalSnapshot) error
	// Input, if set, is called after every replayed input.
	Input func(*Replayed) error
	// FS is the file system the journal is read from (nil: OS).
	FS FS
	// ReadOnly reads without copying damaged ranges aside (Visitor.ReadOnly).
	ReadOnly bool
	// Gap, if set, is called at each continuity break, like the other
	// callbacks on the caller's goroutine between the inputs around it, and
	// the replay goes on past it (the robot then sees the inputs after the gap as a gap in
	// its odometry); Replay returns the robot with the first break as its
	// error. Without it a gap stops the replay.
	Gap func(err error) error
}

// Replayed is one journal input run through the robot again.
type Replayed struct {
	// Robot is the replaying robot, just after it took the input.
	Robot *fusion.Robot
	// Input is the journaled input.
	Input *pb.JournalInput
	// Response is the robot's response now, made as the service makes it
	// (convert.Take) with the recorded client sequence.
	Response *pb.IngestResponse
	// Taken is false when the robot now refuses the input before taking it.
	Taken bool
	// Recorded is the output journaled after the input (nil with
	// ReplayOptions.SkipOutputs).
	Recorded *pb.JournalOutput
}

// errReplayStopped ends a scan whose replay failed.
var errReplayStopped = errors.New("replay stopped")

// replayItem is what the scan hands to the replaying goroutine: exactly one
// field is set.
type replayItem struct {
	gap      error // a continuity break, handed to ReplayOptions.Gap
	opening  *pb.JournalOpening
	snapshot *pb.JournalSnapshot
	in       *pb.JournalInput
	out      *pb.JournalOutput
}

// Replay runs a robot's journal through a new fusion robot, input by input,
// and returns the robot after the last input with what the scan found. The
// journal is read and decoded in a goroutine of its own while the calling
// goroutine replays. A torn tail ends the replay without an error (see
// Scan.Torn), and so does damage that cost no input (Scan.Damage); a gap
// (ErrGap, see ReadFS), an error from a callback, a failed check or an
// unreadable journal stops it.
func Replay(dir, robot string, opt ReplayOptions) (*fusion.Robot, Scan, error) {
	if opt.Check && opt.SkipOutputs {
		panic("journal: Replay with both Check and SkipOutputs")
	}
	items := make(chan []replayItem, replayQueue)
	stop := make(chan struct{})
	var scan Scan
	var scanErr error
	go func() {
		defer close(items)
		q := &replayQueuer{items: items, stop: stop}
		scan, scanErr = ReadFS(opt.FS, dir, robot, replayVisitor(opt, q))
		q.flush()
	}()
	rp := &replayer{opt: opt}
	var err error
	for batch := range items {
		for _, it := range batch {
			if err == nil {
				if err = rp.apply(it); err != nil {
					close(stop)
				}
			}
		}
	}
	if err != nil {
		return nil, scan, err
	}
	if scanErr != nil {
		if opt.Gap != nil && errors.Is(scanErr, ErrGap) {
			return rp.fr, scan, scanErr
		}
		return nil, scan, scanErr
	}
	return rp.fr, scan, nil
}

// The scan hands what it finds to the replaying goroutine in batches of
// replayBatch, up to replayQueue batches ahead: one channel operation an
// input cost a tenth of a replay's time.
const (
	replayBatch = 128
	replayQueue = 8
)

// replayQueuer gathers the scan's items into batches for the replaying
// goroutine until stop is closed.
type replayQueuer struct {
	items chan<- []replayItem
	stop  <-chan struct{}
	batch []replayItem
}

func (q *replayQueuer) send(it replayItem) error {
	if q.batch == nil {
		q.batch = make([]replayItem, 0, replayBatch)
	}
	if q.batch = append(q.batch, it); len(q.batch) < replayBatch {
		return nil
	}
	return q.flush()
}

// flush hands the batch gathered over.
func (q *replayQueuer) flush() error {
	if len(q.batch) == 0 {
		return nil
	}
	b := q.batch
	q.batch = nil
	select {
	case q.items <- b:
		return nil
	case <-q.stop:
		return errReplayStopped
	}
}

// replayVisitor hands what Read finds to q.
func replayVisitor(opt ReplayOptions, q *replayQueuer) Visitor {
	send := q.send
	v := Visitor{Opening: func(op *pb.JournalOpening) error { return send(replayItem{opening: op}) },
		ReadOnly: opt.ReadOnly}
	if opt.Gap != nil {
		// Every callback runs on the caller's goroutine, in order with the
		// inputs around the gap.
		v.Gap = func(err error) error { return send(replayItem{gap: err}) }
	}
	if opt.FromSnapshot {
		v.Snapshot = func(s *pb.JournalSnapshot) error { return send(replayItem{snapshot: s}) }
	}
	if opt.SkipOutputs {
		v.Input = func(in *pb.JournalInput) error { return send(replayItem{in: in}) }
	} else {
		v.Pair = func(in *pb.JournalInput, out *pb.JournalOutput) error { return send(replayItem{in: in, out: out}) }
	}
	return v
}

// replayer is the replaying side of Replay.
type replayer struct {
	opt ReplayOptions
	cfg fusion.Config
	fr  *fusion.Robot
	// The responses and the Replayed handed out next, allocated
	// replayBatch at a time (each lives as long as any of its block).
	resps    []pb.IngestResponse
	replayed []Replayed
	// refused counts the journal's inputs the robot refused before taking
	// them (another configuration's, ReplayOptions.Config): they hold
	// journal numbers but take none of the robot's.
	refused uint64
}

func (rp *replayer) apply(it replayItem) error {
	switch {
	case it.gap != nil:
		return rp.opt.Gap(it.gap)
	case it.opening != nil:
		return rp.open(it.opening)
	case it.snapshot != nil:
		return rp.restore(it.snapshot)
	}
	return rp.input(it.in, it.out)
}

// open makes the robot from the opening record's configuration (or the
// replacement).
func (rp *replayer) open(op *pb.JournalOpening) error {
	c := op.GetConfig()
	if rp.opt.Config != nil {
		c = rp.opt.Config
	}
	var err error
	if rp.cfg, err = convert.ConfigFromProto(c); err != nil {
		return fmt.Errorf("opening record: %w", err)
	}
	if rp.fr, err = fusion.New(rp.cfg); err != nil {
		return err
	}
	if rp.opt.Opened != nil {
		return rp.opt.Opened(rp.fr)
	}
	return nil
}

// restore replaces the robot by the one the snapshot holds.
func (rp *replayer) restore(s *pb.JournalSnapshot) error {
	r, err := fusion.RestoreSnapshot(rp.cfg, s.GetState())
	if err != nil {
		return err
	}
	if r.Sequence() != s.GetSequence() {
		return fmt.Errorf("snapshot at sequence %d holds sequence %d", s.GetSequence(), r.Sequence())
	}
	rp.fr = r
	if rp.opt.Snapshot != nil {
		return rp.opt.Snapshot(s)
	}
	return nil
}

// input takes one journaled input and, with Check, compares the outcome.
func (rp *replayer) input(in *pb.JournalInput, out *pb.JournalOutput) error {
	if len(rp.resps) == 0 {
		rp.resps = make([]pb.IngestResponse, replayBatch)
	}
	resp := &rp.resps[0]
	rp.resps = rp.resps[1:]
	if seq := in.GetSequence() - rp.refused; seq > rp.fr.Sequence()+1 {
		// Past a gap (ReplayOptions.Gap): the inputs after it keep their
		// numbers, less those of the inputs refused before it, which a
		// robot so configured would not have numbered.
		rp.fr.SkipTo(seq - 1)
	}
	taken := convert.TakeInto(resp, rp.fr, in.GetSample(), out.GetResponse().GetClientSequence())
	if !taken {
		rp.refused++
	}
	if rp.opt.Check {
		if err := check(rp.fr, in, resp, taken, out); err != nil {
			return err
		}
	}
	if rp.opt.Input == nil {
		return nil
	}
	if len(rp.replayed) == 0 {
		rp.replayed = make([]Replayed, replayBatch)
	}
	x := &rp.replayed[0]
	rp.replayed = rp.replayed[1:]
	*x = Replayed{Robot: rp.fr, Input: in, Response: resp, Taken: taken, Recorded: out}
	return rp.opt.Input(x)
}

// check compares a replayed input's outcome with the recorded output.
func check(fr *fusion.Robot, in *pb.JournalInput, got *pb.IngestResponse, taken bool, out *pb.JournalOutput) error {
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
