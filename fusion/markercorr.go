package fusion

import (
	"math"
	"slices"

	"reckon.example/estimator"
)

// Per-landmark correlated errors (DEVELOPERS.md, "Design: Sensors"). A
// landmark sensor with correlated_per_landmark set has no bias block: the
// correlated share f of its covariance is each landmark's own, a
// first-order Gauss-Markov process per landmark (a marker's error follows
// its viewing geometry, which holds while it is in view), independent
// from landmark to landmark. Without a state for it, a fix's error is
// taken at its full covariance, (1 - f) R + f C, for its NIS and its gate
// (its marginal distribution), and its correlated share is inflated for
// the gain by the AR(1) factor
//
//	k = (1 + rho) / (1 - rho),   rho = exp(-dt / tau),
//
// dt the time since the same sensor's last fix (applied or refused; not
// one whose update failed) of the same
// landmark (k = 1 for the first, or after more than repeatHorizonTaus
// correlation times). This is the information of correlated observations
// counted as the equivalent number of independent ones (from memory: the
// AR(1) precision matrix, tridiagonal with 1 and 1 + rho^2 on its
// diagonal and -rho beside it over s^2 (1 - rho^2), sums to
// (n (1 - rho) + 2 rho) / ((1 + rho) s^2) for n observations of one
// constant; the first at weight 1 and each next at (1 - rho) / (1 + rho)
// is exactly that). It is the weighting that measurement differencing
// gives (A. E. Bryson and L. J. Henrikson, "Estimation using sampled data
// containing sequentially correlated noise", J. Spacecraft and Rockets
// 5(6), 1968; Gelb, Applied Optimal Estimation, 1974, sec. 4.5, from
// memory): z_k - rho z_{k-1} has white noise of (1 - rho^2) f C and
// measures (1 - rho) of the pose. Differencing itself needs the previous
// fix of the same quantity at the filter's hand, which late fixes of
// changing landmarks do not give; the factor needs only its stamp.
// TestRepeatFactorInformation checks it against that closed form. The
// filter's estimate is not the least-squares one, though, and the Joseph
// form cannot see that the prior error shares the fix's correlated error;
// with a correlated share above the white one its covariance came out
// below the error's, so the gain's white share is raised to the
// correlated one's (whiteRaise; TestRepeatCovarianceHonest).

// repeatHorizonTaus is how many correlation times back the previous fix of
// a landmark is looked for: beyond, rho is below 0.25% and k below
// 1.005, taken as 1.
const repeatHorizonTaus = 6

// maxRepeatFactor bounds k: two fixes of one landmark at one stamp (rho 1)
// repeat their correlated share entirely.
const maxRepeatFactor = 1e4

// markTable keeps, for the landmarks of per-landmark sensors whose fixes
// were folded into the base checkpoint (dropFront), the stamp of each
// one's last fix (applied or refused): a fix whose previous fix of its landmark has
// left the window finds it here, so that a replay after a late fix
// weighs it as the first pass did. sensor is the configuration's index,
// lm the landmark's (from 1). An entry stays while a fix in the window
// may still look it up (within repeatHorizonTaus of the base), so the
// table holds at most one entry per configured landmark and per-landmark
// sensor, however many landmarks a frame holds (bounded at 8 entries, a
// camera seeing more landmarks in a frame lost some, and a replay
// weighed their next fixes as first ones: TestManyLandmarksLateEqualsStampOrder).
// In the snapshot (version 21).
type markTable []markEntry

type markEntry struct {
	lm, sensor int32
	last       int64
}

// note records a fix (applied or refused) of landmark lm by sensor si at t.
func (m *markTable) note(si, lm int32, t int64) {
	for i := range *m {
		if e := &(*m)[i]; e.lm == lm && e.sensor == si {
			e.last = max(e.last, t)
			return
		}
	}
	*m = append(*m, markEntry{lm: lm, sensor: si, last: t})
}

// prune drops the entries that no fix stamped at or after base can look
// up: those older than the horizon of their sensor (cfg's).
func (m *markTable) prune(cfg *Config, base int64) {
	*m = slices.DeleteFunc(*m, func(e markEntry) bool {
		return e.last < base-repeatHorizon(&cfg.Sensors[e.sensor])
	})
}

