package fusion

import (
	"fmt"
	"math"
	"strings"

	"gonum.org/v1/gonum/stat/distuv"
)

// VerdictCounts counts inputs by verdict.
type VerdictCounts struct {
	Applied, Held, Gated, TooOld, Invalid uint64
}

func (c *VerdictCounts) add(v Verdict) {
	switch v {
	case VerdictApplied:
		c.Applied++
	case VerdictHeld:
		c.Held++
	case VerdictGated:
		c.Gated++
	case VerdictTooOld:
		c.TooOld++
	case VerdictInvalid:
		c.Invalid++
	}
}

// SensorStats is one sensor's consistency record. The IMU is "imu".
type SensorStats struct {
	ID string
	VerdictCounts
	// NISSum and DOFSum add the NIS and dimensions of applied fixes.
	NISSum float64
	DOFSum int
	// GateProbability is the gate its inputs passed (1: not gated).
	GateProbability float64
}

// Consistency compares the sensor's mean NIS over applied fixes with its
// two-sided 95% band and gives a verdict: "consistent", "overconfident"
// (NIS too large: the covariance claims too much), "underconfident" or
// "too few fixes" (fewer than 5).
//
// For an ungated sensor the sum of N NIS values of dimension d is
// chi-square with N*d degrees of freedom when the filter is consistent
// (Bar-Shalom, Li and Kirubarajan, 2001, section 5.4.2). A gated sensor's
// applied fixes are those below the gate q, so their NIS follows the
// chi-square truncated at q, whose mean and second moment are
// d F_{d+2}(q)/p and d(d+2) F_{d+4}(q)/p, with F_k the chi-square
// distribution function and p = F_d(q), from x f_k(x) = k f_{k+2}(x)
// (closed form, common practice); the band is then the normal approximation
// of the mean of N of them.
func (s SensorStats) Consistency() (mean, lo, hi float64, verdict string) {
	n := float64(s.Applied)
	if s.Applied < 5 || s.DOFSum == 0 {
		return 0, 0, 0, "too few fixes"
	}
	mean = s.NISSum / n
	p := s.GateProbability
	d := float64(s.DOFSum) / n
	if p <= 0 || p >= 1 || d != math.Trunc(d) {
		dist := distuv.ChiSquared{K: float64(s.DOFSum)}
		lo, hi = dist.Quantile(0.025)/n, dist.Quantile(0.975)/n
	} else {
		mu, sd := TruncatedChiSquare(int(d), p)
		lo, hi = mu-1.96*sd/math.Sqrt(n), mu+1.96*sd/math.Sqrt(n)
	}
	switch {
	case mean > hi:
		verdict = "overconfident"
	case mean < lo:
		verdict = "underconfident"
	default:
		verdict = "consistent"
	}
	return mean, lo, hi, verdict
}

// TruncatedChiSquare returns the mean and standard deviation of a
// chi-square variable with d degrees of freedom, given that it lies below
// its quantile at probability p (a fix that passed a gate at p).
func TruncatedChiSquare(d int, p float64) (mean, sd float64) {
	q := distuv.ChiSquared{K: float64(d)}.Quantile(p)
	m1 := float64(d) * distuv.ChiSquared{K: float64(d + 2)}.CDF(q) / p
	m2 := float64(d*(d+2)) * distuv.ChiSquared{K: float64(d + 4)}.CDF(q) / p
	return m1, math.Sqrt(math.Max(m2-m1*m1, 0))
}

// Stats is the robot's running statistics.
type Stats struct {
	// Odometry and Measurements count the inputs taken by their verdict on
	// arrival (held inputs are counted again when they are decided); inputs
	// refused by their checks are not taken and not counted.
	Odometry, Measurements  VerdictCounts
	Sensors                 []SensorStats
	Slips, Gaps, Recoveries uint64
	// Distrust is why the estimate is not to be trusted now (0: trusted).
	Distrust TrustReason
	// Held and WindowEntries are the sizes of the hold queue and the window.
	Held, WindowEntries int
}

type statsState struct {
	odo, meas               VerdictCounts
	sensors                 []SensorStats
	index                   map[string]int
	slips, gaps, recoveries uint64
}

func (s *statsState) init() { s.index = map[string]int{} }

func (s *statsState) count(v Verdict, odometry bool) {
	if odometry {
		s.odo.add(v)
	} else {
		s.meas.add(v)
	}
}

// sensor returns the index of the named sensor, adding it if new.
func (s *statsState) sensor(id string, gateProbability float64) int {
	if i, ok := s.index[id]; ok {
		return i
	}
	s.index[id] = len(s.sensors)
	s.sensors = append(s.sensors, SensorStats{ID: id, GateProbability: gateProbability})
	return len(s.sensors) - 1
}

func (s *statsState) sensorVerdict(i int, v Verdict, nis float64, dim int) {
	if i < 0 || i >= len(s.sensors) {
		return
	}
	ss := &s.sensors[i]
	ss.add(v)
	if v == VerdictApplied && dim > 0 {
		ss.NISSum += nis
		ss.DOFSum += dim
	}
}

// Stats returns a copy of the running statistics.
func (r *Robot) Stats() Stats {
	return Stats{
		Odometry:      r.stats.odo,
		Measurements:  r.stats.meas,
		Sensors:       append([]SensorStats(nil), r.stats.sensors...),
		Slips:         r.stats.slips,
		Gaps:          r.stats.gaps,
		Recoveries:    r.stats.recoveries,
		Distrust:      r.trust.reasons,
		Held:          len(r.held),
		WindowEntries: len(r.live()),
	}
}

