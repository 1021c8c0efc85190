package calib

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/optimize"
	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/fusion"
)

// NoiseFitOptions tune FitNoise. The zero value means the defaults.
type NoiseFitOptions struct {
	// Levels are the levels to fit; nil fits every level of Levels(cfg).
	Levels []NoiseLevel
	// MaxReplays bounds the replays of the run by the optimiser (300); the
	// Hessian and the checks take 2 k (k + 1) + 3 more for k levels.
	MaxReplays int
	// ChooseModel chooses the form of the noise model before fitting its
	// levels (likelihood_model.go): a Gauss-Markov part and Student-t
	// tails for a white Gaussian sensor, noise per second for body steps,
	// whichever the run's likelihood supports. Levels must then be nil.
	ChooseModel bool
	// MaxStdErrLog is the largest standard error of a level's natural log
	// for it to count as identified (0.35: the run pins the level to
	// within a factor of two at 95%).
	MaxStdErrLog float64
	// KeepUndetermined keeps the variances the run does not determine at
	// their configured values; by default each is set to the upper end of
	// its 95% likelihood interval (likelihood_upper.go).
	KeepUndetermined bool
}

// FittedLevel is one noise level as the fit left it.
type FittedLevel struct {
	NoiseLevel
	// Configured is the level in the configuration given (a covariance
	// factor is 1); Fitted the level the fit chose. A level the run does
	// not identify keeps its configured value.
	Configured, Fitted float64
	// StdErrLog is the standard error of log(Fitted) from the observed
	// Fisher information (the numerical Hessian of the log-likelihood in
	// the logs of the levels, inverted); Lo and Hi are the 95% interval
	// exp(log Fitted -+ 1.96 StdErrLog). NaN when not identifiable.
	StdErrLog, Lo, Hi float64
	// Identifiable says whether the run determines the level; Note says
	// why not.
	Identifiable bool
	Note         string
	// Raised says that the level, a variance the run does not determine,
	// was set to the upper end of its 95% likelihood interval (Fitted and
	// Hi; NoiseFitOptions.KeepUndetermined).
	Raised bool
	// Matched says that the level, a sensor's covariance factor the
	// likelihood does not determine, was matched to the sensor's median
	// NIS instead (NoiseFitOptions.ChooseModel; no interval).
	Matched bool
}

// NoiseFit is the result of FitNoise.
type NoiseFit struct {
	Levels []FittedLevel
	// Config is the configuration given, defaults filled in, with the
	// identified levels at their fitted values.
	Config fusion.Config
	// LogLikBefore and LogLikAfter are the run's log-likelihood at the
	// configured and at the fitted levels (over the same innovations:
	// Innovations of them, Excluded fixes left out as gross outliers).
	LogLikBefore, LogLikAfter float64
	Innovations, Excluded     int
	// Replays counts the replays of the run the fit took.
	Replays int
	// Before and After are the consistency checks of the innovations at
	// the configured and at the fitted levels.
	Before, After []SensorCheck
	// Model lists the changes of the noise model's form that
	// NoiseFitOptions.ChooseModel made (Config has them).
	Model []ModelChange
}

// negligibleLevel: a noise term at most this is off (the body steps'
// per-metre terms when their noise is per second; they must stay
// positive) and is not fitted.
const negligibleLevel = 1e-12

// ErrBadLevel: a level to fit is not positive and finite in the
// configuration (a log scale cannot start there).
var ErrBadLevel = errors.New("a noise level must be positive and finite to be fitted")

