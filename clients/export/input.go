package export

import (
	"context"
	"fmt"
	"sort"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// The label tables the rows use.
var (
	inputKinds = fusion.InputKindLabels()
	fixKinds   = fusion.FixKindLabels()
)

// runExport turns one replayed journal into rows.
type runExport struct {
	ctx context.Context
	t   *tables
	row RunRow
	// done are the rows of the journal's runs before the current one;
	// stamped says the current one has a stamped input.
	done    []RunRow
	stamped bool
	cfg     fusion.Config
	// only is Options.Run: the rows of other runs are counted, not written.
	only int64
	// pending are the input rows from the oldest fix still held on:
	// written once its final verdict is known, in order. open[i] says
	// pending[i] is still held; held counts them.
	pending []InputRow
	open    []bool
	held    int
	// The previous pose's stamp and trust, for RunRow.DistrustedNs.
	posed         bool
	prevStampNs   int64
	prevDistrusts bool
}

// input makes the rows of one replayed input.
func (x *runExport) input(rp *journal.Replayed) error {
	if err := x.ctx.Err(); err != nil {
		return err
	}
	resp := rp.Response
	started := rp.Robot.Run() != uint64(x.row.RunNumber)
	if started {
		if err := x.nextRun(rp.Robot, resp); err != nil {
			return err
		}
	}
	row := InputRow{Robot: x.row.Robot, Run: x.row.Run, Sequence: int64(rp.Input.GetSequence()),
		ClientSequence: int64(resp.GetClientSequence()), ArrivalUnixNs: rp.Input.GetArrivalUnixNs(),
		Verdict: convert.VerdictName(resp.GetVerdict()), NISDimension: resp.GetNisDimension(),
		Reason: resp.GetReason(), StatusCode: resp.GetStatusCode(), Events: int32(len(resp.GetEvents())),
		RecordedVerdict: convert.VerdictName(rp.Recorded.GetResponse().GetVerdict())}
	x.describe(&row, rp.Input.GetSample())
	row.FinalVerdict = row.Verdict
	if resp.GetNisDimension() > 0 {
		nis, final := resp.GetNis(), resp.GetNis()
		row.NIS, row.FinalNIS = &nis, &final
	}
	if !proto.Equal(resp, rp.Recorded.GetResponse()) {
		x.row.Differs++
	}
	for _, res := range resp.GetResolved() {
		if started {
			break // nextRun resolved them in the run they belong to
		}
		if err := x.resolve(res); err != nil {
			return err
		}
	}
	x.pending = append(x.pending, row)
	x.open = append(x.open, resp.GetVerdict() == pb.Verdict_VERDICT_HELD)
	if resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
		x.held++
	}
	if err := x.flushInputs(false); err != nil {
		return err
	}
	for _, e := range resp.GetEvents() {
		x.row.Events++
		if !x.keeps(x.row.RunNumber) {
			continue
		}
		if err := x.t.events.add(EventRow{Robot: x.row.Robot, Run: x.row.Run, Sequence: row.Sequence,
			Kind: convert.EventName(e.GetKind()), StampNs: e.GetStampNs(), SensorID: e.GetSensorId(),
			Value: e.GetValue(), Detail: e.GetDetail()}); err != nil {
			return err
		}
	}
	return x.pose(row.Sequence, rp.Robot.Pose())
}

// keeps tells whether the rows of run n are written.
func (x *runExport) keeps(n int64) bool { return x.only == 0 || n == x.only }

// nextRun ends the current run's row at the run start resp answers: the
// held inputs it resolves are the ended run's, and its rows are written;
// the rows from here on are of fr's new run.
func (x *runExport) nextRun(fr *fusion.Robot, resp *pb.IngestResponse) error {
	for _, res := range resp.GetResolved() {
		if err := x.resolve(res); err != nil {
			return err
		}
	}
	if err := x.flushInputs(true); err != nil {
		return err
	}
	x.done = append(x.done, x.row)
	n := fr.Run()
	x.row = RunRow{Robot: x.row.Robot, Run: fmt.Sprintf("%s/%d", x.row.Journal, n), Journal: x.row.Journal, RunNumber: int64(n),
		BootID: fr.BootID(), Deleted: x.row.Deleted, DeleteTimeUnixNs: x.row.DeleteTimeUnixNs}
	x.posed, x.stamped = false, false
	return nil
}