// lookup returns the stamp of the last fix (applied or refused) of landmark lm by
// sensor si in the table.
func (m markTable) lookup(si, lm int32) (int64, bool) {
	for i := range m {
		if m[i].lm == lm && m[i].sensor == si {
			return m[i].last, true
		}
	}
	return 0, false
}

// repeatHorizon is how far back, in nanoseconds, the previous fix of a
// landmark of per-landmark sensor s is looked for: repeatHorizonTaus
// correlation times, at most a century (a longer correlation time is a
// constant error; the conversion stays inside int64).
func repeatHorizon(s *Sensor) int64 {
	return int64(min(repeatHorizonTaus*s.CorrelationTimeS, 100*365.25*86400) * 1e9)
}

// perLandmark reports whether the sensor's correlated part is per
// landmark.
func (s *Sensor) perLandmark() bool {
	return s.CorrelatedPerLandmark && s.Kind == FixLandmark && s.CorrelatedFraction > 0
}

// perLandmarkSensor returns the configuration index of the sensor of
// measurement entry e when it is a landmark fix of a per-landmark sensor.
func (r *Robot) perLandmarkSensor(e *entry) (int, bool) {
	if !r.lmCorr || e.lm == 0 || e.imu || e.kind != entMeas {
		return 0, false
	}
	si, ok := r.sensorIndex[r.stats.sensors[e.sensor].ID]
	return si, ok && r.cfg.Sensors[si].perLandmark()
}

// correlatedShare writes f C of sensor s for the components of kind into
// out (stride 3), times k.
func (s *Sensor) correlatedShare(kind estimator.Kind, k float64, out *[9]float64) {
	d := kind.Dim()
	comps := [3]int{0, 1, 2}
	if kind == estimator.KindBearing {
		comps[0] = 1
	}
	full := fixDim(s.Kind)
	for i := 0; i < d; i++ {
		for j := 0; j < d; j++ {
			out[i*3+j] = k * s.CorrelatedFraction * s.Cov[comps[i]*full+comps[j]]
		}
	}
}

// repeatExtra returns, for a fix entry e of a per-landmark sensor, the
// covariance its update adds for the gain and the Joseph form: (k - 1) f
// C, and the part of f C that its white share (1 - f) R lacks (whiteRaise;
// none when f is at most a half and the fix has the sensor's covariance),
// and whether there is any.
func (r *Robot) repeatExtra(e *entry) (extra [9]float64, ok bool) {
	si, ok := r.perLandmarkSensor(e)
	if !ok {
		return extra, false
	}
	s := &r.cfg.Sensors[si]
	var fc [9]float64
	s.correlatedShare(e.meas.Kind, 1, &fc)
	extra = whiteRaise(e.meas.Kind.Dim(), &e.meas.R, &fc)
	if prev, found := r.previousFix(e, int32(si), repeatHorizon(s)); found {
		rho := math.Exp(-float64(e.t1-prev) * 1e-9 / s.CorrelationTimeS)
		k := maxRepeatFactor
		if rho < 1 {
			k = min((1+rho)/(1-rho), maxRepeatFactor)
		}
		for i := range extra {
			extra[i] += (k - 1) * fc[i]
		}
	}
	return extra, extra != [9]float64{}
}