// FitNoise fits the noise levels of cfg to a recorded run (its inputs in
// arrival order) by maximising the likelihood of the run's innovations
// (likelihood.go) over the logs of the levels, and says which levels the
// run identifies, with their standard errors from the observed Fisher
// information. DEVELOPERS.md, "Design: Noise by likelihood", has the
// method and its limits.
func FitNoise(cfg fusion.Config, inputs []RecordedInput, opt NoiseFitOptions) (*NoiseFit, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	var model []ModelChange
	var skip []bool
	var covFrom []float64 // per sensor, the chosen model's covariance over the configured one
	orig := cfg
	modelReplays := 0
	if opt.ChooseModel {
		if opt.Levels != nil {
			panic("calib: ChooseModel with Levels given")
		}
		var err error
		orig = withDefaults(cfg)
		if cfg, model, skip, modelReplays, err = chooseModel(cfg, inputs); err != nil {
			return nil, err
		}
		// The chosen model's covariances are the profiled ones, from
		// which the fit starts; its factors are reported on the
		// configured covariances (covFrom).
		for i, s := range cfg.Sensors {
			k := 1.0
			if len(s.Cov) > 0 && orig.Sensors[i].Cov[0] > 0 {
				k = s.Cov[0] / orig.Sensors[i].Cov[0]
			}
			covFrom = append(covFrom, k)
		}
	}
	// A level left zero in the configuration takes its default, as in
	// the robot: it is fitted from there, as is the same level written
	// out (a journal's configuration, which holds the defaults).
	cfg = withDefaults(cfg)
	levels := opt.Levels
	if levels == nil {
		for _, l := range Levels(cfg) {
			if l.kind == levelNoise && l.Value(&cfg) <= negligibleLevel {
				continue // switched off by chooseModel
			}
			if l.kind == levelCorrTime && opt.ChooseModel {
				// The composite likelihood of a consider-state sensor
				// misplaces its time constant (TestSensorModelRecovery;
				// 0.43 s for 2.5 s in TestRealDataGoal): the chosen model
				// keeps the common practice's 2 s.
				continue
			}
			levels = append(levels, l)
		}
	}
	if opt.MaxReplays <= 0 {
		opt.MaxReplays = 300
	}
	if opt.MaxStdErrLog <= 0 {
		opt.MaxStdErrLog = 0.35
	}
	p := newReplayer(cfg, inputs, levels)
	fit := &NoiseFit{Levels: make([]FittedLevel, len(levels)), Model: model, Replays: modelReplays}
	x0 := make([]float64, len(levels))
	for i, l := range levels {
		x0[i] = l.Value(&p.base)
		if !(x0[i] > 0) || math.IsInf(x0[i], 0) {
			return nil, fusion.FieldErrorf(ErrBadLevel, l.Field, "%v", x0[i])
		}
		fit.Levels[i] = FittedLevel{NoiseLevel: l, Configured: x0[i], Fitted: x0[i], StdErrLog: math.NaN(), Lo: math.NaN(), Hi: math.NaN()}
	}
	var err error
	if skip != nil {
		copy(p.skip, skip)
		for _, s := range skip {
			if s {
				fit.Excluded++
			}
		}
	} else if fit.Excluded, err = p.screen(x0); err != nil {
		return nil, err
	} else {
		fit.Replays++
	}
	obj := p.objective(&fit.Replays)

	// A first look along each level alone drops the levels the run leaves
	// flat and starts the simplex where each level's own parabola peaks;
	// then the simplex fits the rest together, and the Hessian at its
	// optimum drops the ones it does not pin down, and so does a check of
	// its curvature two standard errors out. Those go back to their
	// configured values, the others' standard errors come from their own
	// block of the Hessian (the dropped levels held fixed), and a short
	// second simplex polishes them.
	x := append([]float64(nil), x0...)
	free := p.probe(obj, x, fit.Levels, opt.MaxStdErrLog)
	if len(free) > 0 {
		if err := p.maximise(obj, x, free, 0.25, opt.MaxReplays); err != nil {
			return nil, err
		}
		h := p.hessian(obj, x, free)
		keep := make([]int, len(free)) // indices into free
		for k := range keep {
			keep[k] = k
		}
		for {
			se, ok := stdErrs(h, keep)
			var next []int
			for k, j := range keep {
				fl := &fit.Levels[free[j]]
				switch {
				case !ok[k]:
					fl.Note = "the log-likelihood is flat or not concave in it at the optimum: the run does not determine it"
				case se[k] > opt.MaxStdErrLog:
					fl.Note = fmt.Sprintf("standard error of its log %.2f above %.2f: the run does not determine it", se[k], opt.MaxStdErrLog)
				default:
					fl.Note, fl.StdErrLog = "", se[k]
					next = append(next, j)
					continue
				}
				x[free[j]] = x0[free[j]] // not identified: back to its configured value
			}
			if len(next) == len(keep) {
				break
			}
			keep = next
		}
		var kept []int
		for _, j := range keep {
			kept = append(kept, free[j])
		}
		if len(kept) == len(free) {
			p.newton(obj, x, free, h)
		}
		if err := p.polish(obj, x, kept, len(free)); err != nil {
			return nil, err
		}
		n := len(kept)
		if kept = p.quadratic(obj, x, x0, kept, fit.Levels); len(kept) < n {
			if err := p.polish(obj, x, kept, n); err != nil {
				return nil, err
			}
		}
		free = kept
	}
	for _, i := range free {
		fit.Levels[i].Identifiable = true
	}
	if opt.ChooseModel {
		n, err := p.thinnedSteps(inputs, x, fit.Levels, opt.KeepUndetermined)
		fit.Replays += n
		if err != nil {
			return nil, err
		}
		// A covariance the likelihood does not determine starts from its
		// configured value, not the chosen model's profiled one. Every
		// covariance factor is then matched to its median NIS, with the
		// body steps' levels of the thinned run: covariance matching is
		// an estimator of its own, which does not lean on the composite
		// likelihood; a sensor with too few innovations keeps its value.
		var covs []int
		for i, l := range fit.Levels {
			if l.kind == levelCovScale {
				covs = append(covs, i)
				if !l.Identifiable {
					x[i] = 1 / covFrom[l.Sensor]
				}
			}
		}
		matched, n, err := p.matchMedianNIS(x, covs)
		fit.Replays += n
		if err != nil {
			return nil, err
		}
		for _, i := range matched {
			if l := &fit.Levels[i]; !l.Identifiable {
				l.Matched = true
				l.Note += "; matched to its median NIS (covariance matching) instead"
			}
		}
	}
	for i := range fit.Levels {
		fl := &fit.Levels[i]
		if !fl.Identifiable && !fl.Matched || fl.Raised {
			continue
		}
		fl.Fitted = x[i]
		if fl.kind == levelCovScale && covFrom != nil {
			fl.Fitted *= covFrom[fl.Sensor]
		}
		fl.Lo, fl.Hi = fl.Fitted*math.Exp(-1.96*fl.StdErrLog), fl.Fitted*math.Exp(1.96*fl.StdErrLog)
	}
	if !opt.KeepUndetermined {
		p.raiseUndetermined(obj, x, fit.Levels)
		for i := range fit.Levels {
			if l := &fit.Levels[i]; l.Raised && l.kind == levelCovScale && covFrom != nil {
				l.Fitted *= covFrom[l.Sensor]
				l.Hi = l.Fitted
			}
		}
	}
	fit.Config, _ = p.config(x)
	fit.Config.GateProbability = withDefaults(cfg).GateProbability
	var n int
	before, bx := p, x0
	if opt.ChooseModel {
		// Before is the configuration as given, over the same fixes.
		before = newReplayer(orig, inputs, nil)
		copy(before.skip, p.skip)
		bx = nil
	}
	if fit.Before, fit.LogLikBefore, n, err = before.checks(bx); err != nil {
		return nil, err
	}
	if fit.After, fit.LogLikAfter, _, err = p.checks(x); err != nil {
		return nil, err
	}
	fit.Innovations = n
	fit.Replays += 2
	return fit, nil
}

