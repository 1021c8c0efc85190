package fusion

import (
	"fmt"
	"strings"
)

// String names the kind.
func (k FixKind) String() string {
	switch k {
	case FixPose:
		return "pose"
	case FixPosition:
		return "position"
	case FixHeading:
		return "heading"
	case FixLandmark:
		return "landmark"
	}
	return fmt.Sprintf("fix_kind(%d)", uint8(k))
}

// String names the verdict.
func (v Verdict) String() string {
	switch v {
	case VerdictApplied:
		return "applied"
	case VerdictHeld:
		return "held"
	case VerdictGated:
		return "gated"
	case VerdictTooOld:
		return "too-old"
	case VerdictInvalid:
		return "invalid"
	}
	return fmt.Sprintf("verdict(%d)", uint8(v))
}

// String names the event kind.
func (k EventKind) String() string {
	switch k {
	case EventFixRefused:
		return "fix-refused"
	case EventSlipSuspected:
		return "slip-suspected"
	case EventOdometryGap:
		return "odometry-gap"
	case EventMoveRecovered:
		return "move-recovered"
	case EventTrustLost:
		return "trust-lost"
	case EventTrustRegained:
		return "trust-regained"
	case EventReseeded:
		return "reseeded"
	}
	return fmt.Sprintf("event(%d)", uint8(k))
}

var trustNames = []string{"no-odometry", "position-uncertain", "heading-uncertain", "inconsistent", "fixes-refused", "numerical-fault"}

// String lists the reasons, comma separated ("trusted" for none).
func (t TrustReason) String() string {
	if t == 0 {
		return "trusted"
	}
	var parts []string
	for i, n := range trustNames {
		if t&(1<<i) != 0 {
			parts = append(parts, n)
		}
	}
	return strings.Join(parts, ",")
}

// String names the mode as the configuration file spells it.
func (m IMUMode) String() string {
	switch m {
	case IMUNone:
		return "none"
	case IMUAbsolute:
		return "absolute"
	case IMURotation:
		return "rotation"
	}
	return fmt.Sprintf("imu_mode(%d)", uint8(m))
}
