package calib

import (
	"cmp"
	"fmt"
	"math"
	"slices"

	"gonum.org/v1/gonum/mat"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// sysInterval is one odometry interval of a run: each wheel's reported
// travel (metres, at travel[off:off+n] of the model's flat slice) and the
// IMU's turn in rotation mode (radians), or a reported body step (at
// steps[off]). It takes 32 bytes (64 with the step in it: 23 MB of the
// demo's hour, whose 720,000 intervals have none).
type sysInterval struct {
	t0, t1 int64
	imu    float64
	off    int32
	isStep bool
}

// sysFix is one fix prepared for the fit.
type sysFix struct {
	stamp  int64
	sensor int
	kind   fusion.FixKind
	mount  estimator.Pose // the fix's own mount, or the sensor's configured one
	z      [3]float64
	dim    int
	// rng, brg: which landmark components z holds (range first).
	rng, brg bool
	lm       [2]float64
	// winv is the inverse of the covariance's Cholesky factor (lower
	// triangular, row-major dim x dim): whitened residual = winv r.
	winv [9]float64
	seg  int
	// gm is the fix's share of its sensor's Gauss-Markov error in the
	// whitened residual: winv L_s[comps] (dim x the sensor's dimension,
	// stride 3), with L_s the lower Cholesky factor of the sensor's
	// correlated covariance f R_s; zero for a sensor without one. Fixes a
	// and b of one sensor dt apart then share gm_a gm_b^T exp(-dt/tau)
	// (sysSolver.block).
	gm [9]float64
}

// sysParam is a global parameter: what it is and where it sits.
type sysParam struct {
	Param
	step float64 // forward-difference step
}

// sysModel is a run prepared for the fit and the dead reckoning of one
// parameter vector.
type sysModel struct {
	cfg    *fusion.Config
	ivs    []sysInterval
	travel []float64
	steps  []estimator.Step
	fixes  []sysFix
	// segStart is each segment's anchor stamp.
	segStart []int64
	params   []sysParam
	nw       int
	rotation bool
	counts   bool
	// idx of the odometry parameters in params (-1 if absent).
	wheelScale           []int
	spread, imuScale     int
	stepFwd, stepTurn    int
	mountX, mountY, mHdg []int // per sensor
	latency              []int

	// lat0 is each sensor's reference latency (seconds), where the
	// prediction's shift in latency starts (relative).
	lat0 []float64

	// Scratch of one dead reckoning: the pose at each interval's start
	// (each interval ends where the next starts), each interval's step,
	// and the pose at the last interval's end.
	p0     []estimator.Pose
	u      []estimator.Step
	end    estimator.Pose
	segInv []estimator.Pose

	// The expected dead reckoning under the odometry's heading noise
	// (expected): hv is the heading variance the noise model accumulates
	// from the run's start to each interval's start (one more entry: the
	// run's end); ex the expected position there, summed from the start of
	// its epoch, whose heading variance at that start is base. Epoch k runs
	// from the interval of segment k's anchor (epochStart) to that of the
	// next; epochOf is each interval's. segEx is each anchor's (x, y, hv).
	hv         []float64
	ex         [][2]float64
	base       []float64
	epochStart []int
	epochOf    []int32
	segEx      [][3]float64
	// vars is stepCov's scratch: the variances of one interval's rows.
	vars []float64
}

// newSysModel prepares the run.
func newSysModel(cfg *fusion.Config, odo OdometrySource, fixes []fusion.Fix, opt SystematicOptions) (*sysModel, error) {
	m := &sysModel{cfg: cfg, nw: len(cfg.Wheels), rotation: cfg.IMU == fusion.IMURotation, spread: -1, imuScale: -1, stepFwd: -1, stepTurn: -1}
	if err := m.intervals(odo); err != nil {
		return nil, fmt.Errorf("%w: reading the odometry: %w", ErrSystematic, err)
	}
	if len(m.ivs) < 2 {
		return nil, fmt.Errorf("%w: the run has %d odometry intervals, too few", ErrSystematic, len(m.ivs))
	}
	m.prepareFixes(fixes)
	if len(m.fixes) < 10 {
		return nil, fmt.Errorf("%w: the run has %d usable fixes inside its odometry, need 10", ErrSystematic, len(m.fixes))
	}
	m.segments(opt.SegmentS)
	m.globals(opt.SensorsOnly)
	for _, sen := range cfg.Sensors {
		m.lat0 = append(m.lat0, float64(sen.LatencyNs)*1e-9)
	}
	n := len(m.ivs)
	m.p0, m.u = make([]estimator.Pose, n), make([]estimator.Step, n)
	m.epochs()
	return m, nil
}

// intervals turns the odometry samples (sorted by stamp) into intervals,
// much as the robot decodes them (DEVELOPERS.md, "Design: Odometry
// samples"): a sample whose stamp is not after the one before is dropped,
// and a count jump past the speed limit (checked per wheel here, on the
// body step by the robot) is refused, its counts kept for the next sample
// to judge. The next sample's travel plausible from the counts before the
// jump, the jump was one bad reading and its interval spans both samples'
// periods (no travel lost); otherwise, plausible from the jump's counts,
// the counts started afresh and only the jump's period is left out (a gap,
// where the robot, which cannot leave one, spreads the travel over both).
// A body step or travels end the counts' reference, as at the robot: the
// next sample of counts only sets it again.
//
// A recording in stamp order (the usual case) is taken sample by sample as
// odo hands them over, and nothing of it is kept but the intervals; one
// out of order is read again whole, sorted (a sorted copy of an hour's
// samples is 58 MB), and taken then.
func (m *sysModel) intervals(odo OdometrySource) error {
	d := m.newIntervalDecoder()
	sorted := true
	err := odo(func(o *fusion.Odometry) bool {
		if o.StampNs < d.last {
			sorted = false
			return false
		}
		d.last = o.StampNs
		d.take(o)
		return true
	})
	if err != nil || sorted {
		return err
	}
	var all []fusion.Odometry
	err = odo(func(o *fusion.Odometry) bool {
		all = append(all, *o)
		return true
	})
	if err != nil {
		return err
	}
	slices.SortStableFunc(all, func(a, b fusion.Odometry) int { return cmp.Compare(a.StampNs, b.StampNs) })
	m.ivs, m.travel, m.steps, m.counts = nil, nil, nil, false
	d = m.newIntervalDecoder()
	for k := range all {
		d.take(&all[k])
	}
	return nil
}

// intervalDecoder is intervals' state between samples.
type intervalDecoder struct {
	m            *sysModel
	ref, jump    countsRef
	prevIMU      optHeading
	newest, last int64
	tr           []float64
}

// optHeading is an IMU heading, if there is one.
type optHeading struct {
	rad float64
	ok  bool
}

func headingOf(o *fusion.Odometry) optHeading {
	if o.IMUHeadingRad == nil {
		return optHeading{}
	}
	return optHeading{*o.IMUHeadingRad, true}
}

func (m *sysModel) newIntervalDecoder() *intervalDecoder {
	return &intervalDecoder{m: m, newest: math.MinInt64, last: math.MinInt64, tr: make([]float64, m.nw)}
}

// take decodes the next sample in stamp order (intervals). Nothing of o
// is kept: the source may reuse it.
func (d *intervalDecoder) take(o *fusion.Odometry) {
	m, tr := d.m, d.tr
	if o.StampNs <= d.newest {
		return
	}
	d.newest = o.StampNs
	iv := sysInterval{t0: o.StartNs, t1: o.StampNs, off: int32(len(m.travel)), imu: math.NaN()}
	ok := true
	imuRef := d.prevIMU
	switch {
	case o.Step != nil:
		iv.off, iv.isStep = int32(len(m.steps)), true
		d.endCounts()
	case o.Counts != nil && len(o.Counts) == m.nw:
		m.counts = true
		from := &d.ref
		ok = d.ref.counts != nil && m.countTravel(tr, o, &d.ref)
		if !ok && d.ref.counts != nil && d.jump.counts != nil && m.countTravel(tr, o, &d.jump) {
			ok, from = true, &d.jump
		}
		iv.t0, imuRef = from.stamp, from.imu
		if d.ref.counts != nil && !ok {
			d.jump.set(o)
			return
		}
		d.ref.set(o)
		d.jump.counts = nil
	case len(o.TravelM) == m.nw && m.nw > 0:
		copy(tr, o.TravelM)
		d.endCounts()
	default:
		ok = false
	}
	if m.rotation && o.Step == nil {
		if o.IMUHeadingRad == nil || !imuRef.ok {
			ok = false
		} else {
			iv.imu = estimator.Wrap(*o.IMUHeadingRad - imuRef.rad)
		}
	}
	if m.rotation {
		// A body step's heading too, as the robot notes it: one sent
		// without leaves the next wheel sample no heading to turn from
		// (fusion's noteIMU). Kept from before the step, the steps' turn
		// entered that sample's IMU turn as well
		// (TestRotationIntervalsAcrossBodySteps).
		d.prevIMU = headingOf(o)
	}
	if !ok || iv.t0 >= iv.t1 {
		return
	}
	if o.Step == nil {
		m.travel = append(m.travel, tr...)
	} else {
		m.steps = append(m.steps, *o.Step)
	}
	m.ivs = append(m.ivs, iv)
}

// endCounts ends the counts' reference at a sample without counts (a body
// step, or travels), as the robot does (fusion's noteCounts): the next
// sample of counts is the reference again and gives no interval. Kept,
// that sample's interval ran from the counts before the other sample,
// over its period too, and the dead reckoning took that period's travel
// twice (TestCountsIntervalsAcrossBodySteps).
func (d *intervalDecoder) endCounts() {
	d.ref.counts, d.jump.counts = nil, nil
}

// countsRef is a sample of encoder counts that later samples' travel is
// measured from: its counts, stamp and IMU heading.
type countsRef struct {
	counts []int64
	stamp  int64
	imu    optHeading
}

// set makes o's counts the reference.
func (c *countsRef) set(o *fusion.Odometry) {
	c.counts = append(c.counts[:0], o.Counts...)
	c.stamp, c.imu = o.StampNs, headingOf(o)
}

// countTravel writes each wheel's travel from c to o into tr and reports
// whether every wheel's speed over the interval is within the limit.
func (m *sysModel) countTravel(tr []float64, o *fusion.Odometry, c *countsRef) bool {
	limit := m.cfg.MaxSpeedMPerS*float64(o.StampNs-c.stamp)*1e-9 + 1e-3
	for i, w := range m.cfg.Wheels {
		if w.CountsPerM > 0 {
			tr[i] = float64(countDelta(o.Counts[i], c.counts[i], w.CounterBits)) / w.CountsPerM
			if math.Abs(tr[i]) > limit {
				return false
			}
		}
	}
	return true
}

// prepareFixes keeps the fixes of configured sensors with a covariance,
// inside the odometry's span, sorted by stamp, and whitens them. A landmark
// fix that carries a range takes its landmark's survey error
// (fusion.Config.LandmarkSurveyVar, v per axis) into its covariance as
// white noise: a landmark off its map by d errs in range by d along the
// line of sight and in bearing by d across it over the range r, so that
// v I in the plane adds diag(v, v / r^2) to (range, bearing) whatever the
// direction. The filter carries the error as landmark blocks, which
// correlate a landmark's sightings ("Design: Landmark survey error"); the
// fit's segments, robust standard errors take up what repeats within a
// segment. A bearing-only fix, whose range the fit does not know here,
// keeps its own covariance.
func (m *sysModel) prepareFixes(fixes []fusion.Fix) {
	first, last := m.ivs[0].t0, m.ivs[len(m.ivs)-1].t1
	lms := map[string][2]float64{}
	survey := map[string]float64{}
	for i, l := range m.cfg.Landmarks {
		lms[l.ID] = [2]float64{l.XM, l.YM}
		survey[l.ID] = m.cfg.LandmarkSurveyVar(&m.cfg.Landmarks[i])
	}
	for k := range fixes {
		fx := &fixes[k]
		si := slices.IndexFunc(m.cfg.Sensors, func(s fusion.Sensor) bool { return s.ID == fx.SensorID })
		if si < 0 {
			continue
		}
		sen := &m.cfg.Sensors[si]
		t := fx.StampNs - sen.LatencyNs
		if t < first || t > last {
			continue
		}
		f := sysFix{stamp: fx.StampNs, sensor: si, kind: sen.Kind, mount: sen.Mount}
		if fx.Mount != nil {
			f.mount = *fx.Mount
		}
		cov := fx.Cov
		switch sen.Kind {
		case fusion.FixPose:
			f.z, f.dim = [3]float64{fx.XM, fx.YM, fx.HeadingRad}, 3
		case fusion.FixPosition:
			f.z, f.dim = [3]float64{fx.XM, fx.YM}, 2
		case fusion.FixHeading:
			f.z, f.dim = [3]float64{fx.HeadingRad}, 1
		case fusion.FixLandmark:
			l, found := lms[fx.LandmarkID]
			if !found || (fx.RangeM == nil && fx.BearingRad == nil) {
				continue
			}
			f.lm = l
			f.rng, f.brg = fx.RangeM != nil, fx.BearingRad != nil
			if f.rng {
				f.z[f.dim] = *fx.RangeM
				f.dim++
			}
			if f.brg {
				f.z[f.dim] = *fx.BearingRad
				f.dim++
			}
			if len(cov) == 0 && len(sen.Cov) == 4 && f.dim == 1 {
				c := sen.Cov[0]
				if f.brg {
					c = sen.Cov[3]
				}
				cov = []float64{c}
			}
		default:
			continue
		}
		if len(cov) == 0 {
			cov = sen.Cov
		}
		if v := survey[fx.LandmarkID]; f.kind == fusion.FixLandmark && f.rng && v > 0 && len(cov) == f.dim*f.dim {
			cov = append([]float64(nil), cov...)
			cov[0] += v
			if r := max(*fx.RangeM, minSurveyRangeM); f.brg {
				cov[3] += v / (r * r)
			}
		}
		if len(cov) != f.dim*f.dim || !whiten(&f.winv, cov, f.dim) {
			continue
		}
		if sen.CorrelatedFraction > 0 && !m.gaussMarkov(&f, sen) {
			continue
		}
		m.fixes = append(m.fixes, f)
	}
	slices.SortStableFunc(m.fixes, func(a, b sysFix) int { return cmp.Compare(a.stamp, b.stamp) })
}

// minSurveyRangeM bounds the range by which prepareFixes divides a survey
// error into bearing: a landmark a few centimetres away (or a range that
// says so) would otherwise give its bearing a variance of radians squared.
const minSurveyRangeM = 0.1

// gaussMarkov sets f.gm for its sensor's correlated error (fusion.Sensor:
// the stationary covariance CorrelatedFraction times the sensor's
// covariance, in the sensor's full measurement space, of which a landmark
// fix may carry only the range or the bearing); false if that covariance
// is not positive definite.
func (m *sysModel) gaussMarkov(f *sysFix, sen *fusion.Sensor) bool {
	d := len(sen.Cov)
	full := int(math.Round(math.Sqrt(float64(d))))
	if full*full != d || full > 3 {
		return false
	}
	c := mat.NewSymDense(full, nil)
	for i := range full {
		for j := i; j < full; j++ {
			c.SetSym(i, j, sen.CorrelatedFraction*sen.Cov[i*full+j])
		}
	}
	var ch mat.Cholesky
	if !ch.Factorize(c) {
		return false
	}
	var l mat.TriDense
	ch.LTo(&l)
	// comps: which of the sensor's components the fix's rows are.
	comps := [3]int{0, 1, 2}
	if f.kind == fusion.FixLandmark && !f.rng {
		comps[0] = 1
	}
	n := f.dim
	for a := range n {
		for k := range full {
			var v float64
			for b := 0; b <= a; b++ {
				v += f.winv[a*n+b] * l.At(comps[b], k)
			}
			f.gm[a*3+k] = v
		}
	}
	return true
}

// whiten writes the inverse of the Cholesky factor of the covariance c
// (n x n, row-major) into w; false if c is not positive definite.
func whiten(w *[9]float64, c []float64, n int) bool {
	var s mat.SymDense
	s.SetRawSymmetric(mat.NewSymDense(n, slices.Clone(c)).RawSymmetric())
	var ch mat.Cholesky
	if !ch.Factorize(&s) {
		return false
	}
	var l, li mat.TriDense
	ch.LTo(&l)
	if err := li.InverseTri(&l); err != nil {
		return false
	}
	for i := range n {
		for j := range n {
			w[i*n+j] = li.At(i, j)
		}
	}
	return true
}

// segments cuts the fixes into segments of about segS seconds of stamps,
// each with at least minSegFixes fixes (a short tail joins the segment
// before).
func (m *sysModel) segments(segS float64) {
	const minSegFixes = 6
	segNs := int64(segS * 1e9)
	count := 0
	for i := range m.fixes {
		f := &m.fixes[i]
		if len(m.segStart) == 0 || (f.stamp-m.segStart[len(m.segStart)-1] >= segNs && count >= minSegFixes) {
			m.segStart = append(m.segStart, f.stamp)
			count = 0
		}
		f.seg = len(m.segStart) - 1
		count++
	}
	if count < minSegFixes && len(m.segStart) > 1 {
		last := len(m.segStart) - 1
		for i := len(m.fixes) - count; i < len(m.fixes); i++ {
			m.fixes[i].seg = last - 1
		}
		m.segStart = m.segStart[:last]
	}
}

// globals lists the global parameters the run can have.
func (m *sysModel) globals(sensorsOnly bool) {
	add := func(k ParamKind, i int, v, step float64) int {
		p := sysParam{Param: Param{Kind: k, Index: i, Configured: v, Fitted: v}, step: step}
		describe(m.cfg, &p.Param)
		m.params = append(m.params, p)
		return len(m.params) - 1
	}
	hasStep := slices.ContainsFunc(m.ivs, func(iv sysInterval) bool { return iv.isStep })
	if !sensorsOnly {
		if m.nw > 0 && len(m.travel) > 0 {
			for i := range m.nw {
				m.wheelScale = append(m.wheelScale, add(WheelScale, i, 1, 1e-6))
			}
			m.spread = add(WheelSpread, 0, 1, 1e-6)
			if m.rotation {
				m.imuScale = add(IMUTurnScale, 0, 1, 1e-6)
			}
		}
		if hasStep {
			m.stepFwd = add(StepForwardScale, 0, 1, 1e-6)
			m.stepTurn = add(StepTurnScale, 0, 1, 1e-6)
		}
	}
	ns := len(m.cfg.Sensors)
	m.mountX, m.mountY, m.mHdg, m.latency = fill(ns, -1), fill(ns, -1), fill(ns, -1), fill(ns, -1)
	for si, s := range m.cfg.Sensors {
		if !slices.ContainsFunc(m.fixes, func(f sysFix) bool { return f.sensor == si }) {
			continue
		}
		if s.Kind != fusion.FixHeading {
			m.mountX[si] = add(MountX, si, s.Mount.X, 1e-6)
			m.mountY[si] = add(MountY, si, s.Mount.Y, 1e-6)
		}
		if s.Kind != fusion.FixPosition {
			m.mHdg[si] = add(MountHeading, si, s.Mount.Heading, 1e-6)
		}
		m.latency[si] = add(Latency, si, float64(s.LatencyNs)*1e-9, 2e-3)
	}
}

func fill(n, v int) []int {
	s := make([]int, n)
	for i := range s {
		s[i] = v
	}
	return s
}

// get returns global parameter i of g, or def when the parameter is absent.
func get(g []float64, i int, def float64) float64 {
	if i < 0 {
		return def
	}
	return g[i]
}

// solver returns the least-squares gain M (3 x rows) of the wheel rows
// under the parameters g: u = M v, v the row values (each wheel's travel
// times its scale, then the IMU's turn, then the no-side-slip row's 0),
// weighted by the configured noise rates.
func (m *sysModel) solver(g []float64) *mat.Dense {
	spread := get(g, m.spread, 1)
	nz := m.cfg.Noise
	def := fusion.DefaultNoise()
	or := func(v, d float64) float64 {
		if v > 0 {
			return v
		}
		return d
	}
	var rows [][3]float64
	var wts []float64
	for _, w := range m.cfg.Wheels {
		rows = append(rows, estimator.WheelCoef(w.XM*spread, w.YM*spread, w.DirectionRad))
		wts = append(wts, 1/or(nz.WheelVarM2PerM, def.WheelVarM2PerM))
	}
	if m.rotation {
		rows = append(rows, estimator.TurnCoef())
		wts = append(wts, 1/or(nz.IMUTurnVarRad2PerRad, def.IMUTurnVarRad2PerRad))
	}
	if m.cfg.NoSideSlip {
		rows = append(rows, estimator.LeftCoef())
		wts = append(wts, 1/or(nz.LateralSlipVarM2PerM, def.LateralSlipVarM2PerM))
	}
	a := mat.NewDense(len(rows), 3, nil)
	aw := mat.NewDense(len(rows), 3, nil)
	for i, r := range rows {
		a.SetRow(i, r[:])
		for j := range 3 {
			aw.Set(i, j, r[j]*wts[i])
		}
	}
	var n, inv, gain mat.Dense
	n.Mul(aw.T(), a)
	if err := inv.Inverse(&n); err != nil {
		panic("calib: the rows of a validated layout are singular")
	}
	gain.Mul(&inv, aw.T())
	return &gain
}

// deadReckon computes the poses at every interval's start and end from
// the identity at the first interval's start, under the parameters g.
func (m *sysModel) deadReckon(g []float64) {
	var gain *mat.Dense
	var v []float64
	if len(m.travel) > 0 {
		gain = m.solver(g)
		_, c := gain.Dims()
		v = make([]float64, c)
	}
	scale := make([]float64, m.nw)
	for i := range scale {
		scale[i] = get(g, idxOr(m.wheelScale, i), 1)
	}
	imuS, sf, st := get(g, m.imuScale, 1), get(g, m.stepFwd, 1), get(g, m.stepTurn, 1)
	var p estimator.Pose
	var hv float64
	var ex [2]float64
	for k := range m.ivs {
		iv := &m.ivs[k]
		if e := m.epochOf[k]; k == m.epochStart[e] {
			m.base[e], ex = hv, [2]float64{}
		}
		m.hv[k], m.ex[k] = hv, ex
		var u estimator.Step
		if iv.isStep {
			step := &m.steps[iv.off]
			u = estimator.Step{ForwardM: sf * step.ForwardM, LeftM: sf * step.LeftM, TurnRad: st * step.TurnRad}
		} else {
			for i := range m.nw {
				v[i] = scale[i] * m.travel[int(iv.off)+i]
			}
			if m.rotation {
				v[m.nw] = imuS * iv.imu
			}
			var s [3]float64
			for r := range 3 {
				row := gain.RawRowView(r)
				for c, x := range v {
					s[r] += row[c] * x
				}
			}
			u = estimator.Step{ForwardM: s[0], LeftM: s[1], TurnRad: s[2]}
		}
		m.p0[k], m.u[k] = p, u
		q := estimator.Advance(p, u)
		f := math.Exp(-(hv - m.base[m.epochOf[k]]) / 2)
		ex[0], ex[1] = ex[0]+f*(q.X-p.X), ex[1]+f*(q.Y-p.Y)
		hv += m.turnVar(k, g, gain)
		p = q
	}
	m.hv[len(m.ivs)], m.ex[len(m.ivs)] = hv, ex
	m.end = p
}

// epochs finds each segment's epoch of intervals (sysModel.hv): from the
// interval of its anchor stamp (the first that ends at or after it, as
// poseAt finds it) to the next epoch's start. A segment whose anchor
// shares its interval with the next one's has an empty epoch.
func (m *sysModel) epochs() {
	n := len(m.ivs)
	m.hv, m.ex = make([]float64, n+1), make([][2]float64, n+1)
	m.base, m.epochStart, m.epochOf = make([]float64, len(m.segStart)), make([]int, len(m.segStart)), make([]int32, n)
	for k, t := range m.segStart {
		m.epochStart[k], _ = slices.BinarySearchFunc(m.ivs, t, func(iv sysInterval, t int64) int { return cmp.Compare(iv.t1, t) })
	}
	e := 0
	for j := range m.epochOf {
		for e+1 < len(m.epochStart) && m.epochStart[e+1] <= j {
			e++
		}
		m.epochOf[j] = int32(e)
	}
	// Intervals before the first anchor belong to epoch 0, which starts
	// with them.
	m.epochStart[0] = 0
}

// turnVar returns the heading variance that interval k's step adds as the
// configuration's noise model states it: stepCov's turn entry, and the
// heading drift per second. g and gain are deadReckon's, which has set the
// step.
func (m *sysModel) turnVar(k int, g []float64, gain *mat.Dense) float64 {
	iv := &m.ivs[k]
	nz := m.cfg.Noise
	var cu [9]float64
	m.stepCov(k, g, gain, &nz, &cu)
	return cu[8] + m.cfg.HeadingDriftVarPerS()*float64(iv.t1-iv.t0)*1e-9
}

// expectedAt returns, after deadReckon, the expected position at t (ns;
// fractional; sysModel.hv) in its epoch's sum, the heading variance there
// and the epoch, clamped to the run as poseAt.
func (m *sysModel) expectedAt(t float64) (x, y, hv float64, epoch int) {
	k := m.intervalAt(t)
	n := len(m.ivs)
	if k >= n {
		return m.ex[n][0], m.ex[n][1], m.hv[n], int(m.epochOf[n-1])
	}
	iv := &m.ivs[k]
	e := int(m.epochOf[k])
	if t <= float64(iv.t0) {
		return m.ex[k][0], m.ex[k][1], m.hv[k], e
	}
	fr := (t - float64(iv.t0)) / float64(iv.t1-iv.t0)
	q := estimator.Advance(m.p0[k], m.u[k].Scale(fr))
	f := math.Exp(-(m.hv[k] - m.base[e]) / 2)
	return m.ex[k][0] + f*(q.X-m.p0[k].X), m.ex[k][1] + f*(q.Y-m.p0[k].Y), m.hv[k] + fr*(m.hv[k+1]-m.hv[k]), e
}

func idxOr(s []int, i int) int {
	if i < len(s) {
		return s[i]
	}
	return -1
}

// poseAt returns the dead-reckoned pose at t (ns; fractional), clamped to
// the run: inside an interval the arc model's fraction of its step (which
// composes exactly), in a gap the pose where the odometry stopped.
func (m *sysModel) poseAt(t float64) estimator.Pose {
	k := m.intervalAt(t)
	if k >= len(m.ivs) {
		return m.end
	}
	iv := &m.ivs[k]
	if t <= float64(iv.t0) {
		return m.p0[k]
	}
	f := (t - float64(iv.t0)) / float64(iv.t1-iv.t0)
	return estimator.Advance(m.p0[k], m.u[k].Scale(f))
}

// intervalAt returns the first interval that ends at or after t (ns;
// fractional), or len(ivs) when none does.
func (m *sysModel) intervalAt(t float64) int {
	k, _ := slices.BinarySearchFunc(m.ivs, t, func(iv sysInterval, t float64) int {
		if float64(iv.t1) < t {
			return -1
		}
		return 1
	})
	return k
}

// inverse returns the pose a^-1: Compose(a, inverse(a)) is the identity.
func inverse(a estimator.Pose) estimator.Pose {
	s, c := math.Sincos(a.Heading)
	return estimator.Pose{X: -c*a.X - s*a.Y, Y: s*a.X - c*a.Y, Heading: estimator.Wrap(-a.Heading)}
}

// anchorPoses computes, after deadReckon, the inverse of the dead-reckoned
// pose at each segment's anchor stamp.
func (m *sysModel) anchorPoses() {
	m.segInv, m.segEx = m.segInv[:0], m.segEx[:0]
	for _, t := range m.segStart {
		m.segInv = append(m.segInv, inverse(m.poseAt(float64(t))))
		x, y, hv, e := m.expectedAt(float64(t))
		if e != len(m.segEx) {
			hv = math.NaN() // its epoch is empty: relative does without
		}
		m.segEx = append(m.segEx, [3]float64{x, y, hv})
	}
}

// latencyWindowS is the span of run (seconds) over which the velocity that
// shifts a fix's prediction in latency is averaged (relative).
const latencyWindowS = 2.0

// relative returns, after anchorPoses, fix i's robot pose at its capture
// relative to its segment's anchor, under the global parameters g.
//
// The capture is at t = stamp - latency. The pose there is the dead
// reckoning at the reference t0 = stamp - lat0 (the sensor's latency when
// the fit last re-weighted), advanced by t - t0 at the mean velocity of
// the dead reckoning over latencyWindowS about t0; at the solution lat0
// is the latency and the pose is the dead reckoning's own. Taking the
// dead reckoning's pose at t itself makes the prediction follow the
// odometry's velocity over one interval, which its noise dominates (a 0.4
// m track's wheels at 5 mm per root metre give a heading rate that errs by
// 0.16 rad/s over 5 ms, a third of a greenhouse turn's rate): the cost
// then has local minima in the latency a few milliseconds apart, and its
// curvature counts that noise as information. Over 16 seeds of two-minute
// runs (DEVELOPERS.md, "Design: Systematic parameters") the latency's RMS
// error over standard error was 3.77 so; averaged over 0.2, 0.5, 1 and 2
// s it was 1.61, 1.51 (both before the stated-noise sandwich), 1.16 and
// 0.98, while the error itself stayed at 10.4 to 10.8 ms: what noise a
// window leaves still counts as information, and 2 s (0.008 rad/s and 2
// mm/s of noise left) leaves little.
//
// The position is the expected one under the heading noise since the
// anchor (sysModel.hv; DEVELOPERS.md, "Design: Systematic parameters"):
// each interval's displacement damped by exp(-s2/2), s2 the heading
// variance accumulated from the anchor to it. A capture before its anchor
// or outside its anchor's epoch keeps the dead-reckoned position.
func (m *sysModel) relative(i int, g []float64) estimator.Pose {
	f := &m.fixes[i]
	t := float64(f.stamp) - get(g, m.latency[f.sensor], 0)*1e9
	t0 := float64(f.stamp) - m.lat0[f.sensor]*1e9
	q := m.poseAt(t0)
	p := q
	if m.latency[f.sensor] >= 0 && t != t0 {
		p = estimator.Advance(q, m.velocity(t0).Scale((t-t0)*1e-9))
	}
	rel := estimator.Compose(m.segInv[f.seg], p)
	// The expected position under the heading noise (sysModel.hv), where
	// the capture follows the anchor in the anchor's epoch.
	a := &m.segEx[f.seg]
	x, y, hv, e := m.expectedAt(t0)
	if e != f.seg || !(hv >= a[2]) || t0 < float64(m.segStart[f.seg]) {
		return rel
	}
	fa, fq := math.Exp((a[2]-m.base[e])/2), math.Exp(-(hv-a[2])/2)
	wx := fa*(x-a[0]) + fq*(p.X-q.X)
	wy := fa*(y-a[1]) + fq*(p.Y-q.Y)
	s, c := math.Sincos(m.segInv[f.seg].Heading)
	rel.X, rel.Y = c*wx-s*wy, s*wx+c*wy
	return rel
}

// velocity returns, after deadReckon, the dead reckoning's mean body
// velocity (per second, in the frame of its pose at t) over
// latencyWindowS about t (ns), clamped to the run: the arc from the pose
// at the window's start to the one at its end, whose chord lies along the
// middle heading.
func (m *sysModel) velocity(t float64) estimator.Step {
	half := latencyWindowS / 2 * 1e9
	ta := math.Max(t-half, float64(m.ivs[0].t0))
	tb := math.Min(t+half, float64(m.ivs[len(m.ivs)-1].t1))
	if tb <= ta {
		return estimator.Step{}
	}
	d := estimator.Compose(inverse(m.poseAt(ta)), m.poseAt(tb))
	turn := estimator.Wrap(d.Heading)
	s, c := math.Sincos(turn / 2)
	arc := 1.0 // arc length over chord length
	if math.Abs(turn) > 1e-9 {
		arc = (turn / 2) / s
	}
	dt := (tb - ta) * 1e-9
	return estimator.Step{ForwardM: arc * (c*d.X + s*d.Y) / dt, LeftM: arc * (c*d.Y - s*d.X) / dt, TurnRad: turn / dt}
}

// residual writes fix i's whitened residual (measurement less prediction,
// angles wrapped) for the robot pose p into e and returns its dimension;
// false if the prediction is degenerate (the sensor on its landmark).
func (m *sysModel) residual(i int, g []float64, p estimator.Pose, e *[3]float64) (int, bool) {
	f := &m.fixes[i]
	mt := f.mount
	s := &m.cfg.Sensors[f.sensor]
	mt.X += get(g, m.mountX[f.sensor], s.Mount.X) - s.Mount.X
	mt.Y += get(g, m.mountY[f.sensor], s.Mount.Y) - s.Mount.Y
	mt.Heading += get(g, m.mHdg[f.sensor], s.Mount.Heading) - s.Mount.Heading
	q := estimator.Compose(p, mt)
	var r [3]float64
	switch f.kind {
	case fusion.FixPose:
		r = [3]float64{f.z[0] - q.X, f.z[1] - q.Y, estimator.Wrap(f.z[2] - q.Heading)}
	case fusion.FixPosition:
		r = [3]float64{f.z[0] - q.X, f.z[1] - q.Y}
	case fusion.FixHeading:
		r = [3]float64{estimator.Wrap(f.z[0] - q.Heading)}
	case fusion.FixLandmark:
		dx, dy := f.lm[0]-q.X, f.lm[1]-q.Y
		rg := math.Hypot(dx, dy)
		if rg < 1e-6 {
			return 0, false
		}
		k := 0
		if f.rng {
			r[k] = f.z[k] - rg
			k++
		}
		if f.brg {
			r[k] = estimator.Wrap(f.z[k] - (math.Atan2(dy, dx) - q.Heading))
		}
	}
	n := f.dim
	for a := range n {
		var v float64
		for b := 0; b <= a; b++ {
			v += f.winv[a*n+b] * r[b]
		}
		e[a] = v
	}
	return n, true
}
