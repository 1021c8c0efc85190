package review

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distuv"
)

// TestEllipse95AgainstGonum: the track figure's 95% ellipse of a position
// covariance C = [a b; b c] is the contour e^T C^-1 e = q, q the 95%
// quantile of chi-square with 2 degrees of freedom (gonum stat/distuv),
// with semi-axes sqrt(q lambda) along C's eigenvectors (gonum mat
// EigenSym). Every point drawn lies on the contour, and the largest and
// smallest distances from the centre over the points equal the semi-axes
// (the points at 0 and 90 degrees of the parameter are the axes' ends).
// Covariances: axis-aligned with either axis the larger, isotropic,
// nearly isotropic, elongated up to 1e8 to 1, and seeded random ones.
// Tolerance 1e-6 relative: a drawing's, well above the rounding of the
// closed form's eigenvalues (about 1e-8 relative where they nearly meet).
func TestEllipse95AgainstGonum(t *testing.T) {
	q := distuv.ChiSquared{K: 2}.Quantile(0.95)
	covs := [][3]float64{
		{4e-4, 0, 1e-4}, {1e-4, 0, 4e-4}, {1e-3, 0, 1e-3}, {1e-3, 1e-12, 1e-3 + 1e-11},
		{1, 0.999999, 1}, {1e-2, 0, 1e-10}, {2.5e-3, -1e-3, 1e-3},
	}
	rng := rand.New(rand.NewPCG(5, 9))
	for range 200 {
		// C = R diag(l1, l2) R^T with l1, l2 log-uniform over 1e-8 to 1 m^2.
		l1, l2 := math.Pow(10, -8*rng.Float64()), math.Pow(10, -8*rng.Float64())
		s, c := math.Sincos(math.Pi * rng.Float64())
		covs = append(covs, [3]float64{c*c*l1 + s*s*l2, s * c * (l1 - l2), s*s*l1 + c*c*l2})
	}
	for _, cv := range covs {
		a, b, c := cv[0], cv[1], cv[2]
		const x0, y0 = 3.5, -1.25
		cm := mat.NewSymDense(2, []float64{a, b, b, c})
		var eig mat.EigenSym
		if !eig.Factorize(cm, false) {
			t.Fatalf("gonum EigenSym of %v failed", cv)
		}
		ev := eig.Values(nil) // ascending
		rMin, rMax := math.Sqrt(q*ev[0]), math.Sqrt(q*ev[1])
		var inv mat.Dense
		if err := inv.Inverse(cm); err != nil {
			t.Fatalf("gonum Inverse of %v: %v", cv, err)
		}
		lo, hi := math.Inf(1), 0.0
		for i, p := range ellipse95(x0, y0, a, b, c) {
			e := mat.NewVecDense(2, []float64{p.X - x0, p.Y - y0})
			m := mat.Inner(e, &inv, e)
			if math.Abs(m-q) > 1e-6*q {
				t.Errorf("C %v: point %d at Mahalanobis squared %.9g, want %.9g", cv, i, m, q)
				break
			}
			d := math.Hypot(p.X-x0, p.Y-y0)
			lo, hi = math.Min(lo, d), math.Max(hi, d)
		}
		if math.Abs(hi-rMax) > 1e-6*rMax || math.Abs(lo-rMin) > 1e-6*rMax {
			t.Errorf("C %v: distances from the centre %.9g to %.9g, semi-axes %.9g and %.9g", cv, lo, hi, rMin, rMax)
		}
	}
}
