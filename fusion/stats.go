package fusion

import (
	"math"

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

// ConsistencyVerdict compares a sensor's record with what a consistent
// filter would show.
type ConsistencyVerdict uint8

const (
	// Consistent: the mean NIS lies inside the band and the sensor is not
	// gated more often than its gate allows.
	Consistent ConsistencyVerdict = iota + 1
	// Overconfident: the mean NIS is above the band, or the gate refused
	// significantly more fixes than its probability allows; the covariance
	// claims too much.
	Overconfident
	// Underconfident: the mean NIS is below the band (and the gate refused
	// no more than it should).
	Underconfident
	// TooFewFixes: fewer than five applied fixes, no verdict yet.
	TooFewFixes
)

// GatedSignificance is the significance of the one-sided binomial test of a
// sensor's gated count in Consistency: a consistent sensor is called
// overconfident for too many gated fixes with at most this probability.
const GatedSignificance = 0.001

// Consistency compares the sensor's mean NIS over applied fixes with its
// two-sided 95% band, and its gated count with its gate, and gives a
// verdict: Consistent, Overconfident (NIS too large, or too many fixes
// gated: the covariance claims too much), Underconfident or TooFewFixes
// (fewer than 5).
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
//
// The band alone points the wrong way for a sensor whose errors are larger
// than it claims: the gate refuses its large errors, and the applied ones,
// truncated, can average below the band. So a gated sensor is also tested on
// its gated count: of its applied and gated fixes, each is gated with
// probability 1 - p when the filter is consistent, so the count is binomial;
// when the probability of a count at least as large (gonum
// stat/distuv.Binomial) is below GatedSignificance, the sensor is
// overconfident whatever its applied NIS (one-sided binomial test, common
// practice).
func (s SensorStats) Consistency() (mean, lo, hi float64, verdict ConsistencyVerdict) {
	n := float64(s.Applied)
	if s.Applied < 5 || s.DOFSum == 0 {
		return 0, 0, 0, TooFewFixes
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
	case mean > hi || s.TooManyGated():
		verdict = Overconfident
	case mean < lo:
		verdict = Underconfident
	default:
		verdict = Consistent
	}
	return mean, lo, hi, verdict
}

// TooManyGated reports whether the sensor's gated count is significantly
// above what its gate allows: P(X >= gated) < GatedSignificance for X
// binomial with the applied and gated fixes as trials and 1 -
// GateProbability as the probability of each being gated. An ungated
// sensor (GateProbability 1) never is.
func (s SensorStats) TooManyGated() bool {
	p := s.GateProbability
	if p <= 0 || p >= 1 || s.Gated == 0 {
		return false
	}
	b := distuv.Binomial{N: float64(s.Applied + s.Gated), P: 1 - p}
	return b.Survival(float64(s.Gated)-1) < GatedSignificance
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
	// last is the index sensor returned last: a robot's IMU headings, most
	// of its measurements, are then found without the map (a miss out of
	// the cache at robot rates: BenchmarkRobotRates' profile). Checked
	// against sensors before use.
	last int
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
	if i := s.last; i < len(s.sensors) && s.sensors[i].ID == id {
		return i
	}
	if i, ok := s.index[id]; ok {
		s.last = i
		return i
	}
	s.index[id] = len(s.sensors)
	s.sensors = append(s.sensors, SensorStats{ID: id, GateProbability: gateProbability})
	s.last = len(s.sensors) - 1
	return s.last
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
