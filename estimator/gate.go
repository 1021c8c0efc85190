package estimator

import (
	"fmt"

	"gonum.org/v1/gonum/stat/distuv"
)

// GateThreshold returns the chi-square quantile for dof degrees of freedom at
// probability prob: a fix whose NIS exceeds it is gated. It uses gonum's
// stat/distuv, so the gate is exactly the published quantile.
func GateThreshold(prob float64, dof int) (float64, error) {
	if !(prob > 0 && prob < 1) {
		return 0, fmt.Errorf("gate probability %v is not inside (0, 1)", prob)
	}
	if dof < 1 {
		return 0, fmt.Errorf("gate with %d degrees of freedom", dof)
	}
	return distuv.ChiSquared{K: float64(dof)}.Quantile(prob), nil
}

// Gate decides whether a measurement may update the filter by its NIS: a
// gate that is on refuses a NIS above its threshold; one that is off (the
// zero value, NoGate) passes every NIS.
type Gate struct {
	threshold float64
	on        bool
}

// NoGate returns the gate that passes everything.
func NoGate() Gate { return Gate{} }

// GateAbove returns the gate that refuses a NIS above threshold.
func GateAbove(threshold float64) Gate { return Gate{threshold: threshold, on: true} }

// GateAt returns the gate at the chi-square quantile for dof degrees of
// freedom at probability prob (GateThreshold).
func GateAt(prob float64, dof int) (Gate, error) {
	t, err := GateThreshold(prob, dof)
	if err != nil {
		return Gate{}, err
	}
	return GateAbove(t), nil
}

// On reports whether the gate refuses anything.
func (g Gate) On() bool { return g.on }

// Threshold returns the largest NIS the gate passes (0 when it is off).
func (g Gate) Threshold() float64 { return g.threshold }

// Passes reports whether a measurement with this NIS may update the filter.
// A NaN NIS passes only a gate that is off.
func (g Gate) Passes(nis float64) bool { return !g.on || nis <= g.threshold }

// Gates holds a gate per measurement dimension 1 to 3, computed once from a
// probability, so that gating allocates nothing.
type Gates struct{ g [4]Gate }

// NewGates computes the gates at probability prob.
func NewGates(prob float64) (Gates, error) {
	var g Gates
	for d := 1; d <= 3; d++ {
		t, err := GateAt(prob, d)
		if err != nil {
			return g, err
		}
		g.g[d] = t
	}
	return g, nil
}

// For returns the gate for a measurement of dimension d (1 to 3).
func (g *Gates) For(d int) Gate { return g.g[d] }
