package calib

import (
	"gonum.org/v1/gonum/mat"

	"reckon.example/estimator"
)

// correctRegressorNoise moves the solution by one Gauss-Newton step of the
// corrected score for the noise in the wheels' readings, which the fit
// takes as its regressors (DEVELOPERS.md, "Design: Systematic
// parameters").
//
// The dead reckoning is computed from the travels the wheels report, each
// the true travel plus its reading noise u (classical measurement error:
// the reading scatters about the truth). A fix's whitened residual is then
// e = e0 - H(x) u to first order, and its Jacobian in a global parameter
// x_j is de/dx_j = de0/dx_j - (dH/dx_j) u: both carry the same u, so the
// estimating equation of the least-squares fit, sum J^T C^-1 e = 0, has a
// non-zero mean at the truth,
//
//	b_j = tr(C^-1 Cov(e, de/dx_j)) = tr(C^-1 H S dH^T/dx_j) = 1/2 tr(C^-1 dC_u/dx_j)
//
// with S the readings' noise covariance and C_u = H S H^T the part of the
// segment's covariance that the readings' noise makes (the last step
// because C^-1 is symmetric and S does not depend on x_j). Subtracting
// that mean gives the corrected score (T. Nakamura, Biometrika 77(1),
// 1990, from memory; the bias it removes is the classical
// errors-in-variables attenuation, W. A. Fuller, Measurement Error
// Models, 1987, from memory), whose root, one Gauss-Newton step from the
// fit's, is x + N^-1 b (N the normal matrix). A turn is the difference of
// two wheels' readings over the track width, so the wheels' spread is
// the parameter the readings' noise biases: on a straight stretch its
// Jacobian is that noise alone, and the fit took it as evidence that the
// turns were shorter than the wheels said (the spread too wide; 0.8% on
// an hour of the demo). The wheels' scales are the other regressors of
// the kind, but their signal (the distance driven) is millions of times
// their readings' variance, and their noise's variance depends on the
// scale itself, which the identity above leaves out; they are not
// corrected. Scrub and a differential drive's side slip move the truth
// away from readings that do not see them (the reading is exact, the
// truth scatters): no error in the regressors, and they are left out of
// C_u.
func (s *sysSolver) correctRegressorNoise() {
	j := s.m.spread
	if j < 0 || len(s.m.travel) == 0 || len(s.blocks) == 0 {
		return
	}
	const h = 1e-5
	xp := append([]float64(nil), s.x...)
	xp[j] += h
	// The dead reckoning at xp, kept aside while the one at x is done:
	// each segment's two drifts are then built one after the other, and
	// only one segment's pair is held at a time.
	e := make([][3]float64, len(s.m.fixes))
	s.evaluate(xp, e)
	atP := s.takeReckoning()
	s.evaluate(s.x, e)
	atX := s.takeReckoning()
	var bj float64
	s.eachSegment(func(k, from, to int) {
		b := &s.blocks[k]
		if !b.ok {
			return
		}
		c0 := s.readingDrift(k, from, to, s.x, atX)
		c1 := s.readingDrift(k, from, to, xp, atP)
		if c0 == nil || c1 == nil {
			return
		}
		n := b.rows
		d := mat.NewDense(n, n, nil)
		for r := range n {
			for c := range n {
				d.Set(r, c, (c1.At(r, c)-c0.At(r, c))/h)
			}
		}
		bj += 0.5 * traceCInv(&b.l, d)
	})
	s.putReckoning(atX)
	// Back to the solution, and its normal matrix.
	s.evaluate(s.x, s.e)
	s.jacobian(s.x)
	nm := s.normal(nil)
	sf, ok := nm.factor(0)
	if !ok {
		return
	}
	bg := make([]float64, s.ng)
	bg[j] = bj
	dg, da, ok := sf.solve(bg, make([][3]float64, len(nm.ga)))
	if !ok {
		return
	}
	for i, v := range stepVector(dg, da) {
		s.x[i] += v
	}
	s.evaluate(s.x, s.e)
}

// reckoning is what a segment's drift is built from: the dead
// reckoning's poses and steps, the anchors' inverse poses and each fix's
// pose relative to its anchor.
type reckoning struct {
	p0     []estimator.Pose
	u      []estimator.Step
	segInv []estimator.Pose
	rel    []estimator.Pose
}

// takeReckoning takes the last evaluation's reckoning out of the model,
// which gets fresh arrays for the next.
func (s *sysSolver) takeReckoning() reckoning {
	m := s.m
	r := reckoning{p0: m.p0, u: m.u, segInv: m.segInv, rel: s.rel}
	m.p0, m.u = make([]estimator.Pose, len(r.p0)), make([]estimator.Step, len(r.u))
	m.segInv, s.rel = nil, make([]estimator.Pose, len(r.rel))
	return r
}

// putReckoning puts r back into the model.
func (s *sysSolver) putReckoning(r reckoning) {
	s.m.p0, s.m.u, s.m.segInv, s.rel = r.p0, r.u, r.segInv, r.rel
}

// eachSegment calls f with each segment and its fixes [from, to).
func (s *sysSolver) eachSegment(f func(k, from, to int)) {
	start := 0
	for k := range s.m.segStart {
		end := start
		for end < len(s.m.fixes) && s.m.fixes[end].seg == k {
			end++
		}
		f(k, start, end)
		start = end
	}
}

// readingDrift returns segment k's covariance of its fixes' whitened
// residuals that the odometry's reading noise alone makes at x, with the
// reckoning r of x (the weights and the fixes with weight as the blocks
// were last built): the wheels' and an IMU turn row's noise, without
// scrub, side slip, the heading's drift per second or the fixes' own
// errors.
func (s *sysSolver) readingDrift(k, from, to int, x []float64, r reckoning) *mat.SymDense {
	s.putReckoning(r)
	g := x[:s.ng]
	nz := s.m.cfg.Noise
	nz.TurnVarRad2PerRad, nz.LateralSlipVarM2PerM = 0, 0
	_, c := s.blockCov(k, from, to, g, s.m.solver(g), &nz, s.anchors(x)[k], nil)
	return c
}

// traceCInv returns tr(C^-1 D) for C = L L^T: tr(L^-1 D L^-T), the
// diagonal of L^-1 (L^-1 D)^T. D is overwritten.
func traceCInv(l *packedL, d *mat.Dense) float64 {
	l.solve(d.RawMatrix())
	n, _ := d.Dims()
	t := mat.NewDense(n, n, nil)
	t.CloneFrom(d.T())
	l.solve(t.RawMatrix())
	var tr float64
	for i := range n {
		tr += t.At(i, i)
	}
	return tr
}
