package calib

import (
	"fmt"
	"math"
	"slices"
	"strings"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// sysSolver holds the fit's state: the parameter vector (globals, then
// three per segment anchor), the fixes' weights and the scratch of one
// evaluation.
type sysSolver struct {
	m     *sysModel
	opt   SystematicOptions
	ng, p int
	x     []float64
	prior []float64 // prior standard deviation of each global
	w     []float64 // each fix's weight
	// e, dim, ok: each fix's whitened residual at the last evaluation;
	// rel its robot pose relative to its segment's anchor.
	e   [][3]float64
	dim []int
	ok  []bool
	rel []estimator.Pose
	// jac holds each fix's Jacobian rows, 3 x (ng + 3), row-major.
	jac []float64
	// blocks are the segments' correlated residuals (segBlock), built at
	// each re-weighting; drift is each fix's drift covariance in its
	// whitened residual (zero before the first blocks).
	blocks []segBlock
	drift  [][9]float64
	// cov is the scratch in which each segment's covariance is built
	// before its factor (block).
	cov mat.SymDense
	// noise is each fix's own error covariance in its whitened residual
	// (I for a white sensor; sysModel.ownNoise).
	noise      [][9]float64
	s2         float64
	iterations int
	converged  bool
	outliers   int
}

func newSysSolver(m *sysModel, opt SystematicOptions) *sysSolver {
	ng := len(m.params)
	s := &sysSolver{m: m, opt: opt, ng: ng, p: ng + 3*len(m.segStart), s2: 1}
	s.x = make([]float64, s.p)
	for j, pr := range m.params {
		s.x[j] = pr.Configured
		s.prior = append(s.prior, priorFactor*pr.Bound)
	}
	n := len(m.fixes)
	s.w = make([]float64, n)
	for i := range s.w {
		s.w[i] = 1
	}
	s.e, s.dim, s.ok, s.rel = make([][3]float64, n), make([]int, n), make([]bool, n), make([]estimator.Pose, n)
	s.jac = make([]float64, n*3*(ng+3))
	s.drift = make([][9]float64, n)
	s.noise = make([][9]float64, n)
	for i := range s.noise {
		s.noise[i] = m.ownNoise(i)
	}
	s.initAnchors()
	return s
}

func (s *sysSolver) anchors(x []float64) []estimator.Pose {
	a := make([]estimator.Pose, len(s.m.segStart))
	for k := range a {
		o := s.ng + 3*k
		a[k] = estimator.Pose{X: x[o], Y: x[o+1], Heading: x[o+2]}
	}
	return a
}

// initAnchors starts each segment's anchor where the odometry from the
// configured start pose puts it, or, with pose fixes, at the median of the
// anchors each of its pose fixes implies (robust to outlying fixes), or,
// with position fixes and landmarks seen in range and bearing, at the
// rigid motion that carries the points they place in the anchor's frame
// onto where they are (registerAnchor). Dead reckoning from the start of
// the run is no start for a segment minutes in: with the scales as
// configured, not as they are (the fit is there to find them), its heading
// may be off by any angle, and from there the fit of a landmark sensor's
// bearings can settle in a wrong minimum (a ten-minute run whose body
// steps were 11% long ended with every fix tens of standard deviations
// off and a latency of -0.7 s).
func (s *sysSolver) initAnchors() {
	m := s.m
	g := s.x[:s.ng]
	m.deadReckon(g)
	m.anchorPoses()
	for k, t := range m.segStart {
		a := estimator.Compose(m.cfg.StartPose, m.poseAt(float64(t)))
		var xs, ys, hs []float64
		var local, world [][2]float64
		for i := range m.fixes {
			f := &m.fixes[i]
			if f.seg != k {
				continue
			}
			switch {
			case f.kind == fusion.FixPose:
				robot := estimator.Detach(estimator.Pose{X: f.z[0], Y: f.z[1], Heading: f.z[2]}, f.mount)
				c := estimator.Compose(robot, inverse(m.relative(i, g)))
				xs, ys = append(xs, c.X), append(ys, c.Y)
				hs = append(hs, estimator.Wrap(c.Heading-a.Heading))
			case f.kind == fusion.FixPosition:
				q := estimator.Compose(m.relative(i, g), f.mount)
				local, world = append(local, [2]float64{q.X, q.Y}), append(world, [2]float64{f.z[0], f.z[1]})
			case f.kind == fusion.FixLandmark && f.rng && f.brg:
				sn, cs := math.Sincos(f.z[1])
				q := estimator.Compose(estimator.Compose(m.relative(i, g), f.mount), estimator.Pose{X: f.z[0] * cs, Y: f.z[0] * sn})
				local, world = append(local, [2]float64{q.X, q.Y}), append(world, f.lm)
			}
		}
		switch {
		case len(xs) > 0:
			a = estimator.Pose{X: median(xs), Y: median(ys), Heading: estimator.Wrap(a.Heading + median(hs))}
		case len(local) > 0:
			a = registerAnchor(local, world, a.Heading)
		}
		o := s.ng + 3*k
		s.x[o], s.x[o+1], s.x[o+2] = a.X, a.Y, a.Heading
	}
}

// registerAnchor returns the rigid motion a (rotation, then translation)
// that carries the points local onto world in least squares, in closed
// form (S. Umeyama, IEEE Transactions on Pattern Analysis and Machine
// Intelligence 13(4), 1991, without the scale), robust to outlying points:
// fitted to all, then again to those within three times the median
// distance (and 5 cm) of where the last fit put them, twice. When the
// points kept lie within 0.1 m (root mean square) of their centroid in
// the anchor's frame (one landmark seen again and again) the rotation is
// not determined: heading, the dead reckoning's, is kept, with the median
// translation.
func registerAnchor(local, world [][2]float64, heading float64) estimator.Pose {
	keep := make([]bool, len(local))
	for i := range keep {
		keep[i] = true
	}
	d := make([]float64, len(local))
	for round := 0; ; round++ {
		a := rigidFit(local, world, keep, heading)
		if round == 2 {
			return a
		}
		for i, l := range local {
			p := estimator.Compose(a, estimator.Pose{X: l[0], Y: l[1]})
			d[i] = math.Hypot(p.X-world[i][0], p.Y-world[i][1])
		}
		limit := math.Max(3*median(d), 0.05)
		kept := 0
		for i := range keep {
			if keep[i] = d[i] <= limit; keep[i] {
				kept++
			}
		}
		if kept < 2 {
			return a
		}
	}
}

// rigidFit is one fit of registerAnchor to the points kept.
func rigidFit(local, world [][2]float64, keep []bool, heading float64) estimator.Pose {
	var n, lx, ly, wx, wy float64
	for i, k := range keep {
		if k {
			n++
			lx, ly, wx, wy = lx+local[i][0], ly+local[i][1], wx+world[i][0], wy+world[i][1]
		}
	}
	lx, ly, wx, wy = lx/n, ly/n, wx/n, wy/n
	var sxx, sxy, syx, syy, spread float64
	for i, k := range keep {
		if k {
			px, py := local[i][0]-lx, local[i][1]-ly
			qx, qy := world[i][0]-wx, world[i][1]-wy
			sxx, sxy, syx, syy = sxx+px*qx, sxy+px*qy, syx+py*qx, syy+py*qy
			spread += px*px + py*py
		}
	}
	if spread/n >= 0.01 {
		th := math.Atan2(sxy-syx, sxx+syy)
		c := estimator.Compose(estimator.Pose{Heading: th}, estimator.Pose{X: lx, Y: ly})
		return estimator.Pose{X: wx - c.X, Y: wy - c.Y, Heading: th}
	}
	var dx, dy []float64
	for i, k := range keep {
		if k {
			c := estimator.Compose(estimator.Pose{Heading: heading}, estimator.Pose{X: local[i][0], Y: local[i][1]})
			dx, dy = append(dx, world[i][0]-c.X), append(dy, world[i][1]-c.Y)
		}
	}
	return estimator.Pose{X: median(dx), Y: median(dy), Heading: heading}
}

func median(v []float64) float64 {
	c := slices.Clone(v)
	slices.Sort(c)
	n := len(c)
	if n%2 == 1 {
		return c[n/2]
	}
	return (c[n/2-1] + c[n/2]) / 2
}

// evaluate computes every fix's whitened residual at x (into e, dim, ok
// and rel) and returns the weighted cost, prior included.
func (s *sysSolver) evaluate(x []float64, e [][3]float64) float64 {
	s.m.deadReckon(x[:s.ng])
	return s.predict(x, e)
}

// predict is evaluate on the dead reckoning already done: for parameters
// that do not enter it (mounts and latencies).
func (s *sysSolver) predict(x []float64, e [][3]float64) float64 {
	m := s.m
	g := x[:s.ng]
	anchors := s.anchors(x)
	m.anchorPoses()
	for i := range m.fixes {
		rel := m.relative(i, g)
		s.rel[i] = rel
		d, ok := m.residual(i, g, estimator.Compose(anchors[m.fixes[i].seg], rel), &e[i])
		s.dim[i], s.ok[i] = d, ok
		if !ok {
			e[i] = [3]float64{}
		}
	}
	return s.blockCost(e) + s.priorCost(x)
}

// blockCost is the generalised least-squares cost of the residuals e over
// the segments' blocks: sum |L^-1 e_seg|^2.
func (s *sysSolver) blockCost(e [][3]float64) float64 {
	var cost float64
	for bi := range s.blocks {
		b := &s.blocks[bi]
		if b.rows == 0 || !b.ok {
			continue
		}
		y := s.gather(b, e)
		b.l.solveVec(y.RawVector().Data)
		cost += mat.Dot(y, y)
	}
	return cost
}

// gather returns the block's residuals as one vector.
func (s *sysSolver) gather(b *segBlock, e [][3]float64) *mat.VecDense {
	v := mat.NewVecDense(b.rows, nil)
	for n, i := range b.fixes {
		for r := range s.dim[i] {
			v.SetVec(b.off[n]+r, e[i][r])
		}
	}
	return v
}

func (s *sysSolver) priorCost(x []float64) float64 {
	var c float64
	for j, pr := range s.m.params {
		r := (x[j] - pr.Configured) / s.prior[j]
		c += r * r
	}
	return c
}

// jacobian fills jac at x by forward differences; evaluate(x, s.e) must
// have run last.
func (s *sysSolver) jacobian(x []float64) {
	m := s.m
	ng := s.ng
	cols := ng + 3
	n := len(m.fixes)
	base := slices.Clone(s.e)
	baseRel := slices.Clone(s.rel)
	ep := make([][3]float64, n)
	xp := slices.Clone(x)
	odometry := true
	for j := range ng {
		h := m.params[j].step
		xp[j] = x[j] + h
		if m.params[j].Kind >= MountX {
			if odometry {
				m.deadReckon(x[:ng])
				odometry = false
			}
			s.predict(xp, ep)
		} else {
			s.evaluate(xp, ep)
		}
		xp[j] = x[j]
		for i := range n {
			for a := range s.dim[i] {
				s.jac[(i*3+a)*cols+j] = (ep[i][a] - base[i][a]) / h
			}
		}
	}
	// Restore the evaluation at x (the dead reckoning, dims and relatives).
	if odometry {
		m.deadReckon(x[:ng])
	}
	s.predict(x, s.e)
	copy(s.rel, baseRel)
	g := x[:ng]
	anchors := s.anchors(x)
	const h = 1e-7
	for i := range n {
		if !s.ok[i] {
			continue
		}
		a0 := anchors[m.fixes[i].seg]
		for c := range 3 {
			a := a0
			switch c {
			case 0:
				a.X += h
			case 1:
				a.Y += h
			case 2:
				a.Heading += h
			}
			var e [3]float64
			m.residual(i, g, estimator.Compose(a, s.rel[i]), &e)
			for r := range s.dim[i] {
				s.jac[(i*3+r)*cols+ng+c] = (e[r] - base[i][r]) / h
			}
		}
	}
}

// normal returns J^T C^-1 J (prior included) and J^T C^-1 e at the last
// jacobian, over the segments' blocks, as a block arrow (arrowNormal);
// with scores, also each segment's score J^T C^-1 e over its columns (the
// globals, then its anchor's three).
func (s *sysSolver) normal(scores [][]float64) *arrowNormal {
	m := s.m
	ng := s.ng
	nm := newArrowNormal(ng, len(m.segStart))
	for k := range s.blocks {
		b := &s.blocks[k]
		if b.rows == 0 || !b.ok {
			continue
		}
		// Whitened by the block's factor (plain triangular solves: the
		// factor is known to be regular).
		y := s.blockJac(b)
		ye := s.gather(b, s.e)
		b.l.solve(y.RawMatrix())
		b.l.solveVec(ye.RawVector().Data)
		var jtj mat.Dense
		var jte mat.VecDense
		jtj.Mul(y.T(), y)
		jte.MulVec(y.T(), ye)
		nm.addBlock(k, &jtj, &jte)
		if scores != nil {
			copy(scores[k], jte.RawVector().Data)
		}
	}
	for j, pr := range m.params {
		v := 1 / (s.prior[j] * s.prior[j])
		nm.a[j*ng+j] += v
		nm.gg[j] += v * (s.x[j] - pr.Configured)
	}
	// An anchor the fixes leave free in some direction would make N
	// singular: all its fixes lost their weight, or the robot stood before
	// one landmark the whole segment (range and bearing leave its turn
	// about the landmark free). (100 m)^2 of prior variance keeps N
	// regular and changes nothing else: along such a direction the globals'
	// rows of N are zero too (N is positive semi-definite), and the fixes'
	// information on an anchor they determine is millions of times more.
	// (30 km)^2, as before, lay below the rounding of N's largest entries
	// (3e6 on a ten-minute run): its factorisation failed, and the fit
	// reported no standard errors.
	for k := range nm.d {
		for c := range 3 {
			nm.d[k][c*4] += 1e-4
		}
	}
	return nm
}

// blockJac returns the block's rows of the last jacobian: the globals'
// columns, then its anchor's three.
func (s *sysSolver) blockJac(b *segBlock) *mat.Dense {
	cols := s.ng + 3
	jb := mat.NewDense(b.rows, cols, nil)
	for n, i := range b.fixes {
		for r := range s.dim[i] {
			jb.SetRow(b.off[n]+r, s.jac[(i*3+r)*cols:(i*3+r+1)*cols])
		}
	}
	return jb
}

// meat returns, at the last jacobian, each segment's J^T C_w^-1 C C_w^-1 J
// over its columns (the globals, then its anchor's three; nil for a
// segment without rows), without the prior (covariances adds it), and
// the cost e^T C^-1 e, where C_w is each segment's covariance with the
// fixes' robust weights (the blocks as built) and C the one the
// configuration states, every fix with weight taking weight 1. The
// blocks are rebuilt as they were.
func (s *sysSolver) meat() ([]*mat.Dense, float64) {
	a := make([]*mat.Dense, len(s.blocks))
	for k := range s.blocks {
		b := &s.blocks[k]
		if b.rows == 0 || !b.ok {
			continue
		}
		a[k] = s.blockJac(b)
		raw := a[k].RawMatrix()
		b.l.solve(raw)
		b.l.solveTrans(raw)
	}
	w := slices.Clone(s.w)
	for i, v := range s.w {
		if v > 0 {
			s.w[i] = 1
		}
	}
	s.buildBlocks(s.x)
	chi2 := s.blockCost(s.e)
	mt := make([]*mat.Dense, len(s.blocks))
	for k := range s.blocks {
		b := &s.blocks[k]
		if a[k] == nil || !b.ok {
			continue
		}
		// L^T A, with C = L L^T: its Gram matrix is A^T C A.
		t := a[k]
		b.l.mulTrans(t.RawMatrix())
		var g mat.Dense
		g.Mul(t.T(), t)
		mt[k] = &g
		a[k] = nil
	}
	copy(s.w, w)
	s.buildBlocks(s.x)
	return mt, chi2
}

// lm minimises the weighted cost by Levenberg-Marquardt with Marquardt's
// scaling (Nocedal and Wright, 2nd ed., sec. 10.3): (N + lambda diag(N))
// d = -g, lambda divided by 10 after a step that lowers the cost and
// multiplied by 10 after one that does not.
func (s *sysSolver) lm(maxIter int) {
	cost := s.evaluate(s.x, s.e)
	lambda := 1e-3
	xn := make([]float64, s.p)
	en := make([][3]float64, len(s.e))
	s.converged = false
	for it := 0; it < maxIter; it++ {
		s.iterations++
		s.jacobian(s.x)
		nm := s.normal(nil)
		accepted := false
		for try := 0; try < 12 && !accepted; try++ {
			sf, ok := nm.factor(lambda)
			if !ok {
				lambda *= 10
				continue
			}
			dg, da, ok := sf.solve(nm.gg, nm.ga)
			if !ok {
				lambda *= 10
				continue
			}
			d := mat.NewVecDense(s.p, stepVector(dg, da))
			for j := range s.p {
				xn[j] = s.x[j] - d.AtVec(j)
			}
			c := s.evaluate(xn, en)
			if c < cost {
				copy(s.x, xn)
				cost = c
				lambda = math.Max(lambda/10, 1e-12)
				accepted = true
				// A damped step is small far from the minimum too: test
				// the Gauss-Newton step at the old point instead.
				s.converged = s.small(d) && lambda <= 1e-3
			}
			if !accepted {
				lambda *= 10
			}
		}
		if !accepted {
			// No step lowers the cost: a minimum to rounding.
			s.converged = true
		}
		if s.converged {
			break
		}
	}
	s.evaluate(s.x, s.e)
}

// latencyStarts are the offsets from the configured latencies from which
// the fit starts, seconds: the cost need not be convex in the latency over
// tens of milliseconds (sysModel.relative smooths it over the odometry's
// intervals only), so one start can stop in the wrong minimum.
var latencyStarts = []float64{0, 0.04, 0.08, 0.12, 0.16}

// startLatency fits from each of latencyStarts (every sensor's latency
// moved alike) with Huber's constant k and keeps the start whose fit has
// the smallest robust scale (the median normalised NIS).
func (s *sysSolver) startLatency(k float64) {
	var lat []int
	for _, i := range s.m.latency {
		if i >= 0 {
			lat = append(lat, i)
		}
	}
	if len(lat) == 0 {
		return
	}
	x0 := slices.Clone(s.x)
	best, bestS2 := slices.Clone(s.x), math.Inf(1)
	for _, d := range latencyStarts {
		copy(s.x, x0)
		for _, i := range lat {
			s.x[i] += d
		}
		s.relinearise()
		s.evaluate(s.x, s.e)
		s.reweight(k, true)
		s.buildBlocks(s.x)
		s.lm(20)
		s.reweight(k, true)
		if s.s2 < bestS2 {
			bestS2 = s.s2
			copy(best, s.x)
		}
	}
	copy(s.x, best)
}

// relinearise moves each sensor's reference latency (sysModel.relative) to
// its current value; the cost changes by the odometry's noise over the
// shift, so evaluate must run again.
func (s *sysSolver) relinearise() {
	for si, j := range s.m.latency {
		if j >= 0 {
			s.m.lat0[si] = s.x[j]
		}
	}
}

// small says whether the step d is negligible: no global parameter moved
// by a thousandth of its bound, no anchor by a micrometre or microradian.
func (s *sysSolver) small(d *mat.VecDense) bool {
	for j := range s.p {
		tol := 1e-6
		if j < s.ng {
			tol = 1e-3 * s.m.params[j].Bound
		}
		if math.Abs(d.AtVec(j)) > tol {
			return false
		}
	}
	return true
}

// reweight sets each fix's weight from its NIS at the last evaluation
// (FitSystematic: Huber's weight with a robust scale, gross errors
// rejected) and returns the largest change of a weight.
func (s *sysSolver) reweight(k float64, reject bool) float64 {
	var norm []float64
	for i := range s.e {
		if s.ok[i] {
			norm = append(norm, s.nis(i)/chi2Median(s.dim[i]))
		}
	}
	s.s2 = math.Max(median(norm), 1e-12)
	var change float64
	s.outliers = 0
	for i := range s.e {
		w := 0.0
		if s.ok[i] {
			r := s.nis(i) / s.s2
			switch {
			case reject && r > chi2Quantile(0.9999, s.dim[i]):
				s.outliers++
			case r <= k*k:
				w = 1
			default:
				w = k / math.Sqrt(r)
			}
		}
		change = math.Max(change, math.Abs(w-s.w[i]))
		s.w[i] = w
	}
	return change
}

// nis is fix i's NIS against its marginal covariance, its own (whitened:
// I for a white sensor) plus the drift since its segment's anchor.
func (s *sysSolver) nis(i int) float64 {
	d := s.dim[i]
	c := mat.NewSymDense(d, nil)
	for a := range d {
		for b := a; b < d; b++ {
			c.SetSym(a, b, s.drift[i][a*3+b]+s.noise[i][a*3+b])
		}
	}
	var ch mat.Cholesky
	if !ch.Factorize(c) {
		return math.Inf(1)
	}
	var y mat.VecDense
	if ch.SolveVecTo(&y, mat.NewVecDense(d, s.e[i][:d])) != nil {
		return math.Inf(1)
	}
	return mat.Dot(&y, mat.NewVecDense(d, s.e[i][:d]))
}

func chi2Quantile(p float64, d int) float64 {
	return distuv.ChiSquared{K: float64(d)}.Quantile(p)
}

func chi2Median(d int) float64 { return chi2Quantile(0.5, d) }

// solve runs the re-weighted fits until the weights settle, or until a
// re-weighting moves no global parameter by more than a hundredth of its
// bound (a fix on the edge of rejection can flip back and forth). Huber's
// constant starts at 8 and halves down to HuberK: down-weighted at once,
// the fixes that show a parameter far from its configured value (a late
// stamp shows in the turns) would be the ones left out, and the fit would
// stop short of the solution.
func (s *sysSolver) solve() {
	k := math.Max(8, s.opt.HuberK)
	s.startLatency(k)
	s.evaluate(s.x, s.e)
	s.reweight(k, true)
	s.buildBlocks(s.x)
	prev := make([]float64, s.ng)
	for range 16 {
		copy(prev, s.x[:s.ng])
		s.relinearise()
		s.lm(60)
		last := k == s.opt.HuberK
		k = math.Max(k/2, s.opt.HuberK)
		ch := s.reweight(k, true)
		s.buildBlocks(s.x)
		if !last {
			continue
		}
		var moved float64
		for j, p := range s.m.params {
			moved = math.Max(moved, math.Abs(s.x[j]-prev[j])/p.Bound)
		}
		if ch < 1e-3 || moved < 0.01 {
			break
		}
	}
}

// covariances returns the covariance of the global parameters (ng x ng)
// under the stated noise (the sandwich of FitSystematic) and the
// segment-robust sandwich, at the solution, and the stated noise's
// chi-square per degree of freedom; nil covariances when N does not
// factorise. Scaling N^-1 by the weighted residuals' variance instead, as
// before, stated the standard errors too small where the drift dominates:
// the weights took that variance to 0.72 on the simulator's runs, where
// the stated noise's chi-square per degree of freedom is 1.00.
func (s *sysSolver) covariances() (stated, robust *mat.Dense, s2 float64) {
	ng := s.ng
	s.relinearise()
	s.evaluate(s.x, s.e)
	s.jacobian(s.x)
	nseg := len(s.blocks)
	scores := make([][]float64, nseg)
	for k := range scores {
		scores[k] = make([]float64, ng+3)
	}
	nm := s.normal(scores)
	sf, ok := nm.factor(0)
	if !ok {
		return nil, nil, 0
	}
	// The globals' rows of N^-1, segment by segment (arrowNormal): the
	// sandwiches below are sums over the segments of their columns.
	sinv, w, ok := sf.globalRows()
	if !ok {
		return nil, nil, 0
	}
	var rows int
	for _, b := range s.blocks {
		if b.ok {
			rows += b.rows
		}
	}
	mt, chi2 := s.meat()
	s2 = chi2 / math.Max(float64(rows-s.p), 1)
	// The prior's part of the meat, on the globals' diagonal.
	pr := mat.NewDiagDense(ng, nil)
	for j := range s.m.params {
		pr.SetDiag(j, 1/(s.prior[j]*s.prior[j]))
	}
	var tm mat.Dense
	tm.Mul(sinv, pr)
	stated = mat.NewDense(ng, ng, nil)
	stated.Mul(&tm, sinv)
	sw := mat.NewDense(ng, ng, nil)
	var t, u mat.Dense
	var v mat.VecDense
	for k := range nseg {
		r := segRows(sinv, w[k])
		if mt[k] != nil {
			t.Reset()
			u.Reset()
			t.Mul(r, mt[k])
			u.Mul(&t, r.T())
			stated.Add(stated, &u)
		}
		v.Reset()
		v.MulVec(r, mat.NewVecDense(ng+3, scores[k]))
		u.Reset()
		u.Outer(1, &v, &v)
		sw.Add(sw, &u)
	}
	if nseg > 1 {
		sw.Scale(float64(nseg)/float64(nseg-1), sw)
	}
	return stated, sw, s2
}

// stepVector is a step's globals, then each anchor's three, as one vector.
func stepVector(g []float64, a [][3]float64) []float64 {
	d := make([]float64, 0, len(g)+3*len(a))
	d = append(d, g...)
	for _, v := range a {
		d = append(d, v[:]...)
	}
	return d
}

// result assembles the fit; it fails when the fit has no covariance (its
// normal matrix does not factorise at the solution).
func (s *sysSolver) result(cfg *fusion.Config) (SystematicFit, error) {
	stated, robust, s2 := s.covariances()
	if stated == nil {
		return SystematicFit{}, fmt.Errorf("%w: no standard errors: the fit's information matrix is singular at its solution (%d fixes, %d given no weight, %d segments)",
			ErrSystematic, len(s.m.fixes), s.outliers, len(s.m.segStart))
	}
	out := SystematicFit{Config: cloneConfig(cfg), Fixes: len(s.m.fixes), Outliers: s.outliers, Segments: len(s.m.segStart),
		Sigma2: s2, Iterations: s.iterations, Converged: s.converged}
	for j, sp := range s.m.params {
		p := sp.Param
		p.Fitted = s.x[j]
		if p.Kind == MountHeading {
			p.Fitted = estimator.Wrap(p.Fitted)
		}
		// A variance a rounding below zero (a sandwich of scores that are
		// all but zero for an unexcited parameter) is zero, not a NaN.
		p.ModelStdErr = math.Sqrt(math.Max(stated.At(j, j), 0))
		p.StdErr = math.Max(p.ModelStdErr, math.Sqrt(math.Max(robust.At(j, j), 0)))
		p.Determined = p.StdErr <= p.Bound
		if p.Determined {
			apply(&out.Config, &p, s.m.counts)
		} else {
			p.Why = patterns[p.Kind]
		}
		out.Params = append(out.Params, p)
	}
	out.scaleStates()
	out.mountStds(cfg)
	out.Whiteness = s.whiteness()
	return out, nil
}

// whiteness tests each sensor's whitened residuals at the solution
// (SensorWhiteness): in each segment's block, the residuals whitened by
// the block's factor, each component paired with the same component of
// the sensor's next fix with weight. The blocks and residuals are those of
// the last evaluation (covariances).
func (s *sysSolver) whiteness() []SensorWhiteness {
	n := len(s.m.cfg.Sensors)
	sxy, sxx, syy := make([]float64, n), make([]float64, n), make([]float64, n)
	pairs := make([]int, n)
	for k := range s.blocks {
		b := &s.blocks[k]
		if b.rows == 0 || !b.ok {
			continue
		}
		y := s.gather(b, s.e)
		b.l.solveVec(y.RawVector().Data)
		last := make([]int, n) // position in b.fixes of each sensor's last fix, plus one
		for pos, i := range b.fixes {
			si := s.m.fixes[i].sensor
			if prev := last[si] - 1; prev >= 0 && s.dim[b.fixes[prev]] == s.dim[i] {
				for r := range s.dim[i] {
					a, c := y.AtVec(b.off[prev]+r), y.AtVec(b.off[pos]+r)
					sxy[si], sxx[si], syy[si] = sxy[si]+a*c, sxx[si]+a*a, syy[si]+c*c
					pairs[si]++
				}
			}
			last[si] = pos + 1
		}
	}
	out := make([]SensorWhiteness, n)
	for si := range out {
		w := SensorWhiteness{Lag1: math.NaN(), Pairs: pairs[si]}
		if pairs[si] > 0 && sxx[si] > 0 && syy[si] > 0 {
			w.Lag1 = sxy[si] / math.Sqrt(sxx[si]*syy[si])
			w.Correlated = w.Lag1 > 0.1 && w.Lag1 > 3/math.Sqrt(float64(pairs[si]))
		}
		out[si] = w
	}
	return out
}

// silentMount times a mount number's bound is the standard error past
// which the run says next to nothing about it (mountStds): 10 cm and 5
// degrees, a tenth of the fit's weak prior.
const silentMount = 10

// mountStds writes each fitted sensor's mount standard errors into
// f.Config (sensors[i].mount_std), so that the filter carries the
// calibrated mount's uncertainty as consider states (DEVELOPERS.md,
// "Design: Sensors"): on TestRealDataGoal's seed 2 a mount fitted 1.2 cm
// and 5 mrad off (about two of its standard errors), taken as exact, left
// only 0.81 of the truth inside the 95% region where the true mount gave
// 0.97 ("Design: Systematic parameters"). A mount
// number the run does not determine keeps its configured value, and its
// standard deviation is sqrt(se^2 + d^2), d the distance between the kept
// and the fitted value; but one whose standard error is past
// silentMount times its bound, where the run says next to nothing about it
// (the fit's weak prior is priorFactor times the bound), keeps its
// configured mount_std too: a straight 15 s run gave standard errors of
// 0.5 m for a mount's x and y, which written as its uncertainty would
// have kept the filter's position uncertain by as much for ever, the
// mount being a consider state, although the mount was measured to a few
// centimetres. MountStdNote names those numbers. Where the mount blocks do
// not fit in the state (estimator.MaxStates), none is written and
// MountStdNote says so.
func (f *SystematicFit) mountStds(cfg *fusion.Config) {
	before := slices.Clone(f.Config.Sensors)
	var silent []string
	for si := range f.Config.Sensors {
		var std [3]float64
		fitted := false
		for _, p := range f.Params {
			if p.Index != si || p.Kind < MountX || p.Kind > MountHeading {
				continue
			}
			v := p.StdErr
			if !p.Determined && p.StdErr > silentMount*p.Bound {
				silent = append(silent, p.Name)
				continue
			}
			if !p.Determined {
				d := p.Fitted - p.Configured
				if p.Kind == MountHeading {
					d = estimator.Wrap(d)
				}
				v = math.Hypot(v, d)
			}
			std[p.Kind-MountX], fitted = v, true
		}
		if !fitted || !finite(std[:]...) {
			continue
		}
		// A component the fit did not have keeps the configured one's.
		for k := range std {
			if std[k] == 0 {
				std[k] = cfg.Sensors[si].MountStd[k]
			}
		}
		f.Config.Sensors[si].MountStd = std
		f.MountStd = append(f.MountStd, si)
	}
	if len(silent) > 0 {
		f.MountStdNote = fmt.Sprintf("the run says next to nothing about %s (standard errors past %g times their bounds): mount_std keeps its configured value for them (the table says what would determine them)", strings.Join(silent, ", "), float64(silentMount))
	}
	if len(f.MountStd) == 0 {
		return
	}
	if err := f.Config.Validate(); err != nil {
		f.Config.Sensors = before
		f.MountStdNote = fmt.Sprintf("the mounts' standard errors are not written: %v", err)
		f.MountStd = nil
	}
}

func finite(v ...float64) bool {
	for _, x := range v {
		if math.IsNaN(x) || math.IsInf(x, 0) {
			return false
		}
	}
	return true
}

// scaleBiasSE is how many of its standard errors a body step's scale must
// lie from 1 for the fit to switch on the scale states: three, whatever
// its bound (a scale too loose to write down is still a bias if it lies
// this far off).
const scaleBiasSE = 3

// scaleStates switches on the online scale states (calibration.scale) in
// f.Config when a body step's scale lies more than scaleBiasSE standard
// errors from 1: the configuration has no field for these scales, and a
// scale error left to the white step noise grows with the square of the
// distance ("Design: State"). The prior's standard deviation is widened to
// twice the largest error found when that exceeds it. A configuration
// with the states already on is left as it was.
func (f *SystematicFit) scaleStates() {
	c := &f.Config.Calibration
	if c.Scale {
		return
	}
	var worst float64
	for _, p := range f.Params {
		if (p.Kind == StepForwardScale || p.Kind == StepTurnScale) && math.Abs(p.Fitted-1) > scaleBiasSE*p.StdErr {
			worst = math.Max(worst, math.Abs(p.Fitted-1))
		}
	}
	if worst == 0 {
		return
	}
	c.Scale = true
	f.ScaleStates = []string{"calibration.scale"}
	if 2*worst > c.ScaleStd {
		c.ScaleStd = 2 * worst
		f.ScaleStates = append(f.ScaleStates, "calibration.scale_std")
	}
}

// cloneConfig copies the slices of c that a fit changes.
func cloneConfig(c *fusion.Config) fusion.Config {
	out := *c
	out.Wheels = slices.Clone(c.Wheels)
	out.Sensors = slices.Clone(c.Sensors)
	return out
}
