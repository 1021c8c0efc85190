package calib

import (
	"cmp"
	"fmt"
	"math"
	"slices"
	"strings"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// Finding is one result of Diagnose: a wiring mistake the run shows, or a
// check the run could not make.
type Finding struct {
	// Field is the configuration field (or the sensor) to change, as the
	// configuration file spells it; alternatives are joined by " or ".
	Field string
	// Sentence says what is wrong and what to change.
	Sentence string
	// Slope and R2 are the ordinary least-squares slope (through the
	// origin) and coefficient of determination of the comparison that shows
	// the mistake: the IMU's turn against the wheels' turn (radians per
	// radian) for the IMU and for swapped wheels, a wheel's reported travel
	// against the travel the other rows predict for it (metres per metre)
	// for a wheel; for DiagnoseSensors, the fitted mount offset (metres)
	// or latency (seconds). NaN where the layout gives no such comparison.
	Slope, R2 float64
	// Undetermined marks a check the run could not make (Sentence says
	// why); it is not a mistake found.
	Undetermined bool
}

// Thresholds of the diagnosis.
const (
	// minTurnRad is the total turn (IMU or wheels) a run needs to check the
	// IMU's sign and unit, and swapped wheels: half a turn.
	minTurnRad = math.Pi
	// minTravelM is the total travel a wheel needs for its sign to be
	// checked.
	minTravelM = 1.0
	// better is how many times smaller the residual sum of squares of a
	// corrected run must be than the run as configured for a mistake to be
	// named; alike is the factor within which two corrections explain the
	// run equally well.
	better, alike = 4.0, 2.0
)

// mistake is one wiring mistake that Diagnose considers: the samples are
// corrected by negating wheel neg, swapping wheels swap, and multiplying the
// IMU's turns by imuScale.
type mistake struct {
	neg      int
	swap     [2]int
	imuScale float64
}

func (m mistake) isIMU() bool { return m.imuScale != 1 }

// Diagnose looks in a run for the common wiring mistakes: a wheel counting
// backwards, left and right wheels swapped, an IMU turning the other way or
// reporting degrees. odo are the run's odometry samples in stamp order with
// wheel travels or counts (and the IMU heading, in rotation mode); imu are
// its IMU heading samples (absolute mode). It returns the findings, none for
// a run that shows no mistake.
//
// Method: the run is cut into half-second intervals; in each, every wheel's
// travel and the IMU's turn are rows of the body step (DEVELOPERS.md,
// "Design: Motion prediction"), with the no-side-slip row if configured.
// With more rows than the step's three unknowns, the rows disagree by a
// residual; ordinary least squares in each interval gives its sum of
// squares over the run (less the worst twentieth of the intervals) as
// configured and with each candidate mistake undone. A correction that shrinks the sum at least fourfold names
// its mistake; corrections within a factor two of the best are alternatives
// the run cannot tell apart. Left and right wheels swapped and an IMU
// turning the other way are such a pair on a layout symmetric about its
// forward axis: mirrored, each describes the run exactly. A mistake whose
// correction moves no residual (a wheel that no other row sees the motion
// of, or a layout with no spare row) is reported as undetermined, as is
// one the run does not excite (too little turning or travel). An IMU that
// reports degrees also shows on a layout without spare rows: its readings
// wrap round at 180. One mistake is named per run: a run with two shows
// neither clearly, and after fixing one a new run shows the other. A
// configuration that does not validate is itself the finding.
func Diagnose(cfg fusion.Config, odo []fusion.Odometry, imu []fusion.Heading) []Finding {
	if err := cfg.Validate(); err != nil {
		return []Finding{{Field: fusion.FieldOf(err), Sentence: err.Error(), Slope: math.NaN(), R2: math.NaN()}}
	}
	n := len(cfg.Wheels)
	if n == 0 {
		return []Finding{{Field: "wheels", Sentence: "the robot has no wheels: nothing to diagnose from body steps", Slope: math.NaN(), R2: math.NaN(), Undetermined: true}}
	}
	d := newDiagnosis(&cfg, odo, imu)
	if len(d.chunks) == 0 {
		return []Finding{{Field: "wheels", Sentence: "the run has no odometry intervals with wheel travels", Slope: math.NaN(), R2: math.NaN(), Undetermined: true}}
	}
	var out []Finding
	base := d.rss(mistake{neg: -1, swap: [2]int{-1, -1}, imuScale: 1})
	type scored struct {
		m   mistake
		rss float64
	}
	var found []scored
	for _, m := range d.candidates() {
		moved, rss := d.moved(m), d.rss(m)
		if moved <= 1e-9*(d.size()+1e-12) {
			if f, ok := d.unobservable(m); ok {
				out = append(out, f)
			}
			continue
		}
		if m.isIMU() || m.swap[0] >= 0 {
			if d.turn < minTurnRad {
				if m.imuScale == -1 {
					out = append(out, d.note("imu", "the run turns %.2f rad, too little to check the IMU and the wheels' order: turn at least half a turn each way", d.turn))
				}
				continue
			}
		} else if d.travel[m.neg] < minTravelM {
			out = append(out, d.note(wheelField(m.neg), "%s rolls %.2f m in the run, too little to check its direction: drive at least %g m", d.wheelName(m.neg), d.travel[m.neg], minTravelM))
			continue
		}
		if rss*better < base {
			found = append(found, scored{m, rss})
		}
	}
	if len(found) > 0 {
		best := found[0].rss
		for _, s := range found {
			best = math.Min(best, s.rss)
		}
		var group []mistake
		for _, s := range found {
			if s.rss <= alike*best+1e-12 {
				group = append(group, s.m)
			}
		}
		out = append(out, d.finding(group))
	}
	if d.hasIMU && !d.named && d.head.degreeWraps > 0 && d.head.maxAbs > math.Pi+0.05 && d.head.maxAbs <= 180.5 {
		out = append(out, Finding{Field: "imu", Slope: math.NaN(), R2: math.NaN(),
			Sentence: fmt.Sprintf("the IMU reports degrees (its heading reaches %.1f and wraps round at 180): convert to radians before sending", d.head.maxAbs)})
	}
	return out
}

// diagnosis holds a run cut into intervals and the layout's rows.
type diagnosis struct {
	cfg    *fusion.Config
	chunks []chunk
	head   headings
	hasIMU bool
	// named: a mistake was named from the residuals.
	named bool
	// a holds the rows' coefficients (wheels, then the IMU's turn scaled by
	// lever, then no side slip); resid projects row values onto the
	// residual space, I - A (A^T A)^-1 A^T.
	a     *mat.Dense
	resid *mat.Dense
	lever float64
	// turn is the run's total turn (IMU, else wheels; rad); travel is each
	// wheel's total travel (m).
	turn   float64
	travel []float64
}

func newDiagnosis(cfg *fusion.Config, odo []fusion.Odometry, imu []fusion.Heading) *diagnosis {
	d := &diagnosis{cfg: cfg, chunks: chunks(cfg, odo), lever: 0.1}
	d.head = imuHeadings(odo, imu)
	d.hasIMU = cfg.IMU != fusion.IMUNone && len(d.head.t) > 1
	for _, w := range cfg.Wheels {
		d.lever = math.Max(d.lever, math.Hypot(w.XM, w.YM))
	}
	if d.hasIMU {
		for k := range d.chunks {
			c := &d.chunks[k]
			c.imu = d.head.at(c.t1) - d.head.at(c.t0)
		}
		// Intervals the IMU does not cover are left out.
		kept := d.chunks[:0]
		for _, c := range d.chunks {
			if !math.IsNaN(c.imu) {
				kept = append(kept, c)
			}
		}
		d.chunks = kept
	}
	var rows [][3]float64
	for _, w := range cfg.Wheels {
		rows = append(rows, estimator.WheelCoef(w.XM, w.YM, w.DirectionRad))
	}
	if d.hasIMU {
		rows = append(rows, [3]float64{0, 0, d.lever})
	}
	if cfg.NoSideSlip {
		rows = append(rows, estimator.LeftCoef())
	}
	d.a = mat.NewDense(len(rows), 3, nil)
	for i, r := range rows {
		d.a.SetRow(i, r[:])
	}
	d.resid = residualMaker(d.a)
	d.travel = make([]float64, len(cfg.Wheels))
	// The run's turn: the wheels' where they determine it, else the IMU's
	// (in degrees if its headings go beyond a turn either way).
	turnA := d.turnSolver()
	imuUnit := 1.0
	if d.head.maxAbs > 2*math.Pi+0.1 {
		imuUnit = math.Pi / 180
	}
	for _, c := range d.chunks {
		for i, v := range c.travel {
			d.travel[i] += math.Abs(v)
		}
		switch {
		case turnA != nil:
			d.turn += math.Abs(mat.Dot(turnA, mat.NewVecDense(len(c.travel), c.travel)))
		case d.hasIMU:
			d.turn += math.Abs(c.imu) * imuUnit
		}
	}
	return d
}

// residualMaker returns I - A (A^T A)^+ A^T for the rows A (zero when A has
// no spare row).
func residualMaker(a *mat.Dense) *mat.Dense {
	m, _ := a.Dims()
	var svd mat.SVD
	if !svd.Factorize(a, mat.SVDThin) {
		panic("calib: the rows of a validated layout could not be factorised")
	}
	var u mat.Dense
	svd.UTo(&u)
	sv := svd.Values(nil)
	p := mat.NewDense(m, m, nil)
	for i := range m {
		p.Set(i, i, 1)
	}
	for k, s := range sv {
		if s <= 1e-9*sv[0] {
			continue
		}
		col := u.ColView(k)
		var outer mat.Dense
		outer.Outer(1, col, col)
		p.Sub(p, &outer)
	}
	return p
}

// values returns the row values of chunk c with mistake m undone.
func (d *diagnosis) values(c *chunk, m mistake) *mat.VecDense {
	rows, _ := d.a.Dims()
	v := mat.NewVecDense(rows, nil)
	for i, t := range c.travel {
		v.SetVec(i, t)
	}
	if m.neg >= 0 {
		v.SetVec(m.neg, -c.travel[m.neg])
	}
	if m.swap[0] >= 0 {
		v.SetVec(m.swap[0], c.travel[m.swap[1]])
		v.SetVec(m.swap[1], c.travel[m.swap[0]])
	}
	if d.hasIMU {
		v.SetVec(len(c.travel), c.imu*m.imuScale*d.lever)
	}
	return v
}

// rss is the residual sum of squares (m^2) over the run with m undone,
// leaving out the worst twentieth of the intervals: a wheel slip, or an IMU
// heading wrapping round in units the unwrapping did not expect (one
// converted to radians twice wraps at about 0.055), spoils only a few
// (a trimmed sum, common practice for robust fits).
func (d *diagnosis) rss(m mistake) float64 {
	sum, _ := d.trimmed(m)
	return sum
}

// trimmed returns rss(m) and which intervals it keeps.
func (d *diagnosis) trimmed(m mistake) (float64, []bool) {
	sq := make([]float64, len(d.chunks))
	var r mat.VecDense
	for k := range d.chunks {
		r.MulVec(d.resid, d.values(&d.chunks[k], m))
		sq[k] = mat.Dot(&r, &r)
	}
	order := make([]int, len(sq))
	for k := range order {
		order[k] = k
	}
	slices.SortStableFunc(order, func(a, b int) int { return cmp.Compare(sq[a], sq[b]) })
	keep := make([]bool, len(sq))
	var sum float64
	for _, k := range order[:len(sq)-len(sq)/20] {
		sum += sq[k]
		keep[k] = true
	}
	return sum, keep
}

// moved is how far undoing m moves the residuals, as a sum of squares.
func (d *diagnosis) moved(m mistake) float64 {
	id := mistake{neg: -1, swap: [2]int{-1, -1}, imuScale: 1}
	var sum float64
	var diff, r mat.VecDense
	for k := range d.chunks {
		diff.SubVec(d.values(&d.chunks[k], m), d.values(&d.chunks[k], id))
		r.MulVec(d.resid, &diff)
		sum += mat.Dot(&r, &r)
	}
	return sum
}

// size is the run's row values' sum of squares.
func (d *diagnosis) size() float64 {
	id := mistake{neg: -1, swap: [2]int{-1, -1}, imuScale: 1}
	var sum float64
	for k := range d.chunks {
		v := d.values(&d.chunks[k], id)
		sum += mat.Dot(v, v)
	}
	return sum
}

// candidates lists the mistakes Diagnose considers.
func (d *diagnosis) candidates() []mistake {
	var ms []mistake
	n := len(d.cfg.Wheels)
	for i := range n {
		ms = append(ms, mistake{neg: i, swap: [2]int{-1, -1}, imuScale: 1})
	}
	for i := range n {
		for j := i + 1; j < n; j++ {
			ms = append(ms, mistake{neg: -1, swap: [2]int{i, j}, imuScale: 1})
		}
	}
	if d.hasIMU {
		for _, s := range []float64{-1, math.Pi / 180, -math.Pi / 180, 180 / math.Pi} {
			ms = append(ms, mistake{neg: -1, swap: [2]int{-1, -1}, imuScale: s})
		}
	}
	return ms
}

// unobservable returns the note for a mistake the layout cannot show, for
// wheel signs and the IMU's sign (a swap or a unit that cannot show needs
// no note of its own).
func (d *diagnosis) unobservable(m mistake) (Finding, bool) {
	switch {
	case m.neg >= 0:
		return d.note(wheelField(m.neg), "the run cannot check whether %s counts backwards: no other row of the layout sees its motion (add a wheel, or check it by pushing the robot forward by hand)", d.wheelName(m.neg)), true
	case m.imuScale == -1:
		return d.note("imu", "the run cannot check the IMU's sign: the wheels do not determine the turn (turn the robot left by hand: its heading must grow)"), true
	}
	return Finding{}, false
}

func (d *diagnosis) note(field, format string, args ...any) Finding {
	return Finding{Field: field, Sentence: fmt.Sprintf(format, args...), Slope: math.NaN(), R2: math.NaN(), Undetermined: true}
}

func wheelField(i int) string { return fmt.Sprintf("wheels[%d].direction_rad", i) }

// wheelName is "wheels[i] (name)".
func (d *diagnosis) wheelName(i int) string {
	if name := d.cfg.Wheels[i].Name; name != "" {
		return fmt.Sprintf("wheels[%d] (%s)", i, name)
	}
	return fmt.Sprintf("wheels[%d]", i)
}

// finding words the mistakes of group, alternatives that explain the run
// equally well.
func (d *diagnosis) finding(group []mistake) Finding {
	var fields, sentences []string
	for _, m := range group {
		switch {
		case m.neg >= 0:
			fields = append(fields, wheelField(m.neg))
			sentences = append(sentences, fmt.Sprintf("%s counts backwards: add pi to %s, or negate its counts in the firmware", d.wheelName(m.neg), wheelField(m.neg)))
		case m.swap[0] >= 0:
			fields = append(fields, fmt.Sprintf("wheels[%d] and wheels[%d]", m.swap[0], m.swap[1]))
			sentences = append(sentences, fmt.Sprintf("%s and %s are swapped: exchange their entries in wheels, or their wires", d.wheelName(m.swap[0]), d.wheelName(m.swap[1])))
		case m.imuScale == -1:
			fields = append(fields, "imu")
			sentences = append(sentences, "the IMU turns the other way: negate its heading in the firmware")
		case m.imuScale == math.Pi/180:
			fields = append(fields, "imu")
			sentences = append(sentences, "the IMU reports degrees: convert to radians before sending")
		case m.imuScale == -math.Pi/180:
			fields = append(fields, "imu")
			sentences = append(sentences, "the IMU reports degrees and turns the other way: convert to radians and negate its heading before sending")
		default:
			fields = append(fields, "imu")
			sentences = append(sentences, "the IMU's turns are 57.3 times too small (radians converted as if they were degrees): send radians as read")
		}
	}
	d.named = true
	f := Finding{Field: strings.Join(fields, " or "), Sentence: sentences[0]}
	if len(sentences) > 1 {
		f.Sentence = "either " + strings.Join(sentences, "; or ") + " (the wheels and the IMU alone cannot tell these apart: mirrored, each describes the run; spin the robot left by hand: its IMU heading must grow, the left wheel roll backwards and the right forwards)"
	}
	f.Slope, f.R2 = d.evidence(group[0])
	return f
}

// evidence returns the slope through the origin and R^2 of the comparison
// that shows mistake m (see Finding) over the intervals rss(m) keeps, NaN
// when the layout gives none.
func (d *diagnosis) evidence(m mistake) (slope, r2 float64) {
	var x, y []float64
	_, keep := d.trimmed(m)
	if m.neg >= 0 {
		sol := d.predictor(m.neg)
		if sol == nil {
			return math.NaN(), math.NaN()
		}
		id := mistake{neg: -1, swap: [2]int{-1, -1}, imuScale: 1}
		for k := range d.chunks {
			if !keep[k] {
				continue
			}
			v := d.values(&d.chunks[k], id)
			x = append(x, mat.Dot(sol, v))
			y = append(y, d.chunks[k].travel[m.neg])
		}
	} else {
		turnA := d.turnSolver()
		if turnA == nil || !d.hasIMU {
			return math.NaN(), math.NaN()
		}
		for k, c := range d.chunks {
			if !keep[k] {
				continue
			}
			x = append(x, mat.Dot(turnA, mat.NewVecDense(len(c.travel), c.travel)))
			y = append(y, c.imu)
		}
	}
	_, slope = stat.LinearRegression(x, y, nil, true)
	return slope, stat.RSquared(x, y, nil, 0, slope)
}

// turnSolver returns the weights that give the turn from the wheel travels
// (with the no-side-slip row, whose value is zero), nil if the wheels do
// not determine it.
func (d *diagnosis) turnSolver() *mat.VecDense {
	n := len(d.cfg.Wheels)
	var rows [][3]float64
	for _, w := range d.cfg.Wheels {
		rows = append(rows, estimator.WheelCoef(w.XM, w.YM, w.DirectionRad))
	}
	if d.cfg.NoSideSlip {
		rows = append(rows, estimator.LeftCoef())
	}
	p := pseudoInverse(rows)
	if p == nil {
		return nil
	}
	w := mat.NewVecDense(n, nil)
	for i := range n {
		w.SetVec(i, p.At(2, i))
	}
	return w
}

// predictor returns the weights over all row values (the wheel's own
// weight zero) that predict wheel i's travel from the other rows, nil if
// they do not determine the step.
func (d *diagnosis) predictor(i int) *mat.VecDense {
	rows, _ := d.a.Dims()
	var others [][3]float64
	var idx []int
	for r := range rows {
		if r == i {
			continue
		}
		others = append(others, [3]float64{d.a.At(r, 0), d.a.At(r, 1), d.a.At(r, 2)})
		idx = append(idx, r)
	}
	p := pseudoInverse(others)
	if p == nil {
		return nil
	}
	coef := mat.NewVecDense(3, d.a.RawRowView(i))
	w := mat.NewVecDense(rows, nil)
	for k, r := range idx {
		var s float64
		for j := range 3 {
			s += coef.AtVec(j) * p.At(j, k)
		}
		w.SetVec(r, s)
	}
	return w
}

// pseudoInverse returns (A^T A)^-1 A^T for the rows, nil when they do not
// determine the step.
func pseudoInverse(rows [][3]float64) *mat.Dense {
	if len(rows) < 3 {
		return nil
	}
	a := mat.NewDense(len(rows), 3, nil)
	for i, r := range rows {
		a.SetRow(i, r[:])
	}
	var ata, inv mat.Dense
	ata.Mul(a.T(), a)
	var svd mat.SVD
	if !svd.Factorize(&ata, mat.SVDNone) {
		return nil
	}
	if sv := svd.Values(nil); sv[2] < 1e-9*sv[0] {
		return nil
	}
	if err := inv.Inverse(&ata); err != nil {
		return nil
	}
	var p mat.Dense
	p.Mul(&inv, a.T())
	return &p
}
