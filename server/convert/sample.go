package convert

import (
	"errors"
	"fmt"

	"reckon.example/estimator"
	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
)

// ErrSample marks a sample refused before a robot took it: malformed on the
// wire, or failing the robot's checks; it reaches neither the estimate nor the journal.
var ErrSample = errors.New("bad sample")

// input is a decoded sample, ready for a robot: the one of Odometry,
// Heading, Fix and Pose that kind names; field is the sample's oneof field
// for error messages.
type input struct {
	kind     fusion.InputKind
	field    string
	Odometry fusion.Odometry
	Heading  fusion.Heading
	Fix      fusion.Fix
	Pose     reseedInput
	Run      fusion.RunStart
}

// reseedInput is a decoded reseed.
type reseedInput struct {
	StampNs int64
	Pose    estimator.Pose
	Cov     []float64
}

func sampleErr(field string, err error) error {
	return &fusion.FieldError{Path: field, Err: fmt.Errorf("%w: %s: %w", ErrSample, field, err)}
}

func sampleErrf(field, format string, args ...any) error {
	return fusion.FieldErrorf(ErrSample, field, format, args...)
}

// decode converts a wire sample into in, which must be the zero input,
// refusing what is malformed on the wire (no oneof set, a covariance whose
// stated dimension does not fit). The robot checks the values when it is
// handed the input. It fills the caller's input rather than returning one
// (360 bytes, copied through the stack at every sample: BenchmarkRobotRates).
func decode(s *pb.Sample, in *input) error {
	switch v := s.GetSample().(type) {
	case *pb.Sample_Odometry:
		if err := decodeOdometry(v.Odometry, &in.Odometry); err != nil {
			return err
		}
		in.kind, in.field = fusion.InputOdometry, "sample.odometry"
	case *pb.Sample_Heading:
		in.kind, in.field = fusion.InputHeading, "sample.heading"
		in.Heading = fusion.Heading{StampNs: v.Heading.GetStampNs(), HeadingRad: v.Heading.GetHeadingRad(), VarRad2: v.Heading.GetVarianceRad2()}
	case *pb.Sample_Fix:
		if err := decodeFix(v.Fix, &in.Fix); err != nil {
			return err
		}
		in.kind, in.field = fusion.InputFix, "sample.fix"
	case *pb.Sample_Reseed:
		ps := v.Reseed
		if ps.GetPose() == nil {
			return sampleErrf("sample.reseed.pose", "missing")
		}
		cov, err := covFromProto(ps.GetCovariance(), 3)
		if err != nil {
			return sampleErr("sample.reseed.covariance", err)
		}
		in.kind, in.field = fusion.InputReseed, "sample.reseed"
		in.Pose = reseedInput{StampNs: ps.GetStampNs(), Pose: poseFromProto(ps.GetPose()), Cov: cov}
	case *pb.Sample_RunStart:
		rs := v.RunStart
		in.kind, in.field = fusion.InputRunStart, "sample.run_start"
		in.Run = fusion.RunStart{BootID: rs.GetBootId(), Run: rs.GetRun()}
		if rs.GetPose() != nil {
			p := poseFromProto(rs.GetPose())
			cov, err := covFromProto(rs.GetCovariance(), 3)
			if err != nil {
				return sampleErr("sample.run_start.covariance", err)
			}
			in.Run.Pose, in.Run.Cov = &p, cov
		} else if rs.GetCovariance() != nil {
			return sampleErrf("sample.run_start.pose", "missing, but a covariance is given")
		}
	default:
		return sampleErrf("sample", "none of odometry, heading, fix, reseed and run_start is set")
	}
	return nil
}

func decodeOdometry(o *pb.OdometrySample, out *fusion.Odometry) error {
	*out = fusion.Odometry{StampNs: o.GetStampNs(), StartNs: o.GetStartNs()}
	switch m := o.GetMotion().(type) {
	case *pb.OdometrySample_Travel:
		out.TravelM = m.Travel.GetTravelM()
		if out.TravelM == nil {
			out.TravelM = []float64{}
		}
	case *pb.OdometrySample_Counts:
		out.Counts = m.Counts.GetCounts()
		if out.Counts == nil {
			out.Counts = []int64{}
		}
	case *pb.OdometrySample_Step:
		out.Step = &estimator.Step{ForwardM: m.Step.GetForwardM(), LeftM: m.Step.GetLeftM(), TurnRad: m.Step.GetTurnRad()}
	default:
		return sampleErrf("sample.odometry", "none of travel, counts and step is set")
	}
	if o.ImuHeadingRad != nil {
		out.IMUHeadingRad = o.ImuHeadingRad
	}
	return nil
}

