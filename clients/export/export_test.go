package export

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"

	"github.com/parquet-go/parquet-go"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// want is what the tables should hold, made by replaying the journals again
// here and keeping every row in memory.
type want struct {
	runs   []Run
	inputs []InputRow
	poses  []PoseRow
	events []EventRow
	pairs  map[string]int // journal inputs per "robot/run", as the scan counts them
}

// replayAll replays each run and makes the rows it should give.
func replayAll(t *testing.T, dir string, runs []Run) want {
	t.Helper()
	w := want{runs: runs, pairs: map[string]int{}}
	for _, r := range runs {
		bySeq := map[uint64]int{}
		_, scan, err := journal.Replay(dir, r.Robot, journal.ReplayOptions{ReadOnly: true, FS: r.fs(), Input: func(rp *journal.Replayed) error {
			resp, s := rp.Response, rp.Input.GetSample()
			in := InputRow{Robot: r.Robot, Run: r.ID, Sequence: int64(rp.Input.GetSequence()), ClientSequence: int64(resp.GetClientSequence()),
				ArrivalUnixNs: rp.Input.GetArrivalUnixNs(), Verdict: convert.VerdictName(resp.GetVerdict()), FinalVerdict: convert.VerdictName(resp.GetVerdict()),
				NISDimension: resp.GetNisDimension(), Reason: resp.GetReason(), StatusCode: resp.GetStatusCode(),
				RecordedVerdict: convert.VerdictName(rp.Recorded.GetResponse().GetVerdict()), Events: int32(len(resp.GetEvents()))}
			switch {
			case s.GetOdometry() != nil:
				in.Kind, in.StampNs = "odometry", s.GetOdometry().GetStampNs()
			case s.GetHeading() != nil:
				in.Kind, in.StampNs = "heading", s.GetHeading().GetStampNs()
			case s.GetFix() != nil:
				in.Kind, in.StampNs, in.SensorID = "fix", s.GetFix().GetStampNs(), s.GetFix().GetSensorId()
				in.FixKind = strings.ToLower(strings.TrimPrefix(fixKindOf(s.GetFix()).String(), "FIX_KIND_"))
			default:
				in.Kind, in.StampNs = "reseed", s.GetReseed().GetStampNs()
			}
			if resp.GetNisDimension() > 0 {
				a, b := resp.GetNis(), resp.GetNis()
				in.NIS, in.FinalNIS = &a, &b
			}
			for _, res := range resp.GetResolved() {
				i, ok := bySeq[res.GetSequence()]
				if !ok {
					t.Fatalf("%s %s: input %d resolved, never seen", r.Robot, r.ID, res.GetSequence())
				}
				held := &w.inputs[i]
				held.FinalVerdict, held.Reason, held.FinalNIS = convert.VerdictName(res.GetVerdict()), res.GetReason(), nil
				if res.GetVerdict() == pb.Verdict_VERDICT_APPLIED || res.GetVerdict() == pb.Verdict_VERDICT_GATED {
					nis := res.GetNis()
					held.FinalNIS = &nis
				}
			}
			bySeq[rp.Input.GetSequence()] = len(w.inputs)
			w.inputs = append(w.inputs, in)
			for _, e := range resp.GetEvents() {
				w.events = append(w.events, EventRow{Robot: r.Robot, Run: r.ID, Sequence: in.Sequence, Kind: convert.EventName(e.GetKind()),
					StampNs: e.GetStampNs(), SensorID: e.GetSensorId(), Value: e.GetValue(), Detail: e.GetDetail()})
			}
			p := convert.PoseToProto("", rp.Robot.Pose(), 0)
			c := p.GetCovariance().GetValues()
			pose := PoseRow{Robot: r.Robot, Run: r.ID, Sequence: in.Sequence, StampNs: p.GetStampNs(),
				XM: p.GetPose().GetXM(), YM: p.GetPose().GetYM(), HeadingRad: p.GetPose().GetHeadingRad(),
				CovXXM2: c[0], CovXYM2: c[1], CovXHMRad: c[2], CovYYM2: c[4], CovYHMRad: c[5], CovHHRad2: c[8],
				Position95M: p.GetPosition95M(), HeadingStdRad: p.GetHeadingStdRad(), ForwardMPerS: p.GetVelocity().GetForwardMPerS(),
				LeftMPerS: p.GetVelocity().GetLeftMPerS(), TurnRadPerS: p.GetVelocity().GetTurnRadPerS(),
				IMUOffsetRad: p.GetImuOffsetRad(), IMUOffsetVarRad2: p.GetImuOffsetVarianceRad2(), IMUOffsetReady: p.GetImuOffsetReady(), Trusted: p.GetTrusted()}
			for _, d := range p.GetDistrust() {
				pose.Distrust = append(pose.Distrust, convert.DistrustName(d))
			}
			w.poses = append(w.poses, pose)
			return nil
		}})
		if err != nil {
			t.Fatal(err)
		}
		w.pairs[r.Robot+"/"+r.ID] = scan.Pairs
	}
	return w
}