// describe fills the row's kind, stamp and sensor from the sample, and
// counts it.
func (x *runExport) describe(row *InputRow, s *pb.Sample) {
	var kind pb.InputKind
	switch v := s.GetSample().(type) {
	case *pb.Sample_Odometry:
		kind, row.StampNs = pb.InputKind_INPUT_KIND_ODOMETRY, v.Odometry.GetStampNs()
		x.row.Odometry++
	case *pb.Sample_Heading:
		kind, row.StampNs = pb.InputKind_INPUT_KIND_HEADING, v.Heading.GetStampNs()
		x.row.Headings++
	case *pb.Sample_Fix:
		kind, row.StampNs, row.SensorID = pb.InputKind_INPUT_KIND_FIX, v.Fix.GetStampNs(), v.Fix.GetSensorId()
		row.FixKind = fixKind(v.Fix)
		x.row.Fixes++
	case *pb.Sample_Reseed:
		kind, row.StampNs = pb.InputKind_INPUT_KIND_RESEED, v.Reseed.GetStampNs()
		x.row.Reseeds++
	case *pb.Sample_RunStart:
		row.Kind = labelOf(inputKinds, int32(pb.InputKind_INPUT_KIND_RUN_START))
		x.row.Inputs++ // no stamp: the run's clock starts after it
		return
	}
	row.Kind = labelOf(inputKinds, int32(kind))
	if !x.stamped || row.StampNs < x.row.FirstStampNs {
		x.row.FirstStampNs = row.StampNs
	}
	if !x.stamped || row.StampNs > x.row.LastStampNs {
		x.row.LastStampNs = row.StampNs
	}
	x.stamped = true
	x.row.Inputs++
}

// fixKind returns the label of a fix's measurement kind.
func fixKind(f *pb.Fix) string {
	var k pb.FixKind
	switch f.GetMeasurement().(type) {
	case *pb.Fix_Pose:
		k = pb.FixKind_FIX_KIND_POSE
	case *pb.Fix_Position:
		k = pb.FixKind_FIX_KIND_POSITION
	case *pb.Fix_Heading:
		k = pb.FixKind_FIX_KIND_HEADING
	case *pb.Fix_Landmark:
		k = pb.FixKind_FIX_KIND_LANDMARK
	}
	return labelOf(fixKinds, int32(k))
}

// resolve gives a held input its final verdict.
func (x *runExport) resolve(res *pb.Resolution) error {
	seq := int64(res.GetSequence())
	i := sort.Search(len(x.pending), func(i int) bool { return x.pending[i].Sequence >= seq })
	if i == len(x.pending) || x.pending[i].Sequence != seq || !x.open[i] {
		return fmt.Errorf("input %d is resolved but was not held", seq)
	}
	row := &x.pending[i]
	row.FinalVerdict, row.Reason, row.FinalNIS = convert.VerdictName(res.GetVerdict()), res.GetReason(), nil
	if v := res.GetVerdict(); v == pb.Verdict_VERDICT_APPLIED || v == pb.Verdict_VERDICT_GATED {
		nis := res.GetNis()
		row.FinalNIS = &nis
	}
	x.open[i] = false
	x.held--
	return nil
}

// flushInputs writes the pending rows up to the first still held, or all
// of them.
func (x *runExport) flushInputs(all bool) error {
	n := len(x.pending)
	if !all && x.held > 0 {
		n = 0
		for n < len(x.pending) && !x.open[n] {
			n++
		}
	}
	for i := range n {
		x.count(x.pending[i].FinalVerdict)
		if !x.keeps(x.row.RunNumber) {
			continue
		}
		if err := x.t.inputs.add(x.pending[i]); err != nil {
			return err
		}
	}
	m := copy(x.pending, x.pending[n:])
	copy(x.open, x.open[n:])
	clear(x.pending[m:])
	x.pending, x.open = x.pending[:m], x.open[:m]
	if all {
		x.held = 0
	}
	return nil
}

// count counts an input by its final verdict.
func (x *runExport) count(verdict string) {
	switch verdict {
	case "applied":
		x.row.Applied++
	case "held":
		x.row.Held++
	case "gated":
		x.row.Gated++
	case "too_old":
		x.row.TooOld++
	case "invalid":
		x.row.Invalid++
	}
}

// pose writes the pose after an input and accumulates the distrusted time.
func (x *runExport) pose(seq int64, p fusion.FusedPose) error {
	if x.posed && x.prevDistrusts && p.StampNs > x.prevStampNs {
		x.row.DistrustedNs += p.StampNs - x.prevStampNs
	}
	x.posed, x.prevStampNs, x.prevDistrusts = true, p.StampNs, !p.Trusted()
	row := PoseRow{Robot: x.row.Robot, Run: x.row.Run, Sequence: seq, StampNs: p.StampNs,
		XM: p.Pose.X, YM: p.Pose.Y, HeadingRad: p.Pose.Heading,
		CovXXM2: p.Cov[0], CovXYM2: p.Cov[1], CovXHMRad: p.Cov[2], CovYYM2: p.Cov[4], CovYHMRad: p.Cov[5], CovHHRad2: p.Cov[8],
		Position95M: p.Position95M, HeadingStdRad: p.HeadingStdRad,
		ForwardMPerS: p.Velocity.ForwardMPerS, LeftMPerS: p.Velocity.LeftMPerS, TurnRadPerS: p.Velocity.TurnRadPerS,
		IMUOffsetRad: p.IMUOffsetRad, IMUOffsetVarRad2: p.IMUOffsetVarRad2, IMUOffsetReady: p.IMUOffsetReady,
		Trusted: p.Trusted()}
	for _, d := range convert.DistrustToProto(p.Distrust) {
		row.Distrust = append(row.Distrust, convert.DistrustName(d))
	}
	if !x.keeps(x.row.RunNumber) {
		return nil
	}
	return x.t.poses.add(row)
}