func decodeFix(f *pb.Fix, out *fusion.Fix) error {
	*out = fusion.Fix{StampNs: f.GetStampNs(), SensorID: f.GetSensorId()}
	if f.GetMount() != nil {
		m := poseFromProto(f.GetMount())
		out.Mount = &m
	}
	var dim int
	switch m := f.GetMeasurement().(type) {
	case *pb.Fix_Pose:
		out.Kind, dim = fusion.FixPose, 3
		out.XM, out.YM, out.HeadingRad = m.Pose.GetXM(), m.Pose.GetYM(), m.Pose.GetHeadingRad()
		out.Marker = m.Pose.GetMarker()
	case *pb.Fix_Position:
		out.Kind, dim = fusion.FixPosition, 2
		out.XM, out.YM = m.Position.GetXM(), m.Position.GetYM()
	case *pb.Fix_Heading:
		out.Kind, dim = fusion.FixHeading, 1
		out.HeadingRad = m.Heading.GetHeadingRad()
	case *pb.Fix_Landmark:
		out.Kind = fusion.FixLandmark
		out.LandmarkID = m.Landmark.GetLandmarkId()
		if m.Landmark.RangeM != nil {
			v := m.Landmark.GetRangeM()
			out.RangeM = &v
			dim++
		}
		if m.Landmark.BearingRad != nil {
			v := m.Landmark.GetBearingRad()
			out.BearingRad = &v
			dim++
		}
		if dim == 0 {
			return sampleErrf("sample.fix.landmark", "neither range_m nor bearing_rad is set")
		}
	default:
		return sampleErrf("sample.fix", "none of pose, position, heading and landmark is set")
	}
	if f.GetCovariance() == nil {
		return nil // the sensor's configured covariance
	}
	cov, err := covFromProto(f.GetCovariance(), dim)
	if err != nil {
		return sampleErr("sample.fix.covariance", err)
	}
	out.Cov = cov
	return nil
}

// apply gives a decoded input to the robot.
func apply(r *fusion.Robot, in *input) fusion.Result {
	switch in.kind {
	case fusion.InputOdometry:
		return r.AddOdometry(in.Odometry)
	case fusion.InputHeading:
		return r.AddHeading(in.Heading)
	case fusion.InputFix:
		return r.AddFix(in.Fix)
	case fusion.InputReseed:
		return r.Reseed(in.Pose.StampNs, in.Pose.Pose, in.Pose.Cov)
	case fusion.InputRunStart:
		return r.StartRun(in.Run)
	}
	panic(fmt.Sprintf("convert: input of kind %v", in.kind))
}

// Status codes of IngestResponse.status_code: google.rpc.Code values
// (google/rpc/code.proto; common practice), kept here as numbers so that an
// offline replay fills the field exactly as the service does, without gRPC.
const (
	CodeOK                 int32 = 0
	CodeInvalidArgument    int32 = 3
	CodeNotFound           int32 = 5
	CodeResourceExhausted  int32 = 8
	CodeFailedPrecondition int32 = 9
	CodeOutOfRange         int32 = 11
)

// errorCode returns the status code for the error that refused a sample.
// A refusal that the robot's state decides, not the sample alone, is no
// INVALID_ARGUMENT (gRPC's status code guide; common practice): a stamp
// outside the range the robot takes now (too old, backwards, too far past
// its newest odometry) is OUT_OF_RANGE, and a full queue of held samples,
// which odometry empties, is RESOURCE_EXHAUSTED.
func errorCode(err error) int32 {
	switch {
	case err == nil:
		return CodeOK
	case errors.Is(err, fusion.ErrTimeBackwards), errors.Is(err, fusion.ErrTooOld), errors.Is(err, fusion.ErrTooFarAhead):
		return CodeOutOfRange
	case errors.Is(err, fusion.ErrHeldFull):
		return CodeResourceExhausted
	case errors.Is(err, fusion.ErrNoIMU), errors.Is(err, fusion.ErrRunOutOfOrder):
		return CodeFailedPrecondition
	case errors.Is(err, fusion.ErrUnknownLandmark), errors.Is(err, fusion.ErrUnknownSensor):
		return CodeNotFound
	}
	return CodeInvalidArgument
}

// The label tables of package fusion, read once: every mapping between a
// fusion enum and its wire enum goes through the wire number they hold.
var (
	verdictLabels     = fusion.VerdictLabels()
	eventLabels       = fusion.EventKindLabels()
	trustLabels       = fusion.TrustReasonLabels()
	consistencyLabels = fusion.ConsistencyVerdictLabels()
	imuModeLabels     = fusion.IMUModeLabels()
	fixKindLabels     = fusion.FixKindLabels()
	robustLabels      = fusion.RobustLossLabels()
	refusalLabels     = fusion.RefusalLabels()
	allRefusalLabels  = RefusalLabels()
)