// screen replays the run at values and leaves out of every later replay
// the fixes of Gaussian sensors whose NIS there lies beyond the fit's gate
// (fitGateProbability) scaled by the sensor's median NIS over the
// chi-square median when that is above 1: gross outliers, which a Gaussian
// likelihood cannot hold (one fix metres off outweighs thousands). The
// median is a robust scale (it moves little for a few percent of
// outliers), so a sensor configured three times too confident does not
// lose its honest large errors, whose loss would bias its fitted
// covariance low. A Student-t sensor of nu degrees of freedom is screened
// on its own distribution, NIS / d ~ F(d, nu) (Kotz and Nadarajah 2004,
// sec. 1.10), at studentScreenProbability, scaled the same way: its tails
// stay, but not fixes metres off (a marker taken for another), which a
// Student-t fitted to them follows below 2 degrees of freedom and which
// the filter's gate refuses anyway. Before, a Student-t sensor kept all
// its fixes, so tuning a configuration that an earlier tune had made
// Student-t took them all in and ended at 1.9 degrees of freedom. It
// returns how many fixes it left out.
func (p *replayer) screen(values []float64) (int, error) {
	type key struct {
		sensor string
		t      int64
	}
	type seen struct {
		nis []float64
		dim int
		nu  float64
	}
	byKey := map[key]float64{}
	sensors := map[string]*seen{}
	err := p.run(values, func(in *fusion.Innovation, nu float64) {
		if in.SensorID == "imu" {
			return
		}
		byKey[key{in.SensorID, in.StampNs}] = math.Max(byKey[key{in.SensorID, in.StampNs}], in.Outcome.NIS/float64(in.Outcome.Dim))
		s := sensors[in.SensorID]
		if s == nil {
			s = &seen{nu: nu}
			sensors[in.SensorID] = s
		}
		s.nis = append(s.nis, in.Outcome.NIS)
		s.dim = max(s.dim, in.Outcome.Dim)
	})
	if err != nil {
		return 0, err
	}
	limit := map[string]float64{} // per degree of freedom
	for id, s := range sensors {
		d := float64(s.dim)
		slices.Sort(s.nis)
		med := s.nis[len(s.nis)/2] / d
		if s.nu > 0 {
			f := distuv.F{D1: d, D2: s.nu}
			limit[id] = math.Max(1, med/f.Quantile(0.5)) * f.Quantile(studentScreenProbability)
			continue
		}
		chi := distuv.ChiSquared{K: d}
		limit[id] = math.Max(1, med*d/chi.Quantile(0.5)) * chi.Quantile(fitGateProbability) / d
	}
	n := 0
	for i := range p.inputs {
		if f := p.inputs[i].Fix; f != nil {
			t, _ := p.stampOf(i)
			if v, ok := byKey[key{f.SensorID, t}]; ok && v > limit[f.SensorID] {
				p.skip[i] = true
				n++
			}
		}
	}
	return n, nil
}

