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

// Gates holds a gate threshold per measurement dimension 1 to 3, computed
// once from a probability, so that gating allocates nothing.
type Gates [4]float64

// NewGates computes the thresholds at probability prob.
func NewGates(prob float64) (Gates, error) {
	var g Gates
	for d := 1; d <= 3; d++ {
		t, err := GateThreshold(prob, d)
		if err != nil {
			return g, err
		}
		g[d] = t
	}
	return g, nil
}

// For returns the threshold for a measurement of dimension d.
func (g *Gates) For(d int) float64 { return g[d] }
