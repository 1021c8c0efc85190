package fusion

import (
	"errors"
	"slices"

	"reckon.example/estimator"
)

// Refusal says why an input was not applied, as a value: what review,
// metrics and clients group refusals by, instead of cutting error text.
// A gated fix is not a refusal of this kind (its Verdict and NIS say it).
type Refusal uint8

// The refusals, from the error kinds of package fusion and estimator.
const (
	RefusalNone              Refusal = iota // applied, held or gated
	RefusalTooOld                           // ErrTooOld
	RefusalTimeBackwards                    // ErrTimeBackwards
	RefusalTooFarAhead                      // ErrTooFarAhead
	RefusalHeldFull                         // ErrHeldFull
	RefusalImplausibleMotion                // ErrAbsurdJump
	RefusalMalformed                        // ErrBadSample, non-finite values, bad covariances
	RefusalUnknownLandmark                  // ErrUnknownLandmark
	RefusalUnknownSensor                    // ErrUnknownSensor
	RefusalNotConfigured                    // ErrNoIMU: the configuration does not take the sample
	RefusalNumericalFault                   // an update the filter could not make (covariance not positive definite, degenerate)
	RefusalRunOutOfOrder                    // ErrRunOutOfOrder: a run start that does not start the next run
	RefusalRepeated                         // ErrRepeated: a reading sent again
)

var refusalTable = [...]Label[Refusal]{
	{RefusalTooOld, "too_old", 1},
	{RefusalTimeBackwards, "time_backwards", 2},
	{RefusalTooFarAhead, "too_far_ahead", 3},
	{RefusalHeldFull, "held_full", 4},
	{RefusalImplausibleMotion, "implausible_motion", 5},
	{RefusalMalformed, "malformed", 6},
	{RefusalUnknownLandmark, "unknown_landmark", 7},
	{RefusalUnknownSensor, "unknown_sensor", 8},
	{RefusalNotConfigured, "not_configured", 9},
	{RefusalNumericalFault, "numerical_fault", 10},
	{RefusalRunOutOfOrder, "run_out_of_order", 13},
	{RefusalRepeated, "repeated", 14},
}

// RefusalLabels returns the label table of refusals (a copy). The wire enum
// (reckon.v1.Refusal) has three more values that only the service gives:
// quarantined, not_journaled and limit.
func RefusalLabels() []Label[Refusal] { return slices.Clone(refusalTable[:]) }

// String returns the refusal's label.
func (r Refusal) String() string {
	if r == RefusalNone {
		return "none"
	}
	return nameOf(refusalTable[:], r, "refusal", uint64(r))
}

// RefusalOf returns the refusal an error of a Result or Resolution stands
// for (RefusalNone for nil).
func RefusalOf(err error) Refusal {
	switch {
	case err == nil:
		return RefusalNone
	case errors.Is(err, ErrTooOld):
		return RefusalTooOld
	case errors.Is(err, ErrTimeBackwards):
		return RefusalTimeBackwards
	case errors.Is(err, ErrTooFarAhead):
		return RefusalTooFarAhead
	case errors.Is(err, ErrHeldFull):
		return RefusalHeldFull
	case errors.Is(err, ErrAbsurdJump):
		return RefusalImplausibleMotion
	case errors.Is(err, ErrUnknownLandmark):
		return RefusalUnknownLandmark
	case errors.Is(err, ErrUnknownSensor):
		return RefusalUnknownSensor
	case errors.Is(err, ErrNoIMU):
		return RefusalNotConfigured
	case errors.Is(err, ErrRunOutOfOrder):
		return RefusalRunOutOfOrder
	case errors.Is(err, ErrRepeated):
		return RefusalRepeated
	case errors.Is(err, estimator.ErrNotPositiveDefinite) && !errors.Is(err, ErrBadSample),
		errors.Is(err, estimator.ErrDegenerate), errors.Is(err, estimator.ErrUnobservable):
		return RefusalNumericalFault
	}
	return RefusalMalformed
}