// studentScreenProbability is the screen's quantile for a Student-t
// sensor: one fix in ten thousand of its own errors lies beyond it. Its
// tails are wide (for 2 dimensions and 4 degrees of freedom the quantile
// at 1 - 1e-6 is 63 standard deviations out, past a marker taken for
// another a metre off under a 3 cm camera); at 1 - 1e-4 it is 20.
const studentScreenProbability = 1 - 1e-4

// objective returns minus the log-likelihood as a function of the logs of
// the levels, counting replays; a configuration the levels make invalid
// (a Student-t sensor at one degree of freedom or fewer) is +Inf. A replay
// is deterministic, so a point asked for again (the Hessian's centre, the
// optimum the checks start from: 10 of 232 replays in NoiseFit10Min) is
// answered from memory; the fixes left out must not change meanwhile.
func (p *replayer) objective(replays *int) func(logx []float64) float64 {
	values := make([]float64, len(p.levels))
	memo := map[string]float64{}
	key := make([]byte, 0, 8*len(p.levels))
	return func(logx []float64) float64 {
		key = key[:0]
		for _, v := range logx {
			key = binary.LittleEndian.AppendUint64(key, math.Float64bits(v))
		}
		if f, ok := memo[string(key)]; ok {
			return f
		}
		for i, v := range logx {
			values[i] = math.Exp(v)
		}
		*replays++
		f := math.Inf(1)
		if ll, _, err := p.logLik(values); err == nil {
			f = -ll
		}
		memo[string(key)] = f
		return f
	}
}

