package fusion

import (
	"fmt"
	"slices"
	"strings"
)

// Label is one row of an enum's label table: the Go value, its label and
// the number of the matching value of the wire API's enum. The label is
// the lowercase suffix of the wire enum value's name ("too_old" for
// VERDICT_TOO_OLD); the CLI, the review report, the metrics and the docs
// all spell the value so. Package fusion does not import the wire API, so
// the number is a plain int32; server/convert maps through it and a test
// there checks every table against the wire enums both ways.
type Label[T comparable] struct {
	// Value is the Go value (for TrustReason, a single reason bit).
	Value T
	// Name is the label: the lowercase suffix of the wire value's name.
	Name string
	// Proto is the number of the wire enum value.
	Proto int32
}

// The label tables, one per enum, in the order of the wire enums.
var (
	verdictTable = [...]Label[Verdict]{
		{VerdictApplied, "applied", 1},
		{VerdictHeld, "held", 2},
		{VerdictGated, "gated", 3},
		{VerdictTooOld, "too_old", 4},
		{VerdictInvalid, "invalid", 5},
	}
	eventTable = [...]Label[EventKind]{
		{EventFixRefused, "fix_refused", 1},
		{EventSlipSuspected, "slip_suspected", 2},
		{EventOdometryGap, "odometry_gap", 3},
		{EventMoveRecovered, "move_recovered", 4},
		{EventTrustLost, "trust_lost", 5},
		{EventTrustRegained, "trust_regained", 6},
		{EventReseeded, "reseeded", 7},
		{EventRunStarted, "run_started", 8},
	}
	// trustTable has one row per reason bit; the wire calls them
	// DISTRUST_REASON_*.
	trustTable = [...]Label[TrustReason]{
		{TrustNoOdometry, "no_odometry", 1},
		{TrustPositionUncertain, "position_uncertain", 2},
		{TrustHeadingUncertain, "heading_uncertain", 3},
		{TrustInconsistent, "inconsistent", 4},
		{TrustFixesRefused, "fixes_refused", 5},
		{TrustNumericalFault, "numerical_fault", 6},
		{TrustFixDisagrees, "fix_disagrees", 7},
		{TrustIMUUnchanged, "imu_unchanged", 8},
		{TrustMoveUnconfirmed, "move_unconfirmed", 9},
	}
	fixKindTable = [...]Label[FixKind]{
		{FixPose, "pose", 1},
		{FixPosition, "position", 2},
		{FixHeading, "heading", 3},
		{FixLandmark, "landmark", 4},
	}
	inputKindTable = [...]Label[InputKind]{
		{InputOdometry, "odometry", 1},
		{InputHeading, "heading", 2},
		{InputFix, "fix", 3},
		{InputReseed, "reseed", 4},
		{InputRunStart, "run_start", 5},
	}
	consistencyTable = [...]Label[ConsistencyVerdict]{
		{Consistent, "consistent", 1},
		{Overconfident, "overconfident", 2},
		{Underconfident, "underconfident", 3},
		{TooFewFixes, "too_few_fixes", 4},
	}
	imuModeTable = [...]Label[IMUMode]{
		{IMUNone, "none", 1},
		{IMUAbsolute, "absolute", 2},
		{IMURotation, "rotation", 3},
	}
	robustTable = [...]Label[RobustLoss]{
		{RobustNone, "none", 1},
		{RobustHuber, "huber", 2},
		{RobustStudentT, "student_t", 3},
	}
)

// Each ...Labels function returns a copy of its table, so that no caller
// can change the labels another sees.

// VerdictLabels returns the label table of Verdict (wire enum Verdict).
func VerdictLabels() []Label[Verdict] { return slices.Clone(verdictTable[:]) }

// EventKindLabels returns the label table of EventKind (wire enum EventKind).
func EventKindLabels() []Label[EventKind] { return slices.Clone(eventTable[:]) }

// TrustReasonLabels returns the label table of the single reasons of
// TrustReason (wire enum DistrustReason).
func TrustReasonLabels() []Label[TrustReason] { return slices.Clone(trustTable[:]) }

