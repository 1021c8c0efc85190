package journal

import (
	"strings"
	"testing"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// recordRun runs a simulated cart through a robot as the service does and
// journals every input with its response (and the pose every PoseEvery
// inputs), a snapshot after snapAt inputs (0: none), and the response of
// input tamper with another verdict (0: none). It returns the robot.
func recordRun(t *testing.T, dir string, snapAt, tamper uint64) *fusion.Robot {
	t.Helper()
	sim := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 11, DurationS: 3, OutlierFraction: 0.1})
	fr, err := fusion.New(sim.Config())
	if err != nil {
		t.Fatal(err)
	}
	w, err := Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: convert.ConfigToProto(sim.Config())}, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer w.Close()
	for in, ok := sim.Next(); ok; in, ok = sim.Next() {
		var s *pb.Sample
		switch {
		case in.Odometry != nil:
			s = convert.OdometryToProto(in.Odometry)
		case in.Heading != nil:
			s = convert.HeadingToProto(in.Heading)
		default:
			s = convert.FixToProto(in.Fix)
		}
		resp, taken := convert.Take(fr, s, 7)
		if !taken {
			continue
		}
		out := &pb.JournalOutput{Response: proto.Clone(resp).(*pb.IngestResponse)}
		if resp.Sequence == tamper {
			out.Response.Verdict = pb.Verdict_VERDICT_GATED
		}
		if resp.Sequence%PoseEvery == 0 {
			out.Pose = convert.PoseToProto("robots/cart", fr.Pose(), resp.Sequence)
		}
		if err := w.AddPair(&pb.JournalInput{Sequence: resp.Sequence, Sample: s}, out); err != nil {
			t.Fatal(err)
		}
		if resp.Sequence == snapAt {
			b, err := fr.Snapshot()
			if err != nil {
				t.Fatal(err)
			}
			w.Add(&pb.JournalRecord{Entry: &pb.JournalRecord_Snapshot{Snapshot: &pb.JournalSnapshot{Sequence: fr.Sequence(), State: b}}})
		}
	}
	if _, err := w.Flush(); err != nil {
		t.Fatal(err)
	}
	return fr
}

func TestReplayReproducesTheRun(t *testing.T) {
	dir := t.TempDir()
	want := recordRun(t, dir, 0, 0)
	n := 0
	fr, scan, err := Replay(dir, "cart", ReplayOptions{Check: true, Input: func(r *Replayed) error {
		n++
		if !r.Taken || !proto.Equal(r.Response, r.Recorded.GetResponse()) {
			t.Errorf("input %d: %v, recorded %v", r.Input.GetSequence(), r.Response, r.Recorded.GetResponse())
		}
		return nil
	}})
	if err != nil {
		t.Fatal(err)
	}
	if n != scan.Pairs || uint64(n) != want.Sequence() || fr.Sequence() != want.Sequence() {
		t.Errorf("%d inputs replayed, %d in the journal, robot at %d, want %d", n, scan.Pairs, fr.Sequence(), want.Sequence())
	}
	if fr.Pose() != want.Pose() {
		t.Errorf("replayed pose %+v, want %+v", fr.Pose(), want.Pose())
	}
}

func TestReplayFromSnapshot(t *testing.T) {
	dir := t.TempDir()
	want := recordRun(t, dir, 400, 0)
	n := 0
	fr, scan, err := Replay(dir, "cart", ReplayOptions{FromSnapshot: true, Check: true, Input: func(*Replayed) error { n++; return nil }})
	if err != nil {
		t.Fatal(err)
	}
	if scan.SnapshotSequence != 400 || uint64(n) != want.Sequence()-400 || scan.Replayed != n {
		t.Errorf("snapshot at %d, %d inputs replayed (scan says %d), want 400 and %d", scan.SnapshotSequence, n, scan.Replayed, want.Sequence()-400)
	}
	if fr.Pose() != want.Pose() {
		t.Errorf("pose from the snapshot %+v, want %+v", fr.Pose(), want.Pose())
	}
}