// restricted returns obj over the free levels, the others held at x.
func restricted(obj func([]float64) float64, x []float64, free []int) func([]float64) float64 {
	all := make([]float64, len(x))
	return func(y []float64) float64 {
		for i, v := range x {
			all[i] = math.Log(v)
		}
		for k, i := range free {
			all[i] = y[k]
		}
		return obj(all)
	}
}

// probeStepLog is the step of probe in the logs of the levels: a factor
// 1.65 each way, so that a level a few times off still sees its
// parabola's curvature.
const probeStepLog = 0.5

// probeMaxStdErrLog: a level whose standard error of its log, from the
// curvature along it alone, is above this at the configured levels is not
// fitted. The curvature along one level is at least its share of the
// Fisher information (the others held fixed), and a variance three times
// too large shows a third of the curvature it has at its optimum (for a
// Gaussian innovation's variance q, d2(-log L)/d(log q)2 = (N/2) s/q over
// N innovations of mean square s), so this is lenient.
const probeMaxStdErrLog = 1.0

// probeMinFall is the fall of minus the log-likelihood over one probe
// step by which a level whose curvature is not yet positive shows that the
// run sees it: twice the 1.92 that bounds a 95% interval, above the few
// units by which a slip test or a gate flipping moves the likelihood.
// probeMaxWalk bounds the steps the probe walks downhill along it (a
// factor e^3, 20).
const (
	probeMinFall = 4
	probeMaxWalk = 6
)

// probe looks along each level alone, a step probeStepLog either way of
// x: a level whose curvature there is nil, negative or too small is marked
// not identified in levels; every other level is moved to the peak of its
// parabola (at most 3 steps away) and returned as free. The levels it
// marked are looked at again from there, since a level far off can hide
// another's curvature; near the others' optimum the curvature along one
// level is close to what it will be, so those must show a standard error
// within half as much again as maxStdErrLog to be fitted. In that second
// look a level along which the likelihood falls steeply (by probeMinFall
// over a step) while its curvature is not yet positive is walked downhill
// first, until the curvature turns positive (at most probeMaxWalk steps),
// and its parabola's peak taken from there.
func (p *replayer) probe(obj func([]float64) float64, x []float64, levels []FittedLevel, maxStdErrLog float64) []int {
	all := make([]int, len(x))
	for i := range all {
		all[i] = i
	}
	free, flat := p.probeAlong(obj, x, levels, all, probeMaxStdErrLog, false)
	if len(flat) > 0 {
		more, _ := p.probeAlong(obj, x, levels, flat, maxStdErrLog*1.5, true)
		free = append(free, more...)
		slices.Sort(free)
	}
	return free
}