// fixKindOf returns a fix's wire kind.
func fixKindOf(f *pb.Fix) pb.FixKind {
	switch {
	case f.GetPose() != nil:
		return pb.FixKind_FIX_KIND_POSE
	case f.GetPosition() != nil:
		return pb.FixKind_FIX_KIND_POSITION
	case f.GetHeading() != nil:
		return pb.FixKind_FIX_KIND_HEADING
	}
	return pb.FixKind_FIX_KIND_LANDMARK
}

// runTotals are the counts a runs row should have, from the wanted rows.
type runTotals struct {
	inputs, fixes, events, held, applied, gated, distrustedNs int64
}

func (w want) totals() map[string]*runTotals {
	out := map[string]*runTotals{}
	get := func(robot, run string) *runTotals {
		k := robot + "/" + run
		if out[k] == nil {
			out[k] = &runTotals{}
		}
		return out[k]
	}
	for _, in := range w.inputs {
		tt := get(in.Robot, in.Run)
		tt.inputs++
		if in.Kind == "fix" {
			tt.fixes++
		}
		switch in.FinalVerdict {
		case "held":
			tt.held++
		case "applied":
			tt.applied++
		case "gated":
			tt.gated++
		}
	}
	for _, e := range w.events {
		get(e.Robot, e.Run).events++
	}
	for i := 1; i < len(w.poses); i++ {
		a, b := w.poses[i-1], w.poses[i]
		if a.Robot == b.Robot && a.Run == b.Run && !a.Trusted && b.StampNs > a.StampNs {
			get(a.Robot, a.Run).distrustedNs += b.StampNs - a.StampNs
		}
	}
	return out
}

// readTable reads a whole table back with parquet-go.
func readTable[T any](t *testing.T, dir, name string) []T {
	t.Helper()
	rows, err := parquet.ReadFile[T](filepath.Join(dir, name))
	if err != nil {
		t.Fatalf("reading %s: %v", name, err)
	}
	return rows
}

// sameRows compares rows read back with the wanted ones, reporting the
// first difference.
func sameRows[T any](t *testing.T, name string, got, want []T) {
	t.Helper()
	if len(got) != len(want) {
		t.Errorf("%s: %d rows, want %d", name, len(got), len(want))
		return
	}
	for i := range got {
		if !reflect.DeepEqual(got[i], want[i]) {
			t.Errorf("%s row %d:\n got  %+v\n want %+v", name, i, got[i], want[i])
			return
		}
	}
}

func TestRoundTripEqualsTheJournal(t *testing.T) {
	dir := fleet(t)
	out := t.TempDir()
	// Small row groups, so that the files have several.
	rows, err := Export(context.Background(), dir, out, Options{Deleted: true, RowGroupRows: 2000})
	if err != nil {
		t.Fatal(err)
	}
	runs, err := Runs(dir, true)
	if err != nil {
		t.Fatal(err)
	}
	if len(runs) != 3 || runs[0].Robot != "cart-1" || !strings.HasPrefix(runs[0].ID, "deleted-") || runs[1].ID != "live" || runs[2].Robot != "cart-2" {
		t.Fatalf("runs %+v, want cart-1's deleted and live journals and cart-2's", runs)
	}
	w := replayAll(t, dir, runs)

	gotInputs := readTable[InputRow](t, out, InputsFile)
	gotPoses := readTable[PoseRow](t, out, PosesFile)
	for i := range gotPoses {
		if len(gotPoses[i].Distrust) == 0 {
			gotPoses[i].Distrust = nil
		}
	}
	sameRows(t, InputsFile, gotInputs, w.inputs)
	sameRows(t, PosesFile, gotPoses, w.poses)
	sameRows(t, EventsFile, readTable[EventRow](t, out, EventsFile), w.events)
	gotRuns := readTable[RunRow](t, out, RunsFile)
	sameRows(t, RunsFile, gotRuns, rows)

	totals := w.totals()
	var heldThenDecided, distrusted int
	for _, in := range w.inputs {
		if in.Verdict == "held" && in.FinalVerdict != "held" {
			heldThenDecided++
		}
	}
	for _, r := range gotRuns {
		k := r.Robot + "/" + r.Run
		tt := totals[k]
		if tt == nil {
			t.Fatalf("run %s has no inputs", k)
		}
		if r.Inputs != int64(w.pairs[k]) || r.Inputs != tt.inputs || r.Fixes != tt.fixes || r.Events != tt.events ||
			r.Held != tt.held || r.Applied != tt.applied || r.Gated != tt.gated || r.DistrustedNs != tt.distrustedNs {
			t.Errorf("run %s: %+v, want %+v with %d journal inputs", k, r, *tt, w.pairs[k])
		}
		if r.Differs != 0 || r.Torn || r.Gap != "" || r.Damaged != 0 {
			t.Errorf("run %s: replay differs in %d, torn %v, gap %q, damaged %d; want a clean journal", k, r.Differs, r.Torn, r.Gap, r.Damaged)
		}
		if r.Deleted != (r.DeleteTimeUnixNs != nil) || r.Deleted != strings.HasPrefix(r.Run, "deleted-") ||
			r.Deleted && fmt.Sprintf("deleted-%d", *r.DeleteTimeUnixNs) != r.Run {
			t.Errorf("run %s: deleted %v, delete time %v", k, r.Deleted, r.DeleteTimeUnixNs)
		}
		if r.CreateTimeUnixNs == 0 || r.IMUMode == "" || r.Wheels == 0 || r.GateProbability == 0 || !strings.Contains(r.ConfigJSON, "wheels") {
			t.Errorf("run %s: configuration summary %+v", k, r)
		}
		if tt.distrustedNs > 0 {
			distrusted++
		}
	}
	// The data must exercise what the export does: held fixes decided
	// later, events, distrusted stretches and the deleted run.
	if heldThenDecided == 0 || len(w.events) == 0 || distrusted == 0 {
		t.Errorf("test data too tame: %d held inputs decided later, %d events, %d runs with distrusted time", heldThenDecided, len(w.events), distrusted)
	}
	t.Logf("%d runs, %d inputs (%d held then decided), %d events", len(gotRuns), len(gotInputs), heldThenDecided, len(w.events))
}