// TestReplayCheck: a recorded verdict that the robot does not give again
// stops a checked replay at that input; an unchecked one reports it and
// goes on.
func TestReplayCheck(t *testing.T) {
	dir := t.TempDir()
	recordRun(t, dir, 0, 123)
	_, _, err := Replay(dir, "cart", ReplayOptions{Check: true})
	if err == nil || !strings.Contains(err.Error(), "diverged at input 123") {
		t.Errorf("checked replay of a tampered journal: %v", err)
	}
	var differ []uint64
	_, _, err = Replay(dir, "cart", ReplayOptions{Input: func(r *Replayed) error {
		if !proto.Equal(r.Response, r.Recorded.GetResponse()) {
			differ = append(differ, r.Input.GetSequence())
		}
		return nil
	}})
	if err != nil || len(differ) != 1 || differ[0] != 123 {
		t.Errorf("unchecked replay: %v, differing inputs %v, want [123]", err, differ)
	}
}

// TestReplayOptions: another configuration replaces the journal's;
// SkipOutputs leaves the outputs out; a callback's error stops the replay.
func TestReplayOptions(t *testing.T) {
	dir := t.TempDir()
	recordRun(t, dir, 0, 0)
	other := convert.ConfigToProto(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true}.Config())
	other.MaxHeld = 3
	var opened *pb.RobotConfig
	_, _, err := Replay(dir, "cart", ReplayOptions{Config: other, SkipOutputs: true,
		Opened: func(fr *fusion.Robot) error { opened = convert.ConfigToProto(fr.Config()); return nil },
		Input: func(r *Replayed) error {
			if r.Recorded != nil || r.Response.GetClientSequence() != 0 {
				t.Fatalf("input %d: recorded %v, client sequence %d with SkipOutputs", r.Input.GetSequence(), r.Recorded, r.Response.GetClientSequence())
			}
			return nil
		}})
	if err != nil {
		t.Fatal(err)
	}
	if opened.GetMaxHeld() != 3 {
		t.Errorf("replayed with max_held %d, want the other configuration's 3", opened.GetMaxHeld())
	}
	stop := errSentinel("enough")
	n := 0
	_, _, err = Replay(dir, "cart", ReplayOptions{Input: func(*Replayed) error {
		if n++; n == 10 {
			return stop
		}
		return nil
	}})
	if err != stop || n != 10 {
		t.Errorf("replay stopped by its callback after %d inputs: %v", n, err)
	}
}

type errSentinel string

func (e errSentinel) Error() string { return string(e) }

// TestReplayOtherConfigEqualsLive: a journal replayed under another
// configuration (ReplayOptions.Config) gives, input by input, the
// responses of a robot so configured fed the journal's samples as the
// service feeds them, and ends at its pose, bit for bit. The other
// configuration names the camera otherwise, so that its fixes are refused
// before they are taken, and holds fewer fixes: before, the replay
// numbered the inputs after the first refused fix as the journal did
// (fusion.Robot.SkipTo, meant for the inputs a gap lost), one more for
// each refusal, where the live robot numbers them on.
func TestReplayOtherConfigEqualsLive(t *testing.T) {
	dir := t.TempDir()
	recordRun(t, dir, 0, 0)
	cfg := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true}.Config()
	cfg.Sensors[0].ID = "camera-2"
	cfg.MaxHeld = 2
	live, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	n, refused := 0, 0
	fr, _, err := Replay(dir, "cart", ReplayOptions{Config: convert.ConfigToProto(cfg), Input: func(r *Replayed) error {
		n++
		want, taken := convert.Take(live, r.Input.GetSample(), r.Recorded.GetResponse().GetClientSequence())
		if !taken {
			refused++
		}
		if taken != r.Taken || !proto.Equal(r.Response, want) {
			t.Fatalf("journal input %d: replayed taken %v %v; live taken %v %v", r.Input.GetSequence(), r.Taken, r.Response, taken, want)
		}
		return nil
	}})
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("%d inputs, %d refused by the other configuration", n, refused)
	if refused == 0 {
		t.Fatal("no input refused: the test checks nothing it means to")
	}
	if fr.Sequence() != live.Sequence() || fr.Pose() != live.Pose() {
		t.Errorf("replayed robot at %d, %+v; live at %d, %+v", fr.Sequence(), fr.Pose(), live.Sequence(), live.Pose())
	}
}
