package fusion

import (
	"math"

	"gonum.org/v1/gonum/integrate/quad"
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
	// Robust and RobustParameter are the sensor's configured robust
	// weighting and its parameter (Sensor.Robust, Sensor.RobustParameter;
	// RobustNone and 0 for the IMU). A Student-t sensor's record is judged
	// against its declared distribution (Consistency).
	Robust          RobustLoss
	RobustParameter float64
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
//
// A gated sensor configured with robust student_t declares heavier tails:
// its error is R^(1/2) z / sqrt(lambda), lambda ~ Gamma(nu/2, nu/2). Where R
// dominates the innovation covariance (sparse fixes), its NIS is that
// error's quadratic form in R^-1, d times an F(d, nu) variable (the
// multivariate t's quadratic form: S. Kotz and S. Nadarajah, Multivariate t
// Distributions and Their Applications, 2004, chapter 1, from memory). Its
// gate stays the chi-square one at q, so a consistent such sensor is gated
// with probability 1 - F_{d,nu}(q/d) (11.6% for d = 3, nu = 4 at p = 0.99,
// not 1%), and its applied NIS follow d F(d, nu) truncated at q
// (TruncatedF). The prior's Gaussian part of the innovation makes the true
// tail lighter than this limit, so for such a sensor the test errs towards
// not calling it overconfident for the tails it declared (and towards
// underconfident where the prior is not small). A Huber sensor keeps the
// Gaussian test: Huber's weight is a loss that bounds a large error's pull,
// not a distribution the sensor declares, and its covariance claims
// Gaussian errors within k standard deviations.
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
		var mu, sd float64
		if s.studentT() {
			mu, sd, _ = TruncatedF(int(d), s.RobustParameter, distuv.ChiSquared{K: d}.Quantile(p))
		} else {
			mu, sd = TruncatedChiSquare(int(d), p)
		}
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

// studentT tells whether the sensor declares Student-t errors.
func (s SensorStats) studentT() bool {
	return s.Robust == RobustStudentT && s.RobustParameter > 0 && !math.IsInf(s.RobustParameter, 0)
}

// maxFixDim is the largest dimension of a fix (a pose).
const maxFixDim = 3

// gatedProbability returns the probability that a fix of a consistent
// sensor is gated: 1 - GateProbability, or for a Student-t sensor 1 -
// F_{d,nu}(q/d) (Consistency). Its dimension d is that of its applied
// fixes (a sensor's kind fixes it); with none applied it is taken as
// maxFixDim, whose share is the largest.
func (s SensorStats) gatedProbability() float64 {
	p := s.GateProbability
	if !s.studentT() {
		return 1 - p
	}
	d := maxFixDim
	if s.Applied > 0 && s.DOFSum > 0 && s.DOFSum%int(s.Applied) == 0 {
		d = s.DOFSum / int(s.Applied)
	}
	q := distuv.ChiSquared{K: float64(d)}.Quantile(p)
	return distuv.F{D1: float64(d), D2: s.RobustParameter}.Survival(q / float64(d))
}

// TooManyGated reports whether the sensor's gated count is significantly
// above what its gate allows: P(X >= gated) < GatedSignificance for X
// binomial with the applied and gated fixes as trials and the probability
// of a consistent fix being gated (1 - GateProbability; for a Student-t
// sensor that of its declared distribution, Consistency) as the
// probability of each. An ungated sensor (GateProbability 1) never is.
func (s SensorStats) TooManyGated() bool {
	p := s.GateProbability
	if p <= 0 || p >= 1 || s.Gated == 0 {
		return false
	}
	b := distuv.Binomial{N: float64(s.Applied + s.Gated), P: s.gatedProbability()}
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

// truncatedFNodes is the number of Gauss-Legendre nodes of TruncatedF's
// integrals (TestTruncatedF checks them against a second method).
const truncatedFNodes = 200

// TruncatedF returns the mean and standard deviation of X = d F, F an F(d,
// nu) variable (the NIS of a d-dimensional Student-t error with nu degrees
// of freedom, Consistency), given that X lies below q, and pass = P(X < q).
// The moments are integrals of x and x^2 over X's density on [0, q] (gonum
// integrate/quad, Gauss-Legendre), in u = sqrt(x) so that the density's
// singularity at 0 for d = 1 goes; they are finite for every nu > 0.
func TruncatedF(d int, nu, q float64) (mean, sd, pass float64) {
	df := float64(d)
	f := distuv.F{D1: df, D2: nu}
	pass = f.CDF(q / df)
	// X's density is f(x/d)/d; with x = u^2, dx = 2u du.
	dens := func(u float64) float64 { return 2 * u * f.Prob(u*u/df) / df }
	m1 := quad.Fixed(func(u float64) float64 { return u * u * dens(u) }, 0, math.Sqrt(q), truncatedFNodes, nil, 0) / pass
	m2 := quad.Fixed(func(u float64) float64 { x := u * u; return x * x * dens(u) }, 0, math.Sqrt(q), truncatedFNodes, nil, 0) / pass
	return m1, math.Sqrt(math.Max(m2-m1*m1, 0)), pass
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

// sensor returns the index of the named sensor, adding it if new with the
// gate probability and robust weighting of its inputs.
func (s *statsState) sensor(id string, gateProbability float64, robust RobustLoss, robustParameter float64) int {
	if i, ok := s.find(id); ok {
		return i
	}
	s.index[id] = len(s.sensors)
	s.sensors = append(s.sensors, SensorStats{ID: id, GateProbability: gateProbability, Robust: robust, RobustParameter: robustParameter})
	s.last = len(s.sensors) - 1
	return s.last
}

// find returns the index of the named sensor's record, if it has one: the
// one found last without the map.
func (s *statsState) find(id string) (int, bool) {
	if i := s.last; i < len(s.sensors) && s.sensors[i].ID == id {
		return i, true
	}
	i, ok := s.index[id]
	if ok {
		s.last = i
	}
	return i, ok
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

// statsSensor returns the index of the named sensor's record (the IMU's
// for imuSensor), adding it if new with the gate probability of its inputs
// and its configured robust weighting, which is looked up only for a new
// record: a known one (at a robot's rates, the IMU's, found without a map
// lookup by statsState.find) costs no lookup of the configuration, a miss
// out of the cache at every IMU heading (BenchmarkRobotRates' profile,
// session 18).
func (r *Robot) statsSensor(id string, gateProbability float64) int {
	if i, ok := r.stats.find(id); ok {
		return i
	}
	robust, param := RobustNone, 0.0
	if si, ok := r.sensorIndex[id]; ok && id != imuSensor {
		robust, param = r.cfg.Sensors[si].Robust, r.cfg.Sensors[si].RobustParameter
	}
	return r.stats.sensor(id, gateProbability, robust, param)
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