func TestExportPicksRobotsAndRuns(t *testing.T) {
	dir := fleet(t)
	tests := []struct {
		name string
		opt  Options
		runs []string
	}{
		{"live journals", Options{}, []string{"cart-1/live", "cart-2/live"}},
		{"one robot with deleted", Options{Robots: []string{"cart-1"}, Deleted: true}, []string{"cart-1/deleted", "cart-1/live"}},
		{"one robot", Options{Robots: []string{"cart-2"}}, []string{"cart-2/live"}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			out := t.TempDir()
			rows, err := Export(context.Background(), dir, out, tc.opt)
			if err != nil {
				t.Fatal(err)
			}
			got := readTable[RunRow](t, out, RunsFile)
			var names []string
			for _, r := range got {
				id, _, _ := strings.Cut(r.Run, "-")
				names = append(names, r.Robot+"/"+id)
			}
			if !reflect.DeepEqual(names, tc.runs) || !reflect.DeepEqual(got, rows) {
				t.Errorf("runs %v, want %v", names, tc.runs)
			}
		})
	}
	if _, err := Export(context.Background(), dir, t.TempDir(), Options{Robots: []string{"cart-9"}}); !errors.Is(err, ErrNoRuns) {
		t.Errorf("export of a robot without a journal: %v, want ErrNoRuns", err)
	}
}

// TestExportOfATornJournal: a journal whose tail a crash cut short is
// exported up to its last complete input, and its run says torn.
func TestExportOfATornJournal(t *testing.T) {
	dir := t.TempDir()
	if err := writeJournal(t, dir, "cart-1", fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 9, DurationS: 5}, lagOdometry{}).Close(); err != nil {
		t.Fatal(err)
	}
	segs, err := journal.Segments(dir, "cart-1")
	if err != nil || len(segs) == 0 {
		t.Fatalf("segments %v: %v", segs, err)
	}
	last := segs[len(segs)-1]
	st, err := os.Stat(last)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.Truncate(last, st.Size()-7); err != nil {
		t.Fatal(err)
	}
	scan, err := journal.Read(dir, "cart-1", journal.Visitor{ReadOnly: true})
	if err != nil || scan.Torn == nil {
		t.Fatalf("scan of the cut journal: torn %v, %v", scan.Torn, err)
	}
	out := t.TempDir()
	rows, err := Export(context.Background(), dir, out, Options{})
	if err != nil {
		t.Fatal(err)
	}
	inputs := readTable[InputRow](t, out, InputsFile)
	if len(rows) != 1 || !rows[0].Torn || rows[0].Inputs != int64(scan.Pairs) || len(inputs) != scan.Pairs || scan.Pairs == 0 {
		t.Errorf("runs %+v, %d input rows; want torn with the scan's %d inputs", rows, len(inputs), scan.Pairs)
	}
}