func refusalToProto(err error) pb.Refusal {
	if err == nil {
		// Most inputs: not a search of the table, whose rows were
		// cache misses at every sample (BenchmarkRobotRates).
		return noRefusal
	}
	return pb.Refusal(fusion.ProtoOf(refusalLabels, fusion.RefusalOf(err)))
}

// noRefusal is the wire refusal of no error, looked up once.
var noRefusal = pb.Refusal(fusion.ProtoOf(refusalLabels, fusion.RefusalOf(nil)))

// serviceRefusals are the refusals only the service gives, beyond the
// robot's (fusion.RefusalLabels); their Go values are past the robot's.
var serviceRefusals = []fusion.Label[fusion.Refusal]{
	{Value: fusion.Refusal(252), Name: "robot_deleted", Proto: int32(pb.Refusal_REFUSAL_ROBOT_DELETED)},
	{Value: fusion.Refusal(253), Name: "quarantined", Proto: int32(pb.Refusal_REFUSAL_QUARANTINED)},
	{Value: fusion.Refusal(254), Name: "not_journaled", Proto: int32(pb.Refusal_REFUSAL_NOT_JOURNALED)},
	{Value: fusion.Refusal(255), Name: "limit", Proto: int32(pb.Refusal_REFUSAL_LIMIT)},
}

// RefusalLabels returns the label table of every wire refusal: the robot's
// and the service's.
func RefusalLabels() []fusion.Label[fusion.Refusal] {
	return append(fusion.RefusalLabels(), serviceRefusals...)
}

// RefusalName returns a wire refusal's label ("unknown_sensor").
func RefusalName(r pb.Refusal) string {
	return labelName(allRefusalLabels, int32(r), "refusal")
}

func verdictToProto(v fusion.Verdict) pb.Verdict {
	return pb.Verdict(fusion.ProtoOf(verdictLabels, v))
}

func reason(err error) string {
	if err == nil {
		return ""
	}
	return err.Error()
}

// ResultToProto converts a robot's result to the wire.
func ResultToProto(res fusion.Result, clientSeq uint64) *pb.IngestResponse {
	out := new(pb.IngestResponse)
	resultInto(out, res, clientSeq)
	return out
}

// resultInto fills out, which must be empty, with a robot's result.
func resultInto(out *pb.IngestResponse, res fusion.Result, clientSeq uint64) {
	out.ClientSequence, out.Sequence, out.Verdict, out.Reason = clientSeq, res.Seq, verdictToProto(res.Verdict), reason(res.Err)
	out.Refusal, out.Field = refusalToProto(res.Err), fusion.FieldOf(res.Err)
	out.Nis, out.NisDimension, out.Events = res.NIS, int32(res.Dim), EventsToProto(res.Events)
	for _, r := range res.Resolved {
		out.Resolved = append(out.Resolved, &pb.Resolution{Sequence: r.Seq, Verdict: verdictToProto(r.Verdict), Nis: r.NIS, Reason: reason(r.Err),
			Refusal: refusalToProto(r.Err)})
	}
}

// EventsToProto converts events.
func EventsToProto(evs []fusion.Event) []*pb.FusionEvent {
	var out []*pb.FusionEvent
	for _, e := range evs {
		out = append(out, &pb.FusionEvent{Kind: pb.EventKind(fusion.ProtoOf(eventLabels, e.Kind)), StampNs: e.StampNs, SensorId: e.SensorID, Value: e.Value, Detail: e.Detail})
	}
	return out
}

// DistrustToProto lists the reasons of the set t, in the order of the wire
// enum.
func DistrustToProto(t fusion.TrustReason) []pb.DistrustReason {
	var out []pb.DistrustReason
	for _, l := range trustLabels {
		if t&l.Value != 0 {
			out = append(out, pb.DistrustReason(l.Proto))
		}
	}
	return out
}

// PoseToProto converts a fused pose.
func PoseToProto(robot string, p fusion.FusedPose, seq uint64) *pb.FusedPose {
	return &pb.FusedPose{
		Robot: robot, StampNs: p.StampNs, Pose: poseToProto(p.Pose),
		Covariance:   &pb.Covariance{Dimension: 3, Values: append([]float64(nil), p.Cov[:]...)},
		ImuOffsetRad: p.IMUOffsetRad, ImuOffsetVarianceRad2: p.IMUOffsetVarRad2, ImuOffsetReady: p.IMUOffsetReady,
		Velocity:    &pb.BodyVelocity{ForwardMPerS: p.Velocity.ForwardMPerS, LeftMPerS: p.Velocity.LeftMPerS, TurnRadPerS: p.Velocity.TurnRadPerS},
		Position95M: p.Position95M, HeadingStdRad: p.HeadingStdRad,
		Distrust: DistrustToProto(p.Distrust), Trusted: p.Distrust == 0, Extrapolated: p.Extrapolated, Sequence: seq,
	}
}