// probeAlong probes the levels along of x (probe), each free when the
// standard error of its log from its curvature is at most maxSE, and
// returns the free ones and the flat ones.
func (p *replayer) probeAlong(obj func([]float64) float64, x []float64, levels []FittedLevel, along []int, maxSE float64, walk bool) (free, flat []int) {
	y := make([]float64, len(x))
	for i, v := range x {
		y[i] = math.Log(v)
	}
	f0 := obj(y)
	next := append([]float64(nil), x...)
	for _, i := range along {
		y0, f := y[i], f0
		var up, down, c, g float64
		for steps := 0; ; steps++ {
			y[i] += probeStepLog
			up = obj(y)
			y[i] -= 2 * probeStepLog
			down = obj(y)
			y[i] += probeStepLog
			c = (up - 2*f + down) / (probeStepLog * probeStepLog)
			g = (up - down) / (2 * probeStepLog)
			if c > 0 || math.IsInf(up, 0) || math.IsInf(down, 0) || !walk || f-min(up, down) <= probeMinFall || steps == probeMaxWalk {
				break
			}
			// Well below the variance its innovations show, a level's
			// minus log-likelihood bends down (for a Gaussian
			// innovation of variance a + q and mean square s, its second
			// derivative in log q is negative while q is small beside
			// a and s): the slope, not the curvature, says the run sees
			// it, so the probe walks downhill and looks again.
			if down < up {
				y[i] -= probeStepLog
				f = down
			} else {
				y[i] += probeStepLog
				f = up
			}
		}
		at := math.Exp(y[i]) // where the walk ended
		y[i] = y0
		if !(c > 0) || math.IsInf(up, 0) || math.IsInf(down, 0) || 1/math.Sqrt(c) > maxSE {
			levels[i].Note = fmt.Sprintf("the log-likelihood is nearly flat or not concave along it (curvature %.3g per log unit squared): the run does not determine it", c)
			flat = append(flat, i)
			continue
		}
		step := math.Max(-3*probeStepLog, math.Min(3*probeStepLog, -g/c))
		next[i] = at * math.Exp(step)
		levels[i].Note = ""
		free = append(free, i)
	}
	copy(x, next)
	return free, flat
}

// maximise moves the free levels of x to the maximum of the likelihood by
// the Nelder-Mead simplex (J. A. Nelder and R. Mead, Computer Journal
// 7(4), 1965; gonum optimize) in their logs, from a simplex of the given
// size. The simplex needs no gradient, which the likelihood's small jumps
// (a slip test or a gate that flips as the levels move) would spoil. It
// stops when the best value has not improved by 0.2 over 2k iterations for
// k free levels: a change of 0.2 in the log-likelihood is a tenth of the
// 1.92 that bounds a 95% interval.
func (p *replayer) maximise(obj func([]float64) float64, x []float64, free []int, size float64, maxReplays int) error {
	f := restricted(obj, x, free)
	y := make([]float64, len(free))
	for k, i := range free {
		y[k] = math.Log(x[i])
	}
	res, err := optimize.Minimize(optimize.Problem{Func: f}, y, &optimize.Settings{
		FuncEvaluations: maxReplays,
		Converger:       &optimize.FunctionConverge{Absolute: 0.2, Iterations: 2 * len(free)},
	}, &optimize.NelderMead{SimplexSize: size})
	if res == nil {
		return fmt.Errorf("noise fit: %w", err)
	}
	if math.IsInf(res.F, 1) {
		return fmt.Errorf("noise fit: no levels give a valid configuration: %w", err)
	}
	for k, i := range free {
		x[i] = math.Exp(res.X[k])
	}
	return nil
}

// hessianStepLog is the step of the numerical Hessian in the logs of the
// levels: 10%, wide beside the likelihood's small jumps and narrow beside
// its curvature.
const hessianStepLog = 0.1

