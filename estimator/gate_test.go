package estimator

import (
	"math"
	"testing"
)

// TestGateThresholdTable checks the gate against the upper critical values
// of the chi-square distribution in the NIST/SEMATECH e-Handbook of
// Statistical Methods, section 1.3.6.7.4 (values from memory, three
// decimals as printed there).
func TestGateThresholdTable(t *testing.T) {
	cases := []struct {
		dof  int
		prob float64 // 1 - alpha, the table's upper-tail alpha
		want float64
	}{
		{1, 0.90, 2.706}, {1, 0.95, 3.841}, {1, 0.99, 6.635}, {1, 0.999, 10.828},
		{2, 0.90, 4.605}, {2, 0.95, 5.991}, {2, 0.99, 9.210}, {2, 0.999, 13.816},
		{3, 0.90, 6.251}, {3, 0.95, 7.815}, {3, 0.99, 11.345}, {3, 0.999, 16.266},
		{10, 0.95, 18.307}, {10, 0.05, 3.940},
	}
	for _, c := range cases {
		got, err := GateThreshold(c.prob, c.dof)
		if err != nil {
			t.Fatal(err)
		}
		if math.Abs(got-c.want) > 0.0006 {
			t.Errorf("chi-square %d dof at %v: %.4f, table %.3f", c.dof, c.prob, got, c.want)
		}
	}
	for _, bad := range []float64{0, 1, -0.5, math.NaN()} {
		if _, err := GateThreshold(bad, 1); err == nil {
			t.Errorf("probability %v accepted", bad)
		}
	}
}