func countsToProto(c fusion.VerdictCounts) *pb.VerdictCounts {
	return &pb.VerdictCounts{Applied: c.Applied, Held: c.Held, Gated: c.Gated, TooOld: c.TooOld, Invalid: c.Invalid}
}

// StatsToProto converts a robot's statistics.
func StatsToProto(s fusion.Stats) *pb.RobotStatistics {
	out := &pb.RobotStatistics{Odometry: countsToProto(s.Odometry), Measurements: countsToProto(s.Measurements),
		Slips: s.Slips, Gaps: s.Gaps, Recoveries: s.Recoveries, Distrust: DistrustToProto(s.Distrust),
		Held: int32(s.Held), WindowEntries: int32(s.WindowEntries)}
	for _, ss := range s.Sensors {
		mean, lo, hi, v := ss.Consistency()
		out.Sensors = append(out.Sensors, &pb.SensorConsistency{SensorId: ss.ID, Counts: countsToProto(ss.VerdictCounts), MeanNis: mean, BandLow: lo, BandHigh: hi,
			Verdict: pb.ConsistencyVerdict(fusion.ProtoOf(consistencyLabels, v))})
	}
	return out
}

// VerdictName returns a wire verdict's label ("applied", "too_old"), from
// fusion's table.
func VerdictName(v pb.Verdict) string {
	return labelName(verdictLabels, int32(v), "verdict")
}

// EventName returns a wire event kind's label ("fix_refused").
func EventName(k pb.EventKind) string { return labelName(eventLabels, int32(k), "event") }

// DistrustName returns a wire distrust reason's label ("position_uncertain").
func DistrustName(d pb.DistrustReason) string { return labelName(trustLabels, int32(d), "distrust") }

// ConsistencyName returns a wire consistency verdict's label ("too_few_fixes").
func ConsistencyName(c pb.ConsistencyVerdict) string {
	return labelName(consistencyLabels, int32(c), "consistency")
}

// labelName returns the label of the row with wire number n, or "what(n)".
func labelName[T comparable](table []fusion.Label[T], n int32, what string) string {
	for _, l := range table {
		if l.Proto == n {
			return l.Name
		}
	}
	return fmt.Sprintf("%s(%d)", what, n)
}

// resultCode returns the status code of a robot's result.
func resultCode(res fusion.Result) int32 {
	switch res.Verdict {
	case fusion.VerdictInvalid:
		return errorCode(res.Err)
	case fusion.VerdictTooOld:
		return CodeOutOfRange
	}
	return CodeOK
}

// Take runs one sample through the robot as the service does. taken is
// false when the sample was refused before the robot took it (malformed on
// the wire, or failing the robot's checks: then the result has no sequence
// number and the robot is unchanged); the service journals only what was
// taken. The reason names the field; it wraps ErrSample and the fusion
// sentinel.
func Take(r *fusion.Robot, s *pb.Sample, clientSeq uint64) (resp *pb.IngestResponse, taken bool) {
	resp = new(pb.IngestResponse)
	return resp, TakeInto(resp, r, s, clientSeq)
}

// TakeInto is Take answering into resp, which must be empty, so that a
// caller can allocate the answers of many samples at once.
func TakeInto(resp *pb.IngestResponse, r *fusion.Robot, s *pb.Sample, clientSeq uint64) (taken bool) {
	var in input
	err := decode(s, &in)
	if err == nil {
		res := apply(r, &in)
		if res.Seq != 0 {
			resultInto(resp, res, clientSeq)
			resp.StatusCode = resultCode(res)
			return true
		}
		field := in.field
		if p := fusion.FieldOf(res.Err); (in.kind == fusion.InputRunStart || in.kind == fusion.InputReseed) && p != "" {
			// A run start's and a reseed's fields are all their own:
			// name the one at fault.
			field += "." + p
		}
		err = sampleErr(field, res.Err)
		resp.Refusal = refusalToProto(res.Err)
	} else {
		resp.Refusal = pb.Refusal_REFUSAL_MALFORMED
	}
	resp.ClientSequence, resp.Verdict, resp.Reason, resp.StatusCode = clientSeq, pb.Verdict_VERDICT_INVALID, err.Error(), errorCode(err)
	resp.Field = fusion.FieldOf(err)
	return false
}