// whiteRaise returns the positive part of f C - W (d square, stride 3),
// W = R - f C the white share of a fix's covariance R, its correlated
// share f C: what raises W to a covariance at least f C (and at least W)
// for the gain. The gain weighs the fix as if its noise were white share
// plus an AR(1) correlated share, which it is, but the prior error
// already holds part of the landmark's correlated error through its
// earlier fixes, and the Joseph form, which takes the fix's noise as
// independent of the prior error, leaves that part out: with a
// correlated share above the white one the covariance came out below the
// true error's (a landmark fixed 40 times 0.05 s apart, tau 1.5 s, f
// 0.999: mean NEES of x 1.24; TestRepeatCovarianceHonest). A white share
// at least the correlated one is never below it (a scalar analysis over
// random priors, process noise, spacings and counts: two fixes with
// equal shares exactly, more fixes on the safe side), and a model whose
// white share is raised has more noise than the truth, so the filter's
// fixed-gain covariance bounds the true error's (the error of a linear
// estimate is linear in the noise's covariance). The cost: a landmark's
// first fix at f 1 counts at half its information, and a sensor whose
// correlated share is at most half loses nothing.
func whiteRaise(d int, R, fc *[9]float64) (out [9]float64) {
	// M = f C - W = 2 f C - R.
	var m [3]float64 // m00, m01, m11
	m[0] = 2*fc[0] - R[0]
	if d == 1 {
		out[0] = max(m[0], 0)
		return out
	}
	m[1] = (2*fc[1] - R[1] + 2*fc[3] - R[3]) / 2
	m[2] = 2*fc[4] - R[4]
	// Eigenvalues of the symmetric 2x2 M; its positive part is M when
	// both are >= 0, 0 when neither is, else l1 / (l1 - l2) (M - l2 I).
	h, g := (m[0]+m[2])/2, math.Hypot((m[0]-m[2])/2, m[1])
	l1, l2 := h+g, h-g
	switch {
	case l2 >= 0:
		out[0], out[1], out[3], out[4] = m[0], m[1], m[1], m[2]
	case l1 > 0:
		c := l1 / (l1 - l2)
		out[0], out[1], out[3], out[4] = c*(m[0]-l2), c*m[1], c*m[1], c*(m[2]-l2)
	}
	return out
}

// previousFix returns the stamp of the last fix (applied or refused, not
// failed) before e (in the
// window's order) of e's landmark by e's sensor (configuration index si),
// within horizon of e's stamp: from the window, else from the base's
// markTable.
func (r *Robot) previousFix(e *entry, si int32, horizon int64) (int64, bool) {
	live := r.live()
	i := r.locate(e.t1) - 1
	// Entries at e's stamp after it have not been applied in this pass.
	for i >= 0 && live[i].t1 == e.t1 && &live[i] != e {
		i--
	}
	if i >= 0 && &live[i] == e {
		i--
	}
	from := e.t1 - horizon
	for ; i >= 0 && live[i].t1 >= from; i-- {
		p := &live[i]
		if p.kind == entMeas && p.lm == e.lm && p.sensor == e.sensor && !p.imu && !p.failed {
			return p.t1, true
		}
	}
	if i >= 0 {
		return 0, false // the window reaches past the horizon
	}
	if t, ok := r.marks.lookup(si, e.lm); ok && t >= from && t <= e.t1 {
		return t, true
	}
	return 0, false
}

// foldMarks notes the fixes (applied or refused, not failed) of
// per-landmark sensors among the
// entries about to be folded into the base.
func (r *Robot) foldMarks(dropped []entry) {
	if !r.lmCorr {
		return
	}
	for i := range dropped {
		e := &dropped[i]
		if e.failed {
			continue
		}
		if si, ok := r.perLandmarkSensor(e); ok {
			r.marks.note(int32(si), e.lm, e.t1)
		}
	}
	if len(dropped) > 0 {
		r.marks.prune(&r.cfg, dropped[len(dropped)-1].t1)
	}
}

// setCorr marks c a fix of per-landmark sensor si (configuration index).
func (c *candidate) setCorr(cfg *Config, si int) {
	s := &cfg.Sensors[si]
	c.corrSensor = int32(si) + 1
	for k := range c.corr {
		c.corr[k] = s.CorrelatedFraction * s.Cov[k]
	}
}

// sharedWith returns the covariance that relocation gives components p of
// c's error and q of b's, both landmark candidates: a per-landmark
// sensor's correlated share, f C, between fixes of one sensor, as the
// bias block of a shared correlated error gives it (foldBias, and
// jointEquations' cross terms), so that relocation weighs them as it did
// before the option; 0 otherwise.
func (c *candidate) sharedWith(b *candidate, p, q int) float64 {
	if c.corrSensor == 0 || c.corrSensor != b.corrSensor {
		return 0
	}
	if c.meas.Kind == estimator.KindBearing {
		p = 1
	}
	if b.meas.Kind == estimator.KindBearing {
		q = 1
	}
	return c.corr[p*2+q]
}