// newton takes a Newton-Raphson step from x in the logs of the free levels
// with h, the Hessian of obj there (the method of scoring's cousin for
// maximum likelihood in state-space models: R. H. Shumway and D. S.
// Stoffer, Time Series Analysis and Its Applications, sec. 6.3), when the
// step lowers obj, halving it up to twice otherwise. The simplex stops
// where its points no longer differ by much in the log-likelihood, which
// along a level the run determines only loosely can be a quarter of its
// value short of the optimum (the IMU offset's walk fitted with six other
// levels: 0.70 of the truth, a log-likelihood 0.5 below the truth's). The
// gradient comes free: the central Hessian of gonum's diff/fd evaluates obj
// at two steps either way of x along each level, so (f(+2h) - f(-2h)) / 4h
// is a central difference over points already replayed (obj remembers
// them). It costs a replay or three, and leaves x as it was when no step
// helps or h is not positive definite.
func (p *replayer) newton(obj func([]float64) float64, x []float64, free []int, h *mat.SymDense) {
	n := len(free)
	y := make([]float64, len(x))
	for i, v := range x {
		y[i] = math.Log(v)
	}
	f := restricted(obj, x, free)
	z := make([]float64, n)
	for k, i := range free {
		z[k] = y[i]
	}
	g := mat.NewVecDense(n, nil)
	zc := make([]float64, n)
	for k := range free {
		var fd [2]float64
		for side, loc := range []float64{1, -1} {
			// The same points, to the bit, as fd.Hessian's: it adds the
			// step twice.
			copy(zc, z)
			zc[k] += loc * hessianStepLog
			zc[k] += loc * hessianStepLog
			fd[side] = f(zc)
		}
		g.SetVec(k, (fd[0]-fd[1])/(4*hessianStepLog))
	}
	var ch mat.Cholesky
	if !ch.Factorize(h) {
		return
	}
	var step mat.VecDense
	if err := ch.SolveVecTo(&step, g); err != nil {
		return
	}
	f0 := f(z)
	for range 3 {
		for k := range free {
			zc[k] = z[k] - step.AtVec(k)
		}
		if f(zc) < f0 {
			for k, i := range free {
				x[i] = math.Exp(zc[k])
			}
			return
		}
		step.ScaleVec(0.5, &step)
	}
}

// polish fits the free levels of x again with a small simplex when some
// of the had levels fitted before were put back to their configured values
// (so that fewer than had are free).
func (p *replayer) polish(obj func([]float64) float64, x []float64, free []int, had int) error {
	if len(free) == 0 || len(free) == had {
		return nil
	}
	return p.maximise(obj, x, free, 0.1, 10*len(free))
}

// quadratic checks the Hessian's picture of each level of free against
// the likelihood itself: two standard errors either way of x along the
// level alone, minus the log-likelihood should rise by 2 on average (the
// mean of the two sides, which a slope cancels: the simplex stops within
// 0.2 of the optimum, and small jumps roughen the likelihood). A level
// along which it rises by less than 1 sits on a shelf the Hessian's 10%
// steps did not see (a level the run leaves loose, pulled by a level it
// does not determine and that stays at a wrong configured value); it is
// marked not determined and put back to its configured value x0. It
// returns the levels that pass.
func (p *replayer) quadratic(obj func([]float64) float64, x, x0 []float64, free []int, levels []FittedLevel) []int {
	y := make([]float64, len(x))
	for i, v := range x {
		y[i] = math.Log(v)
	}
	f0 := obj(y)
	var pass []int
	var back []int
	for _, i := range free {
		se := levels[i].StdErrLog
		var rise float64
		for _, d := range []float64{-2 * se, 2 * se} {
			y[i] += d
			rise += (obj(y) - f0) / 2
			y[i] -= d
		}
		if rise < 1 {
			levels[i].Note = fmt.Sprintf("two standard errors (%.2f in its log) away the log-likelihood falls by %.2f on average, not the 2 of its Hessian: the run does not determine it", 2*se, rise)
			levels[i].StdErrLog = math.NaN()
			back = append(back, i)
			continue
		}
		pass = append(pass, i)
	}
	for _, i := range back {
		x[i] = x0[i]
	}
	return pass
}

// hessian returns the Hessian of obj (minus the log-likelihood) in the
// logs of the free levels of x: the observed Fisher information, by
// central differences (gonum diff/fd).
func (p *replayer) hessian(obj func([]float64) float64, x []float64, free []int) *mat.SymDense {
	f := restricted(obj, x, free)
	y := make([]float64, len(free))
	for k, i := range free {
		y[k] = math.Log(x[i])
	}
	var h mat.SymDense
	fd.Hessian(&h, f, y, &fd.Settings{Formula: fd.Central, Step: hessianStepLog})
	return &h
}