// FixKindLabels returns the label table of FixKind (wire enum FixKind).
func FixKindLabels() []Label[FixKind] { return slices.Clone(fixKindTable[:]) }

// InputKindLabels returns the label table of InputKind (wire enum InputKind).
func InputKindLabels() []Label[InputKind] { return slices.Clone(inputKindTable[:]) }

// ConsistencyVerdictLabels returns the label table of ConsistencyVerdict
// (wire enum ConsistencyVerdict).
func ConsistencyVerdictLabels() []Label[ConsistencyVerdict] {
	return slices.Clone(consistencyTable[:])
}

// IMUModeLabels returns the label table of IMUMode (wire enum ImuMode); the
// labels are also the configuration file's spellings.
func IMUModeLabels() []Label[IMUMode] { return slices.Clone(imuModeTable[:]) }

// RobustLossLabels returns the label table of RobustLoss (wire enum
// RobustLoss); the labels are also the configuration file's spellings.
func RobustLossLabels() []Label[RobustLoss] { return slices.Clone(robustTable[:]) }

// labelOf returns v's row in table, or false.
func labelOf[T comparable](table []Label[T], v T) (Label[T], bool) {
	for _, l := range table {
		if l.Value == v {
			return l, true
		}
	}
	return Label[T]{}, false
}

// nameOf returns v's label, or "what(n)" for a value not in the table.
func nameOf[T comparable](table []Label[T], v T, what string, n uint64) string {
	if l, ok := labelOf(table, v); ok {
		return l.Name
	}
	return fmt.Sprintf("%s(%d)", what, n)
}

// ValueOfProto returns the table's value whose wire number is n, or false.
func ValueOfProto[T comparable](table []Label[T], n int32) (T, bool) {
	for _, l := range table {
		if l.Proto == n {
			return l.Value, true
		}
	}
	var zero T
	return zero, false
}

// ProtoOf returns v's wire number in table, or 0 (UNSPECIFIED) for a value
// not in it.
func ProtoOf[T comparable](table []Label[T], v T) int32 {
	l, _ := labelOf(table, v)
	return l.Proto
}

// String returns the verdict's label.
func (v Verdict) String() string { return nameOf(verdictTable[:], v, "verdict", uint64(v)) }

// String returns the event kind's label.
func (k EventKind) String() string { return nameOf(eventTable[:], k, "event", uint64(k)) }

// String returns the fix kind's label.
func (k FixKind) String() string { return nameOf(fixKindTable[:], k, "fix_kind", uint64(k)) }

// String returns the input kind's label.
func (k InputKind) String() string { return nameOf(inputKindTable[:], k, "input_kind", uint64(k)) }

// String returns the consistency verdict's label.
func (c ConsistencyVerdict) String() string {
	return nameOf(consistencyTable[:], c, "consistency", uint64(c))
}

// String returns the mode's label, as the configuration file spells it.
func (m IMUMode) String() string { return nameOf(imuModeTable[:], m, "imu_mode", uint64(m)) }

// String returns the robust loss's label, as the configuration file spells it.
func (l RobustLoss) String() string { return nameOf(robustTable[:], l, "robust", uint64(l)) }

// String lists the reasons' labels, comma separated ("trusted" for none).
func (t TrustReason) String() string {
	if t == 0 {
		return "trusted"
	}
	var parts []string
	for _, l := range trustTable {
		if t&l.Value != 0 {
			parts = append(parts, l.Name)
		}
	}
	if rest := t &^ allTrustReasons; rest != 0 {
		parts = append(parts, fmt.Sprintf("trust_reason(%#x)", uint16(rest)))
	}
	return strings.Join(parts, ",")
}

// allTrustReasons is the union of the defined reasons.
const allTrustReasons = TrustNoOdometry | TrustPositionUncertain | TrustHeadingUncertain | TrustInconsistent | TrustFixesRefused | TrustNumericalFault | TrustFixDisagrees | TrustIMUUnchanged | TrustMoveUnconfirmed