// TrustReason is a set of reasons not to trust the estimate.
type TrustReason uint16

const (
	// TrustNoOdometry: no odometry has arrived yet.
	TrustNoOdometry TrustReason = 1 << iota
	// TrustPositionUncertain: the 95% position radius is above
	// trust.max_position95_m.
	TrustPositionUncertain
	// TrustHeadingUncertain: the heading standard deviation is above
	// trust.max_heading_std_rad.
	TrustHeadingUncertain
	// TrustInconsistent: the NIS sum of the last trust.nis_window applied
	// fixes, or of the last trust.nis_window IMU headings, rose above its
	// trust.consistency_probability chi-square quantile and has not yet
	// fallen back to its median: the covariance claims more than the
	// sensors bear out.
	TrustInconsistent
	// TrustFixesRefused: trust.refused_in_a_row fixes in a row were gated:
	// the robot may have been moved.
	TrustFixesRefused
	// TrustNumericalFault: the last update failed numerically.
	TrustNumericalFault
)

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

type trustState struct {
	reasons    TrustReason
	refusedRun int
	fault      bool

	// The NIS of recent applied fixes and, apart (they come ten times as
	// often and would fill one window), of recent IMU headings.
	fixes, imu nisWindow
}

// The IMU window holds imuWindowFactor times as many headings as the fix
// window holds fixes and tests at a false-alarm probability imuRateFactor
// times smaller, because IMU headings come about ten times as often (100 Hz
// against 10 Hz): that keeps its false alarms per second near the fix
// window's, while a heading jump (the robot turned by hand, a wheel
// slipping) still stands out of it at once (TestTrustInconsistent).
const (
	imuWindowFactor = 5
	imuRateFactor   = 10
)

// nisWindow is a ring of recent NIS values with their dimensions, and
// whether it has raised inconsistent.
type nisWindow struct {
	nis       []float64
	dims      []int
	pos, fill int
	raised    bool
	changed   bool           // since the last check
	bounds    map[int]bounds // by the window's total dimension
}

func (w *nisWindow) init(n int) {
	w.nis, w.dims = make([]float64, n), make([]int, n)
}

func (w *nisWindow) add(nis float64, dim int) {
	if w.nis == nil {
		return
	}
	w.nis[w.pos], w.dims[w.pos] = nis, dim
	w.pos = (w.pos + 1) % len(w.nis)
	if w.fill < len(w.nis) {
		w.fill++
	}
	w.changed = true
}

// bounds are the chi-square quantiles of a window's NIS sum: above hi it
// raises inconsistent, at or below lo (the median) it clears it.
type bounds struct{ hi, lo float64 }

// check tests a full window's sum against the chi-square quantile at p of
// its total dimension, with hysteresis: once raised, the window holds
// inconsistent until its sum is back to the median, so that the flag does
// not flap at the threshold.
func (w *nisWindow) check(p float64) bool {
	if !w.changed || w.fill < len(w.nis) {
		return w.raised
	}
	w.changed = false
	var sum float64
	var dof int
	for i := range w.nis {
		sum += w.nis[i]
		dof += w.dims[i]
	}
	q, ok := w.bounds[dof]
	if !ok {
		c := distuv.ChiSquared{K: float64(dof)}
		q = bounds{hi: c.Quantile(p), lo: c.Quantile(0.5)}
		if w.bounds == nil {
			w.bounds = map[int]bounds{}
		}
		w.bounds[dof] = q
	}
	w.raised = sum > q.hi || (w.raised && sum > q.lo)
	return w.raised
}

// evaluate recomputes the reasons and reports transitions as events.
func (t *trustState) evaluate(r *Robot, res *Result) {
	if t.fixes.nis == nil {
		t.fixes.init(r.cfg.Trust.NISWindow)
		t.imu.init(imuWindowFactor * r.cfg.Trust.NISWindow)
	}
	var now TrustReason
	st := r.f.State()
	if !r.started {
		now |= TrustNoOdometry
	}
	if st.Position95() > r.cfg.Trust.MaxPosition95M {
		now |= TrustPositionUncertain
	}
	if math.Sqrt(st.Var(2)) > r.cfg.Trust.MaxHeadingStdRad {
		now |= TrustHeadingUncertain
	}
	p := r.cfg.Trust.ConsistencyProbability
	if fix, imu := t.fixes.check(p), t.imu.check(1-(1-p)/imuRateFactor); fix || imu {
		now |= TrustInconsistent
	}
	if t.refusedRun >= r.cfg.Trust.RefusedInARow {
		now |= TrustFixesRefused
	}
	if t.fault {
		now |= TrustNumericalFault
	}
	stamp := r.newest
	switch {
	case now != 0 && t.reasons == 0:
		res.Events = append(res.Events, Event{Kind: EventTrustLost, StampNs: stamp, Detail: now.String()})
	case now == 0 && t.reasons != 0:
		res.Events = append(res.Events, Event{Kind: EventTrustRegained, StampNs: stamp})
	case now != t.reasons && now != 0:
		res.Events = append(res.Events, Event{Kind: EventTrustLost, StampNs: stamp, Detail: fmt.Sprintf("%s (was %s)", now, t.reasons)})
	}
	t.reasons = now
}
