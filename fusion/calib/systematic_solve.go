package calib

import (
	"math"
	"slices"

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
	jac        []float64
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
// anchors each of its pose fixes implies (robust to outlying fixes).
func (s *sysSolver) initAnchors() {
	m := s.m
	g := s.x[:s.ng]
	m.deadReckon(g)
	m.anchorPoses()
	for k, t := range m.segStart {
		a := estimator.Compose(m.cfg.StartPose, m.poseAt(float64(t)))
		var xs, ys, hs []float64
		for i := range m.fixes {
			f := &m.fixes[i]
			if f.seg != k || f.kind != fusion.FixPose {
				continue
			}
			robot := estimator.Detach(estimator.Pose{X: f.z[0], Y: f.z[1], Heading: f.z[2]}, f.mount)
			c := estimator.Compose(robot, inverse(m.relative(i, g)))
			xs, ys = append(xs, c.X), append(ys, c.Y)
			hs = append(hs, estimator.Wrap(c.Heading-a.Heading))
		}
		if len(xs) > 0 {
			a = estimator.Pose{X: median(xs), Y: median(ys), Heading: estimator.Wrap(a.Heading + median(hs))}
		}
		o := s.ng + 3*k
		s.x[o], s.x[o+1], s.x[o+2] = a.X, a.Y, a.Heading
	}
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
	var cost float64
	for i := range m.fixes {
		rel := m.relative(i, g)
		s.rel[i] = rel
		d, ok := m.residual(i, g, estimator.Compose(anchors[m.fixes[i].seg], rel), &e[i])
		s.dim[i], s.ok[i] = d, ok
		if !ok {
			continue
		}
		for a := range d {
			cost += s.w[i] * e[i][a] * e[i][a]
		}
	}
	return cost + s.priorCost(x)
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

// normal returns J^T W J (prior included) and J^T W e at the last
// jacobian.
func (s *sysSolver) normal() (*mat.SymDense, *mat.VecDense) {
	m := s.m
	ng, cols := s.ng, s.ng+3
	nm := mat.NewSymDense(s.p, nil)
	gr := mat.NewVecDense(s.p, nil)
	idx := make([]int, cols)
	for i := range m.fixes {
		if !s.ok[i] || s.w[i] == 0 {
			continue
		}
		for c := range ng {
			idx[c] = c
		}
		for c := range 3 {
			idx[ng+c] = ng + 3*m.fixes[i].seg + c
		}
		for r := range s.dim[i] {
			row := s.jac[(i*3+r)*cols : (i*3+r+1)*cols]
			for a := range cols {
				if row[a] == 0 {
					continue
				}
				gr.SetVec(idx[a], gr.AtVec(idx[a])+s.w[i]*row[a]*s.e[i][r])
				for b := a; b < cols; b++ {
					ia, ib := idx[a], idx[b]
					if ia > ib {
						ia, ib = ib, ia
					}
					nm.SetSym(ia, ib, nm.At(ia, ib)+s.w[i]*row[a]*row[b])
				}
			}
		}
	}
	for j, pr := range m.params {
		v := 1 / (s.prior[j] * s.prior[j])
		nm.SetSym(j, j, nm.At(j, j)+v)
		gr.SetVec(j, gr.AtVec(j)+v*(s.x[j]-pr.Configured))
	}
	return nm, gr
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
		nm, gr := s.normal()
		accepted := false
		for try := 0; try < 12 && !accepted; try++ {
			a := mat.NewSymDense(s.p, nil)
			a.CopySym(nm)
			for j := range s.p {
				a.SetSym(j, j, nm.At(j, j)*(1+lambda))
			}
			var ch mat.Cholesky
			if !ch.Factorize(a) {
				lambda *= 10
				continue
			}
			var d mat.VecDense
			if err := ch.SolveVecTo(&d, gr); err != nil {
				lambda *= 10
				continue
			}
			for j := range s.p {
				xn[j] = s.x[j] - d.AtVec(j)
			}
			c := s.evaluate(xn, en)
			if c < cost {
				copy(s.x, xn)
				cost = c
				lambda = math.Max(lambda/10, 1e-12)
				accepted = true
				s.converged = s.small(&d)
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
func (s *sysSolver) reweight(k float64) float64 {
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
			case r > chi2Quantile(0.9999, s.dim[i]):
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

func (s *sysSolver) nis(i int) float64 {
	var v float64
	for a := range s.dim[i] {
		v += s.e[i][a] * s.e[i][a]
	}
	return v
}


func chi2Quantile(p float64, d int) float64 {
	return distuv.ChiSquared{K: float64(d)}.Quantile(p)
}

func chi2Median(d int) float64 { return chi2Quantile(0.5, d) }

// solve runs the re-weighted fits until the weights settle, or until a
// re-weighting moves no global parameter by more than a hundredth of its
// bound (a fix on the edge of rejection can flip back and forth).
func (s *sysSolver) solve() {
	s.evaluate(s.x, s.e)
	s.reweight(s.opt.HuberK)
	prev := make([]float64, s.ng)
	for range 12 {
		copy(prev, s.x[:s.ng])
		s.lm(60)
		if s.reweight(s.opt.HuberK) < 1e-3 {
			break
		}
		var moved float64
		for j, p := range s.m.params {
			moved = math.Max(moved, math.Abs(s.x[j]-prev[j])/p.Bound)
		}
		if moved < 0.01 {
			break
		}
	}
}

// covariances returns the model covariance s2 N^-1 and the segment-robust
// sandwich of the global parameters (ng x ng), at the solution.
func (s *sysSolver) covariances() (model, robust *mat.Dense, s2 float64) {
	m := s.m
	s.evaluate(s.x, s.e)
	s.jacobian(s.x)
	nm, _ := s.normal()
	var ch mat.Cholesky
	inv := mat.NewSymDense(s.p, nil)
	if !ch.Factorize(nm) || ch.InverseTo(inv) != nil {
		nan := mat.NewDense(s.ng, s.ng, nil)
		for j := range s.ng {
			nan.Set(j, j, math.Inf(1))
		}
		return nan, nan, math.NaN()
	}
	var rss, dof float64
	ng, cols := s.ng, s.ng+3
	nseg := len(m.segStart)
	scores := make([][]float64, nseg)
	for k := range scores {
		scores[k] = make([]float64, s.p)
	}
	for i := range m.fixes {
		if !s.ok[i] || s.w[i] == 0 {
			continue
		}
		seg := m.fixes[i].seg
		for r := range s.dim[i] {
			rss += s.w[i] * s.e[i][r] * s.e[i][r]
			dof++
			row := s.jac[(i*3+r)*cols : (i*3+r+1)*cols]
			for a := range ng {
				scores[seg][a] += s.w[i] * row[a] * s.e[i][r]
			}
			for c := range 3 {
				scores[seg][ng+3*seg+c] += s.w[i] * row[ng+c] * s.e[i][r]
			}
		}
	}
	s2 = rss / math.Max(dof-float64(s.p), 1)
	model = mat.NewDense(ng, ng, nil)
	for a := range ng {
		for b := range ng {
			model.Set(a, b, s2*inv.At(a, b))
		}
	}
	// Sandwich over the segments, global rows of N^-1 only.
	rows := inv.SliceSym(0, s.p)
	var left mat.Dense
	left.CloneFrom(rows)
	sub := left.Slice(0, ng, 0, s.p)
	meat := mat.NewSymDense(s.p, nil)
	for _, g := range scores {
		meat.SymRankOne(meat, 1, mat.NewVecDense(s.p, g))
	}
	var tmp, sw mat.Dense
	tmp.Mul(sub, meat)
	sw.Mul(&tmp, sub.T())
	if nseg > 1 {
		sw.Scale(float64(nseg)/float64(nseg-1), &sw)
	}
	return model, &sw, s2
}

// result assembles the fit.
func (s *sysSolver) result(cfg *fusion.Config) SystematicFit {
	model, robust, s2 := s.covariances()
	out := SystematicFit{Config: cloneConfig(cfg), Fixes: len(s.m.fixes), Outliers: s.outliers, Segments: len(s.m.segStart),
		Sigma2: s2, Iterations: s.iterations, Converged: s.converged}
	for j, sp := range s.m.params {
		p := sp.Param
		p.Fitted = s.x[j]
		if p.Kind == MountHeading {
			p.Fitted = estimator.Wrap(p.Fitted)
		}
		p.StdErr = math.Sqrt(math.Max(model.At(j, j), robust.At(j, j)))
		p.Determined = p.StdErr <= p.Bound
		if p.Determined {
			apply(&out.Config, &p, s.m.counts)
		} else {
			p.Why = patterns[p.Kind]
		}
		out.Params = append(out.Params, p)
	}
	return out
}

// cloneConfig copies the slices of c that a fit changes.
func cloneConfig(c *fusion.Config) fusion.Config {
	out := *c
	out.Wheels = slices.Clone(c.Wheels)
	out.Sensors = slices.Clone(c.Sensors)
	return out
}
