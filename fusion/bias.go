package fusion

import (
	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
)

// The bias test of the inconsistent reason (DEVELOPERS.md, "Design:
// Trust"). The NIS window tests the size of recent innovations; it misses
// an error that the filter's covariance does not allow for but each fix
// sees as small, such as 3 cm of sideways slip that a lateral wheel alone
// measured, under a camera of 3 cm: every fix's NIS is ordinary, yet the
// estimate stays several of its own standard deviations off for seconds.
// Such an error is a bias that all recent fixes share, so the test sums
// them: for applied fixes i with innovation v_i, innovation covariance S_i
// and Jacobian H_i in the pose (x, y, heading), the score
//
//	g = sum_i H_i^T S_i^-1 v_i,   I = sum_i H_i^T S_i^-1 H_i,
//
// is the gradient of the fixes' log-likelihood in a pose offset common to
// them, at zero offset. A consistent filter's innovations are white
// (Bar-Shalom, Li and Kirubarajan 2001, sec. 5.4.2), so g has covariance I,
// and g^T I^-1 g is chi-square with 3 degrees of freedom (Rao's score test
// for an offset, common practice). Over the last trust.nis_window applied
// fixes it raises inconsistent above the quantile at
// trust.consistency_probability and clears it at the median, like the NIS
// windows. Fixes of any kind add in, each through its own Jacobian, except
// those of a sensor with correlated errors (sensors[i].correlated_fraction):
// they share their error by design, so their scores are not independent,
// and with them the test called a correctly configured Gauss-Markov camera
// inconsistent on 85% of the samples (DEVELOPERS.md, "Design: Trust").

// biasWindow is a ring of recent fixes' scores and informations.
type biasWindow struct {
	score     [][3]float64
	info      [][9]float64
	pos, fill int
	raised    bool
	changed   bool
	hi, lo    float64 // the quantiles, once computed
}

func (w *biasWindow) init(n int) {
	w.score, w.info = make([][3]float64, n), make([][9]float64, n)
}

func (w *biasWindow) add(g [3]float64, info [9]float64) {
	if w.score == nil {
		return
	}
	w.score[w.pos], w.info[w.pos] = g, info
	w.pos = (w.pos + 1) % len(w.score)
	if w.fill < len(w.score) {
		w.fill++
	}
	w.changed = true
}

// check tests a full window, with hysteresis, at probability p.
func (w *biasWindow) check(p float64) bool {
	if !w.changed || w.fill < len(w.score) {
		return w.raised
	}
	w.changed = false
	if w.hi == 0 {
		c := distuv.ChiSquared{K: 3}
		w.hi, w.lo = c.Quantile(p), c.Quantile(0.5)
	}
	var g [3]float64
	var info [9]float64
	for i := range w.score {
		for k := range g {
			g[k] += w.score[i][k]
		}
		for k := range info {
			info[k] += w.info[i][k]
		}
	}
	t, ok := estimator.Mahalanobis(&g, &info)
	if !ok {
		// The fixes do not determine all of the pose (headings alone):
		// no verdict.
		return w.raised
	}
	w.raised = t > w.hi || (w.raised && t > w.lo)
	return w.raised
}

// fixApplied notes an applied fix (IMU headings excluded) at live entry
// at: its score and information go into the bias window, and the refused
// run, a numerical fault and a disagreement are over.
func (r *Robot) fixApplied(at int) {
	r.trust.noteApplied()
	e := &r.live()[at]
	if _, own := r.perLandmarkSensor(e); own || e.meas.Bias != [3]int{} || e.meas.LandmarkError != 0 || e.meas.LandmarkVar != 0 {
		// A correlated sensor's fixes share their error by design, so
		// their scores are not independent and their sum is no
		// chi-square; the offset the test looks for is what the sensor's
		// bias block models. Its fixes stay in the NIS window and the
		// gated count. So do those of a mapped landmark with survey
		// error, and of a sensor whose correlated part is per landmark:
		// every fix of the landmark shares it.
		return
	}
	g, info, ok := fixScore(&r.before(at).est, &e.meas)
	if ok {
		r.trust.bias.add(g, info)
	}
}

// fixScore returns H^T S^-1 v and H^T S^-1 H, pose block, of measurement m
// against the estimate st before it.
func fixScore(st *estimator.State, m *estimator.Measurement) (g [3]float64, info [9]float64, ok bool) {
	const k = estimator.MaxStates // stride of the work arrays
	n := st.Size()
	var x [k]float64
	var p [k * k]float64
	st.MeanInto(x[:n])
	st.CovarianceInto(p[:n*n])
	z, h, err := m.Predicted(x[:n])
	if err != nil {
		return g, info, false
	}
	d := m.Kind.Dim()
	// S (d x d), and beside it the right-hand sides: the pose columns of H,
	// then v; one solve makes S^-1 H (pose block) and S^-1 v.
	var s, rhs [k * k]float64
	for a := 0; a < d; a++ {
		v := m.Z[a] - z[a]
		if m.Kind.IsAngle(a) {
			v = estimator.Wrap(v)
		}
		for b := 0; b < d; b++ {
			sum := m.R[a*3+b]
			for i := 0; i < n; i++ {
				for j := 0; j < n; j++ {
					sum += h[a*n+i] * p[i*n+j] * h[b*n+j]
				}
			}
			s[a*k+b] = sum
		}
		for j := 0; j < 3; j++ {
			rhs[a*k+j] = h[a*n+j]
		}
		rhs[a*k+3] = v
	}
	if !estimator.SolveSPD(&s, d, &rhs, 4) {
		return g, info, false
	}
	for i := 0; i < 3; i++ {
		for a := 0; a < d; a++ {
			g[i] += h[a*n+i] * rhs[a*k+3]
			for j := 0; j < 3; j++ {
				info[i*3+j] += h[a*n+i] * rhs[a*k+j]
			}
		}
	}
	return g, info, true
}