// stdErrs returns the standard errors of the logs of the levels keep (rows
// of the Hessian h), the others held fixed: the square roots of the
// diagonal of the inverse of their block of h, over its positive
// eigenvalues; ok is false for a level with weight in a direction of zero
// or negative curvature, which the run does not determine.
func stdErrs(h *mat.SymDense, keep []int) (se []float64, ok []bool) {
	se, ok = make([]float64, len(keep)), make([]bool, len(keep))
	if len(keep) == 0 {
		return se, ok
	}
	b := mat.NewSymDense(len(keep), nil)
	for r, i := range keep {
		for c, j := range keep {
			b.SetSym(r, c, h.At(i, j))
		}
	}
	var eig mat.EigenSym
	if !eig.Factorize(b, true) {
		return se, ok
	}
	vals := eig.Values(nil)
	var vecs mat.Dense
	eig.VectorsTo(&vecs)
	var top float64
	for _, v := range vals {
		top = math.Max(top, v)
	}
	for k := range keep {
		ok[k] = true
		for j, v := range vals {
			w := vecs.At(k, j)
			if v <= 1e-9*top {
				if w*w > 0.01 {
					ok[k] = false
				}
				continue
			}
			se[k] += w * w / v
		}
		se[k] = math.Sqrt(se[k])
	}
	return se, ok
}

// thinGapS is the gap between the fixes that thinnedSteps keeps: long
// enough for the body steps' spread to rival a camera's variance, and for
// a camera's Gauss-Markov errors (1 to 3 s) to have mostly decorrelated.
const thinGapS = 3.0

// thinnedSteps fits the body-step noise levels on the run thinned to one
// fix per thinGapS seconds of each sensor, the other levels held at x.
// Between fixes 0.3 s apart a correlated camera's S carries its bias's
// whole variance and the steps' noise is a few percent of it, and its
// innovations are far from independent; over 3 s the steps' spread is
// comparable and the camera's errors have mostly decorrelated, so the
// summed densities are close to the run's likelihood ("Design: Noise by
// likelihood"). A level the thinned run determines gets its value (x and
// levels, with a note); unless keep, a level it does not determine is set
// to the upper end of its interval there (raiseUndetermined); a level it
// bounds nowhere stays as the whole run left it. It returns the replays
// it took.
func (p *replayer) thinnedSteps(inputs []RecordedInput, x []float64, levels []FittedLevel, keep bool) (int, error) {
	var idx []int
	for i, l := range levels {
		if l.kind == levelNoise && strings.HasPrefix(l.Field, "noise.step_") {
			idx = append(idx, i)
		}
	}
	if len(idx) == 0 {
		return 0, nil
	}
	last := map[string]int64{}
	var thin []RecordedInput
	for i, in := range inputs {
		if p.skip[i] {
			continue
		}
		if f := in.Fix; f != nil {
			if t, ok := last[f.SensorID]; ok && f.StampNs-t < int64(thinGapS*1e9) {
				continue
			}
			last[f.SensorID] = f.StampNs
		}
		thin = append(thin, in)
	}
	cfg, _ := p.config(x)
	sub := make([]NoiseLevel, len(idx))
	for k, i := range idx {
		sub[k] = levels[i].NoiseLevel
	}
	fit, err := FitNoise(cfg, thin, NoiseFitOptions{Levels: sub, KeepUndetermined: keep})
	if err != nil {
		return 0, err
	}
	for k, i := range idx {
		fl := fit.Levels[k]
		if !fl.Identifiable && !fl.Raised {
			continue
		}
		x[i] = fl.Fitted
		l := &levels[i]
		l.Identifiable, l.Raised, l.Fitted, l.StdErrLog, l.Lo, l.Hi = fl.Identifiable, fl.Raised, fl.Fitted, fl.StdErrLog, fl.Lo, fl.Hi
		l.Note = fmt.Sprintf("on the run thinned to one fix per %.0f s", thinGapS)
		if fl.Raised {
			l.Note = fmt.Sprintf("not determined on the run thinned to one fix per %.0f s (%s)", thinGapS, fl.Note)
		}
	}
	return fit.Replays, nil
}