// TestExportOfAJournalWithoutSegments: a journal whose manifest names a
// segment of which none is left (a half-copied directory) is an error
// naming the missing segment, not a run exported with no inputs and no
// configuration.
func TestExportOfAJournalWithoutSegments(t *testing.T) {
	dir := t.TempDir()
	if err := writeJournal(t, dir, "cart-1", fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 9, DurationS: 2}, lagOdometry{}).Close(); err != nil {
		t.Fatal(err)
	}
	segs, err := journal.Segments(dir, "cart-1")
	if err != nil || len(segs) == 0 {
		t.Fatalf("segments %v: %v", segs, err)
	}
	for _, s := range segs {
		if err := os.Remove(s); err != nil {
			t.Fatal(err)
		}
	}
	rows, err := Export(context.Background(), dir, t.TempDir(), Options{})
	if err == nil || !strings.Contains(err.Error(), "no segment of cart-1") {
		t.Errorf("export of a journal without segments: %d runs, %v; want an error naming the missing segment", len(rows), err)
	}
}

// TestFailedExportKeepsTheLastOne: an export that fails (a journal that
// cannot be read) leaves the tables an earlier export wrote into the same
// directory as they were, and no file of its own: it wrote over them as it
// went and removed them all at the failure, so that one damaged journal
// cost the last good export.
func TestFailedExportKeepsTheLastOne(t *testing.T) {
	out := t.TempDir()
	if _, err := Export(context.Background(), fleet(t), out, Options{}); err != nil {
		t.Fatal(err)
	}
	before := map[string][]byte{}
	for _, name := range []string{RunsFile, InputsFile, PosesFile, EventsFile} {
		b, err := os.ReadFile(filepath.Join(out, name))
		if err != nil {
			t.Fatal(err)
		}
		before[name] = b
	}
	bad := t.TempDir()
	if err := writeJournal(t, bad, "cart-1", fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 9, DurationS: 2}, lagOdometry{}).Close(); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(journal.SegmentPath(bad, "cart-1", 0), nil, 0o644); err != nil {
		t.Fatal(err)
	}
	if _, err := Export(context.Background(), bad, out, Options{}); err == nil {
		t.Fatal("the export of an unreadable journal succeeded")
	}
	names, _ := os.ReadDir(out)
	if len(names) != len(before) {
		t.Errorf("the failed export left %v", names)
	}
	for name, b := range before {
		if got, err := os.ReadFile(filepath.Join(out, name)); err != nil || !bytes.Equal(got, b) {
			t.Errorf("%s: %v; the failed export changed it (%d bytes, were %d)", name, err, len(got), len(b))
		}
	}
}

// TestExportPastALostHeldInput: a journal that lost a held input in its
// middle (a gap, as damage leaves one) still exports: the runs row names
// the gap, the rows after it keep the journal's sequence numbers, and
// every held input's final verdict is the one its resolution recorded
// (the replay numbers the inputs after the gap as they arrived,
// fusion.Robot.SkipTo).
func TestExportPastALostHeldInput(t *testing.T) {
	dir := t.TempDir()
	w := writeJournal(t, dir, "cart-1", fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 71, DurationS: 16, CameraHz: 5},
		lagOdometry{FromS: 8, ToS: 12, LagS: 0.4, LoseHeld: 3})
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	// What the journal recorded: every input's sequence, and the final
	// verdict of each held one.
	final := map[int64]string{}
	var seqs []int64
	if _, err := journal.Read(dir, "cart-1", journal.Visitor{ReadOnly: true, Gap: func(error) error { return nil },
		Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
			seqs = append(seqs, int64(in.GetSequence()))
			for _, res := range out.GetResponse().GetResolved() {
				final[int64(res.GetSequence())] = convert.VerdictName(res.GetVerdict())
			}
			return nil
		}}); !errors.Is(err, journal.ErrGap) {
		t.Fatalf("the journal: %v, want a gap", err)
	}
	out := t.TempDir()
	rows, err := Export(context.Background(), dir, out, Options{})
	if err != nil {
		t.Fatalf("export past the gap: %v", err)
	}
	if len(rows) != 1 || !strings.Contains(rows[0].Gap, "follows input") {
		t.Errorf("runs %+v: want one, naming the gap", rows)
	}
	inputs := readTable[InputRow](t, out, InputsFile)
	if len(inputs) != len(seqs) {
		t.Fatalf("%d input rows, the journal holds %d", len(inputs), len(seqs))
	}
	resolved := 0
	for i, in := range inputs {
		if in.Sequence != seqs[i] {
			t.Fatalf("row %d: input %d, the journal's is %d", i, in.Sequence, seqs[i])
		}
		if in.Verdict != "held" {
			continue
		}
		want, ok := final[in.Sequence]
		if !ok {
			want = "held" // not decided when the journal ends
		}
		if in.FinalVerdict != want {
			t.Errorf("held input %d: final verdict %q, recorded %q", in.Sequence, in.FinalVerdict, want)
		}
		resolved++
	}
	if resolved < 3 {
		t.Errorf("only %d held inputs: the run does not test resolutions past the gap", resolved)
	}
}
