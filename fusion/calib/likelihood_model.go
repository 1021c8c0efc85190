package calib

import (
	"fmt"
	"math"
	"slices"
	"strconv"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// This file chooses the form of a configuration's noise model before its
// levels are fitted: per sensor whether its errors have a Gauss-Markov
// part and heavy (Student-t) tails, and for body steps whether their noise
// grows per metre and radian or per second. A configuration a user writes
// first is white and Gaussian, and a level the configuration does not have
// cannot be fitted. DEVELOPERS.md, "Design: Noise by likelihood".

// ModelChange is one change of a configuration's noise model that the
// fit chose, as the configuration field, its old and new value.
type ModelChange struct {
	Field, From, To string
}

// modelCandidateTau and the fractions are the starting points of a
// correlated sensor model: the fit then tunes the time constant; the
// fraction is chosen among modelFractions. Real cameras' errors correlate
// over 1 to 3 s (common practice).
const modelCandidateTau = 2.0

var modelFractions = []float64{0.5, 0.9}

// modelCandidateDOF is the degrees of freedom a Student-t candidate starts
// from (real cameras' errors: 3 to 5, common practice); the fit then tunes
// them.
const modelCandidateDOF = 4.0

// aicPenalty is what each extra parameter of a candidate model costs in
// log-likelihood: Akaike's criterion (H. Akaike, IEEE Trans. Automatic
// Control 19(6), 1974) in units of the log-likelihood, half of its 2 per
// parameter on the -2 log L scale.
const aicPenalty = 1.0

// chooseModel returns cfg with the noise model the run supports best,
// each candidate judged by its log-likelihood at its best covariance
// factor (a profile likelihood over that factor) less aicPenalty per extra
// parameter, over the same innovations (the fixes screened once at cfg).
// Sensors already correlated or robust are left as they are; so is a
// Huber sensor, whose loss is no density. Body steps (no wheels) switch
// from per metre and radian to per second when that is better, the
// per-second terms set to the per-metre ones at the run's mean speed and
// turn rate, the per-metre ones to a negligible 1e-12. It also returns
// the fixes its screen left out (gross errors, metres off: a marker taken
// for another), which the level fit leaves out too, Student-t or not: a
// Student-t fitted to them goes below 2 degrees of freedom, to tails the
// sensor's own errors do not have, and the filter's gate refuses them
// anyway.
func chooseModel(cfg fusion.Config, inputs []RecordedInput) (fusion.Config, []ModelChange, []bool, int, error) {
	cfg = withDefaults(cfg)
	p := newReplayer(cfg, inputs, nil)
	if _, err := p.screen(nil); err != nil {
		return cfg, nil, nil, 1, err
	}
	replays := 1
	var changes []ModelChange
	if cfg.IMU == fusion.IMUAbsolute && cfg.IMULatencyNs == 0 && hasHeadings(inputs) {
		// An IMU stamped after its reading lags every turn (imu_latency_ns;
		// DEVELOPERS.md, "Design: Gating and recovery"). First, before the gyro's scale
		// below: a lag's heading errors grow with the turn too.
		lat, n := p.imuLatency(cfg)
		replays += n
		if lat > 0 {
			cfg.IMULatencyNs = lat
			changes = append(changes, ModelChange{"imu_latency_ns", "0", strconv.FormatInt(lat, 10)})
		}
	}
	for i := range cfg.Sensors {
		s := cfg.Sensors[i]
		if s.CorrelatedFraction > 0 || s.Robust != fusion.RobustNone {
			continue
		}
		best, bestLL := s, math.Inf(-1)
		for _, cand := range sensorCandidates(s) {
			c := cfg
			c.Sensors = append([]fusion.Sensor(nil), cfg.Sensors...)
			c.Sensors[i] = cand.s
			ll, k, n := p.profile(c, i)
			replays += n
			if ll -= aicPenalty * float64(cand.extra); ll > bestLL {
				best, bestLL = cand.s, ll
				best.Cov = scaled(cand.s.Cov, k)
			}
		}
		if best.CorrelatedFraction != s.CorrelatedFraction {
			f := fmt.Sprintf("sensors[%d]", i)
			changes = append(changes,
				ModelChange{f + ".correlated_fraction", "0", g(best.CorrelatedFraction)},
				ModelChange{f + ".correlation_time_s", g(s.CorrelationTimeS), g(best.CorrelationTimeS)})
		}
		if best.Robust != s.Robust {
			f := fmt.Sprintf("sensors[%d]", i)
			changes = append(changes, ModelChange{f + ".robust", "none", "student_t"},
				ModelChange{f + ".robust_parameter", g(s.RobustParameter), g(best.RobustParameter)})
		}
		// best.Cov is the profiled covariance: the level fit starts its
		// factor there, where the other levels' curvature shows.
		cfg.Sensors = append([]fusion.Sensor(nil), cfg.Sensors...)
		cfg.Sensors[i] = best
	}
	if cfg.LandmarkPositionStdM == 0 && landmarkSensor(&cfg) && !ownSurvey(&cfg) {
		// A marker map is surveyed ("Design: Landmark survey error"):
		// markers 1 cm, 3 cm or 10 cm off, where the state has room
		// for landmark blocks.
		ll0 := p.configLogLik(cfg, nil)
		best, bestLL := 0.0, ll0
		for _, sd := range surveyCandidates {
			c := cfg
			c.LandmarkPositionStdM = sd
			if c.Validate() != nil {
				break
			}
			replays++
			if ll := p.configLogLik(c, nil) - aicPenalty; ll > bestLL {
				best, bestLL = sd, ll
			}
		}
		replays++
		if best > 0 {
			cfg.LandmarkPositionStdM = best
			changes = append(changes, ModelChange{"landmark_position_std_m", "0", g(best)})
		}
	}
	if cfg.IMU == fusion.IMUAbsolute && cfg.Noise.IMUOffsetVarRad2PerRad == 0 && cfg.Calibration.GyroScaleStd == 0 {
		// A gyro's scale error moves its heading's zero with every turn:
		// the walk of a gyro 0.1%, 0.3% or 1% off in scale
		// (noise.imu_offset_var_rad2_per_rad, "Design: Process noise"),
		// or the gyro scale state at a prior of 1% or 3%
		// (calibration.gyro_scale_std, "Design: State") where the state
		// has room, at the covariances the sensors' choice above left;
		// each one parameter more. A configuration with the state models
		// the error already and is left alone.
		ll0 := p.configLogLik(cfg, nil)
		best, bestLL := cfg, ll0
		var change *ModelChange
		try := func(c fusion.Config, ch ModelChange) {
			replays++
			if ll := p.configLogLik(c, nil) - aicPenalty; ll > bestLL {
				best, bestLL, change = c, ll, &ch
			}
		}
		for _, q := range gyroScaleCandidates {
			c := cfg
			c.Noise.IMUOffsetVarRad2PerRad = q
			try(c, ModelChange{"noise.imu_offset_var_rad2_per_rad", "0", g(q)})
		}
		for _, sd := range gyroStateCandidates {
			c := cfg
			c.Calibration.GyroScaleStd = sd
			if !gyroStateFits(cfg, c) {
				break
			}
			try(c, ModelChange{"calibration.gyro_scale_std", "0", g(sd)})
		}
		replays++
		if change != nil {
			cfg = best
			changes = append(changes, *change)
		}
	}
	if len(cfg.Wheels) == 0 {
		n := &cfg.Noise
		if n.StepForwardVarM2PerS == 0 && n.StepLeftVarM2PerS == 0 && n.StepTurnVarRad2PerS == 0 {
			perS := perSecondSteps(cfg, inputs)
			ll0, _, n0 := p.profile(cfg, -1)
			llS, _, n1 := p.profile(perS, -1)
			replays += n0 + n1
			if llS > ll0 {
				for _, f := range []struct {
					name     string
					from, to float64
				}{
					{"noise.step_forward_var_m2_per_m", n.StepForwardVarM2PerM, perS.Noise.StepForwardVarM2PerM},
					{"noise.step_left_var_m2_per_m", n.StepLeftVarM2PerM, perS.Noise.StepLeftVarM2PerM},
					{"noise.step_turn_var_rad2_per_rad", n.StepTurnVarRad2PerRad, perS.Noise.StepTurnVarRad2PerRad},
					{"noise.step_forward_var_m2_per_s", 0, perS.Noise.StepForwardVarM2PerS},
					{"noise.step_left_var_m2_per_s", 0, perS.Noise.StepLeftVarM2PerS},
					{"noise.step_turn_var_rad2_per_s", 0, perS.Noise.StepTurnVarRad2PerS},
				} {
					changes = append(changes, ModelChange{f.name, g(f.from), g(f.to)})
				}
				cfg = perS
			}
		}
	}
	return cfg, changes, p.skip, replays, nil
}

// latencyCandidates are the IMU latencies the model choice tries first,
// nanoseconds: serial IMUs stamped on arrival lag 5 to 50 ms (common
// practice), a filtered or buffered one more.
var latencyCandidates = []int64{0, 10e6, 20e6, 40e6, 80e6, 160e6, 320e6}

// latencyStepNs is the finest step of the IMU latency's search: a
// latency 5 ms off errs by 7.5 mrad in a turn at 1.5 rad/s, about a MEMS
// IMU's heading noise.
const latencyStepNs = 5e6

// latencyGain is the log-likelihood a latency must gain over none to be
// chosen: half the chi-square quantile of one degree of freedom at 0.999,
// 10.828 (the likelihood ratio test; Wilks 1938; TestIMULatencyChoice
// checks it against gonum's distuv), not Akaike's 1. The latency is
// the best of a dozen on a grid, which Akaike's penalty of one parameter
// does not pay for: with markers 3 cm off a map taken as exact, it chose
// 10 ms (a gain of 1.3) for an IMU stamped when read (TestSurveyErrorFit).
// An IMU 10 ms late gains about 68 on two minutes of the simulator's
// greenhouse cart.
const latencyGain = 10.828 / 2

// imuLatency returns the IMU latency the run's likelihood supports, 0 when
// none beats no latency by latencyGain, and the replays it took.
// The likelihood in the latency is peaked at the truth but not smooth: on
// the simulator's runs it has a sawtooth of the odometry's 5 ms period on
// a broad envelope (TestIMULatencyChoice), so that a parabola through
// three points can miss the peak; the search is a grid. After the
// candidates it looks between the best one's neighbours, halfway to each,
// at steps of latencyStepNs or a sixteenth of that span.
func (p *replayer) imuLatency(cfg fusion.Config) (int64, int) {
	ll := func(lat int64) float64 {
		c := cfg
		c.IMULatencyNs = lat
		return p.configLogLik(c, nil)
	}
	lls := make([]float64, len(latencyCandidates))
	best := 0
	for i, lat := range latencyCandidates {
		lls[i] = ll(lat)
		if lls[i] > lls[best] {
			best = i
		}
	}
	replays := len(latencyCandidates)
	bestLat, bestLL := latencyCandidates[best], lls[best]
	lo, hi := bestLat, bestLat
	if best > 0 {
		lo = bestLat - (bestLat-latencyCandidates[best-1])/2
	}
	if best+1 < len(latencyCandidates) {
		hi = bestLat + (latencyCandidates[best+1]-bestLat)/2
	}
	step := max(int64(latencyStepNs), (hi-lo)/16)
	for lat := lo; lat <= hi; lat += step {
		if slices.Contains(latencyCandidates, lat) { // evaluated above
			continue
		}
		replays++
		if v := ll(lat); v > bestLL {
			bestLat, bestLL = lat, v
		}
	}
	if bestLat == 0 || bestLL-latencyGain <= lls[0] {
		return 0, replays
	}
	return bestLat, replays
}

// hasHeadings reports whether the run has absolute IMU headings.
func hasHeadings(inputs []RecordedInput) bool {
	for i := range inputs {
		if inputs[i].Heading != nil {
			return true
		}
	}
	return false
}

func g(v float64) string { return strconv.FormatFloat(v, 'g', 4, 64) }

// gyroScaleCandidates are the IMU offset's walks per radian chooseModel
// tries: f^2 for gyros 0.1%, 0.3% and 1% off in scale (common practice:
// an uncalibrated MEMS gyro's scale is within 1% to 3%, a calibrated one's
// within a few tenths of a percent).
var gyroScaleCandidates = []float64{1e-6, 1e-5, 1e-4}

// gyroStateFits reports whether with, cfg with a gyro scale state, makes
// a robot with as many landmark blocks as cfg: the state has room, and
// takes none of the blocks, which take what is left of the state
// (README: on the orchard carrier, left one block instead of two, the
// estimate was trusted outside its 99.9% region on 3.7% of samples,
// against 0.08% with the walk per radian).
func gyroStateFits(cfg, with fusion.Config) bool {
	a, err := fusion.New(cfg)
	if err != nil {
		return false
	}
	b, err := fusion.New(with)
	if err != nil {
		return false
	}
	return landmarkBlocks(a.Layout()) == landmarkBlocks(b.Layout())
}

func landmarkBlocks(l *estimator.Layout) int {
	n := 0
	for k := range l.Biases() {
		if l.IsLandmark(k) {
			n++
		}
	}
	return n
}

// gyroStateCandidates are the gyro scale state's prior standard deviations
// chooseModel tries: a gyro off by up to 1% (a datasheet's figure for a
// calibrated part) or 3% (an uncalibrated MEMS gyro, from memory).
var gyroStateCandidates = []float64{0.01, 0.03}

// surveyCandidates are the survey errors of a marker map the model choice
// tries, metres.
var surveyCandidates = []float64{0.01, 0.03, 0.1}

// ownSurvey reports whether a landmark of c declares its own survey error:
// the map is then described already.
func ownSurvey(c *fusion.Config) bool {
	for i := range c.Landmarks {
		if c.Landmarks[i].PositionStdM > 0 {
			return true
		}
	}
	return false
}

// configLogLik is the log-likelihood of the run's innovations under cfg,
// each sensor i's covariance taken scale[i] times as the fixes carry it
// (nil: as they carry it), at the fit's gate (-inf if the replay fails).
func (p *replayer) configLogLik(cfg fusion.Config, scale []float64) float64 {
	if scale == nil {
		scale = make([]float64, len(cfg.Sensors))
		for j := range scale {
			scale[j] = 1
		}
	}
	cfg.GateProbability = fitGateProbability
	var sum float64
	if err := p.runConfig(cfg, scale, func(in *fusion.Innovation, nu float64) {
		sum += innovationLogLik(in.Outcome.NIS, in.Outcome.LogDetS, in.Outcome.Dim, nu)
	}); err != nil {
		return math.Inf(-1)
	}
	return sum
}

func scaled(cov []float64, k float64) []float64 {
	out := make([]float64, len(cov))
	for i, c := range cov {
		out[i] = c * k
	}
	return out
}

type sensorCandidate struct {
	s     fusion.Sensor
	extra int // parameters beyond the white Gaussian model's
}

// sensorCandidates are s as configured (white, Gaussian) and with a
// Gauss-Markov part of each of modelFractions, Student-t tails, and both.
func sensorCandidates(s fusion.Sensor) []sensorCandidate {
	out := []sensorCandidate{{s, 0}}
	t := s
	t.Robust, t.RobustParameter = fusion.RobustStudentT, modelCandidateDOF
	out = append(out, sensorCandidate{t, 1})
	for _, f := range modelFractions {
		for _, base := range []sensorCandidate{{s, 0}, {t, 1}} {
			c := base.s
			c.CorrelatedFraction, c.CorrelationTimeS = f, modelCandidateTau
			out = append(out, sensorCandidate{c, base.extra + 2})
		}
	}
	return out
}

// perSecondSteps returns cfg with its body-step noise per second instead
// of per metre and radian: each per-second term the per-metre one times
// the run's mean speed (or turn rate) over its whole length, so that the
// run's total variance is the same; the per-metre terms 1e-12.
func perSecondSteps(cfg fusion.Config, inputs []RecordedInput) fusion.Config {
	var dist, turn float64
	var t0, t1 int64 = math.MaxInt64, math.MinInt64
	for _, in := range inputs {
		if o := in.Odometry; o != nil && o.Step != nil {
			dist += math.Hypot(o.Step.ForwardM, o.Step.LeftM)
			turn += math.Abs(o.Step.TurnRad)
			t0, t1 = min(t0, o.StartNs), max(t1, o.StampNs)
		}
	}
	secs := float64(t1-t0) * 1e-9
	if !(secs > 0) {
		return cfg
	}
	n := &cfg.Noise
	n.StepForwardVarM2PerS = n.StepForwardVarM2PerM * dist / secs
	n.StepLeftVarM2PerS = n.StepLeftVarM2PerM * dist / secs
	n.StepTurnVarRad2PerS = n.StepTurnVarRad2PerRad * max(turn, 1e-3) / secs
	n.StepForwardVarM2PerM, n.StepLeftVarM2PerM, n.StepTurnVarRad2PerRad = 1e-12, 1e-12, 1e-12
	return cfg
}

// profile returns the run's log-likelihood under cfg maximised over one
// factor k on sensor i's covariance (and its fixes'), or on every
// body-step noise term for i < 0, by parabolas through three points in
// log k, three times; and how many replays it took.
func (p *replayer) profile(cfg fusion.Config, i int) (ll, k float64, replays int) {
	at := func(y float64) float64 {
		c := cfg
		scale := make([]float64, len(cfg.Sensors))
		for j := range scale {
			scale[j] = 1
		}
		f := math.Exp(y)
		if i >= 0 {
			c.Sensors = append([]fusion.Sensor(nil), cfg.Sensors...)
			c.Sensors[i].Cov = scaled(cfg.Sensors[i].Cov, f)
			scale[i] = f
		} else {
			n := &c.Noise
			for _, v := range []*float64{&n.StepForwardVarM2PerM, &n.StepLeftVarM2PerM, &n.StepTurnVarRad2PerRad, &n.StepForwardVarM2PerS, &n.StepLeftVarM2PerS, &n.StepTurnVarRad2PerS} {
				*v *= f
			}
		}
		replays++
		return p.configLogLik(c, scale)
	}
	const h = 0.5
	y, best := 0.0, at(0)
	for range 3 {
		up, down := at(y+h), at(y-h)
		c, grad := (up-2*best+down)/(h*h), (up-down)/(2*h)
		step := math.Copysign(3*h, grad)
		if c < 0 {
			step = math.Max(-3*h, math.Min(3*h, -grad/c))
		}
		switch v := at(y + step); {
		case v > best && v >= up && v >= down:
			y, best = y+step, v
		case up > best && up >= down:
			y, best = y+h, up
		case down > best:
			y, best = y-h, down
		default:
			return best, math.Exp(y), replays
		}
	}
	return best, math.Exp(y), replays
}

// matchMedianNIS scales each sensor's covariance factor among the levels
// of free (at values, in place) so that the median NIS of its innovations is the
// model's: the chi-square median of their dimension, or for a Student-t
// sensor of nu degrees of freedom d times the median of F(d, nu) (the NIS
// of a d-dimensional Student-t of scale S is d F(d, nu); Kotz and
// Nadarajah 2004, sec. 1.10; gonum distuv), or for a Student-t sensor with
// a Gauss-Markov share f, whose tails are its white part's alone, f times
// the chi-square median plus 1 - f times the F's (an approximation: the
// NIS of a Gaussian part plus a Student-t part lies between the two; with
// the F's median alone the camera of TestRealDataGoal, 90% Gauss-Markov,
// was matched to 0.29 of its true variance, and 0.899 of the truth lay
// inside the 95% region, 0.934 with the blend). Covariance matching (R. K.
// Mehra, IEEE Trans. Automatic Control 17(5), 1972) after the likelihood
// fit: a correlated sensor's bias states are consider states, its
// innovations not independent, and the summed log densities (a composite
// likelihood) put its covariance low (0.55 of the truth in
// TestRealDataGoal, its mean NIS then 1.35 times the model's); the median
// resists the tails. Three rounds, since S = H P H^T + R is not
// proportional to the factor; it returns the replays it took.
func (p *replayer) matchMedianNIS(values []float64, free []int) (matched []int, replays int, err error) {
	for range 3 {
		type seen struct {
			nis []float64
			dim int
			nu  float64
		}
		by := map[string]*seen{}
		replays++
		err = p.run(values, func(in *fusion.Innovation, nu float64) {
			s := by[in.SensorID]
			if s == nil {
				s = &seen{nu: nu}
				by[in.SensorID] = s
			}
			s.nis = append(s.nis, in.Outcome.NIS)
			s.dim = max(s.dim, in.Outcome.Dim)
		})
		if err != nil {
			return nil, replays, err
		}
		matched = matched[:0]
		for _, i := range free {
			l := p.levels[i]
			if l.kind != levelCovScale {
				continue
			}
			s := by[p.base.Sensors[l.Sensor].ID]
			if s == nil || len(s.nis) < 20 {
				continue
			}
			d := float64(s.dim)
			want := distuv.ChiSquared{K: d}.Quantile(0.5)
			if s.nu > 0 {
				// The tails are the white part's alone: a Gauss-Markov
				// share f of the error is Gaussian, so the median lies
				// between the chi-square's and the F's, weighted by f.
				f := p.base.Sensors[l.Sensor].CorrelatedFraction
				want = f*want + (1-f)*d*distuv.F{D1: d, D2: s.nu}.Quantile(0.5)
			}
			slices.Sort(s.nis)
			values[i] *= s.nis[len(s.nis)/2] / want
			matched = append(matched, i)
		}
	}
	return matched, replays, nil
}
