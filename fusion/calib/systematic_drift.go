package calib

import (
	"cmp"
	"math"
	"slices"

	"gonum.org/v1/gonum/mat"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// The residuals of one segment's fixes are correlated: each fix's predicted
// pose carries the odometry's random drift since the segment's anchor,
// and later fixes carry the drift of earlier ones. segBlock holds that
// correlation, so that the fit is generalised least squares within each
// segment (A. C. Aitken, Proceedings of the Royal Society of Edinburgh 55,
// 1935), whose standard errors hold, where weighting each fix alone would
// count the drift's errors as independent many times over.
//
// In the coordinates of each fix's own whitened residual, the segment's
// covariance is
//
//	C[f][f] = N_ff / w_f + H_f P_f H_f^T
//	C[f][a] = N_fa / sqrt(w_f w_a) + H_f Phi(f, a) P_a H_a^T
//
// with H_f the whitened residual's Jacobian in the robot's pose, P_f the
// drift covariance of the pose at fix f relative to the anchor (the
// filter's own prediction, DEVELOPERS.md, "Design: Motion prediction" and
// "Design: Process noise", from zero at the anchor), Phi(f, a) the product
// of the pose Jacobians between the fixes, w_f the fix's robust weight and
// N the fixes' own errors: I and 0 for a white sensor, the Gauss-Markov
// model of fixNoise for a correlated one.
type segBlock struct {
	fixes []int // the fixes with weight, in capture order
	off   []int // each fix's first row in the block
	rows  int
	l     packedL // the lower Cholesky factor of C
	ok    bool
}

// stepCov writes the covariance of interval k's step (after deadReckon at
// g) as the robot's odometry decoding states it: the wheel rows' variances
// per metre through the solver's gain, scrub per radian turned, or the body
// step's own rates.
func (m *sysModel) stepCov(k int, g []float64, gain *mat.Dense, nz *fusion.Noise, cu *[9]float64) {
	iv := &m.ivs[k]
	u := m.u[k]
	dt := float64(iv.t1-iv.t0) * 1e-9
	if iv.isStep {
		nz.StepForwardVarM2PerS, nz.StepLeftVarM2PerS, nz.StepTurnVarRad2PerS = m.cfg.Noise.StepForwardVarM2PerS, m.cfg.Noise.StepLeftVarM2PerS, m.cfg.Noise.StepTurnVarRad2PerS
		estimator.StepNoise(cu, u, dt, &estimator.StepRates{ForwardVarM2PerM: nz.StepForwardVarM2PerM, LeftVarM2PerM: nz.StepLeftVarM2PerM,
			TurnVarRad2PerRad: nz.StepTurnVarRad2PerRad, ForwardVarM2PerS: nz.StepForwardVarM2PerS, LeftVarM2PerS: nz.StepLeftVarM2PerS, TurnVarRad2PerS: nz.StepTurnVarRad2PerS})
		return
	}
	_, cols := gain.Dims()
	if cap(m.vars) < cols {
		m.vars = make([]float64, cols)
	}
	vars := m.vars[:cols]
	clear(vars)
	var mean float64
	for i := range m.nw {
		t := math.Abs(get(g, idxOr(m.wheelScale, i), 1) * m.travel[int(iv.off)+i])
		vars[i] = nz.WheelVarM2PerM * t
		mean += t / float64(m.nw)
	}
	c := m.nw
	if m.rotation {
		vars[c] = nz.IMUTurnVarRad2PerRad * math.Abs(u.TurnRad)
		c++
	}
	if m.cfg.NoSideSlip {
		vars[c] = nz.LateralSlipVarM2PerM * mean
	}
	*cu = [9]float64{}
	for a := range 3 {
		for b := range 3 {
			var s float64
			for r, v := range vars {
				s += gain.At(a, r) * v * gain.At(b, r)
			}
			cu[a*3+b] = s
		}
	}
	if !m.rotation {
		cu[8] += nz.TurnVarRad2PerRad * math.Abs(u.TurnRad)
	}
}

// mul3 returns a b for 3x3 row-major matrices.
func mul3(a, b *[9]float64) [9]float64 {
	var c [9]float64
	for i := range 3 {
		for j := range 3 {
			c[i*3+j] = a[i*3]*b[j] + a[i*3+1]*b[3+j] + a[i*3+2]*b[6+j]
		}
	}
	return c
}

// mul3T returns a b^T.
func mul3T(a, b *[9]float64) [9]float64 {
	var c [9]float64
	for i := range 3 {
		for j := range 3 {
			c[i*3+j] = a[i*3]*b[j*3] + a[i*3+1]*b[j*3+1] + a[i*3+2]*b[j*3+2]
		}
	}
	return c
}

// buildBlocks computes every segment's block at x, after evaluate(x): the
// fixes with weight and the Cholesky factor of their covariance. It also
// sets each fix's drift covariance (H P H^T) for reweight.
func (s *sysSolver) buildBlocks(x []float64) {
	m := s.m
	g := x[:s.ng]
	var gain *mat.Dense
	if len(m.travel) > 0 {
		gain = m.solver(g)
	}
	nz := m.cfg.Noise // FitSystematic filled the robot's defaults
	anchors := s.anchors(x)
	s.blocks = s.blocks[:0]
	start := 0
	for k := range m.segStart {
		end := start
		for end < len(m.fixes) && m.fixes[end].seg == k {
			end++
		}
		s.blocks = append(s.blocks, s.block(k, start, end, g, gain, &nz, anchors[k]))
		start = end
	}
}

// block builds segment k's block from the fixes [from, to).
func (s *sysSolver) block(k, from, to int, g []float64, gain *mat.Dense, nz *fusion.Noise, anchor estimator.Pose) segBlock {
	b, c := s.blockCov(k, from, to, g, gain, nz, anchor, &s.cov)
	if c == nil {
		return b
	}
	b.l, b.ok = factorPacked(c)
	return b
}

// blockCov returns segment k's block without its factor, and its
// covariance (nil for a block without rows): with dst, as block states it,
// in dst (and each fix's drift covariance set for reweight); without, the
// odometry's drift alone, in a matrix of its own.
func (s *sysSolver) blockCov(k, from, to int, g []float64, gain *mat.Dense, nz *fusion.Noise, anchor estimator.Pose, dst *mat.SymDense) (segBlock, *mat.SymDense) {
	m := s.m
	var b segBlock
	tau := map[int]float64{}
	for i := from; i < to; i++ {
		if s.ok[i] && s.w[i] > 0 {
			b.fixes = append(b.fixes, i)
			tau[i] = float64(m.fixes[i].stamp) - get(g, m.latency[m.fixes[i].sensor], 0)*1e9
		}
	}
	slices.SortStableFunc(b.fixes, func(a, c int) int { return cmp.Compare(tau[a], tau[c]) })
	for _, i := range b.fixes {
		b.off = append(b.off, b.rows)
		b.rows += s.dim[i]
	}
	if b.rows == 0 {
		return b, nil
	}
	fixes := dst != nil
	var c *mat.SymDense
	if fixes {
		// One segment's matrix after another: each is factorised
		// (factorPacked) before the next is built.
		dst.Reset()
		dst.ReuseAsSym(b.rows)
		c = dst
	} else {
		c = mat.NewSymDense(b.rows, nil)
	}
	// The rotation of the odometry frame's pose errors into the field
	// frame.
	sp, cp := math.Sincos(anchor.Heading + m.segInv[k].Heading)
	rot := [9]float64{cp, -sp, 0, sp, cp, 0, 0, 0, 1}
	// Propagate the drift from the anchor through the intervals, keeping
	// cross[a] = Cov(pose now, pose at fix a) for every fix a passed.
	t0 := float64(m.segStart[k])
	iv, _ := slices.BinarySearchFunc(m.ivs, t0, func(v sysInterval, t float64) int { return cmp.Compare(float64(v.t1), t) })
	var p [9]float64
	ident := [9]float64{1, 0, 0, 0, 1, 0, 0, 0, 1}
	phi := ident
	cross := make([][9]float64, len(b.fixes))
	hs := make([][9]float64, len(b.fixes))
	var fx, fu, cu [9]float64
	for n, i := range b.fixes {
		for iv < len(m.ivs) && float64(m.ivs[iv].t1) <= tau[i] {
			if float64(m.ivs[iv].t0) >= t0 {
				estimator.ArcJacobians(m.p0[iv], m.u[iv], &fx, &fu)
				m.stepCov(iv, g, gain, nz, &cu)
				fp := mul3(&fx, &p)
				p = mul3T(&fp, &fx)
				gu := mul3(&fu, &cu)
				q := mul3T(&gu, &fu)
				for e := range p {
					p[e] += q[e]
				}
				p[8] += m.cfg.HeadingDriftVarPerS() * float64(m.ivs[iv].t1-m.ivs[iv].t0) * 1e-9
				phi = mul3(&fx, &phi)
			}
			iv++
		}
		for a := range n {
			cross[a] = mul3(&phi, &cross[a])
		}
		phi, cross[n] = ident, p
		hf := s.poseJacobian(i, g, estimator.Compose(anchor, s.rel[i]))
		hs[n] = mul3(&hf, &rot)
		for a := 0; a <= n; a++ {
			hc := mul3(&hs[n], &cross[a])
			v := mul3T(&hc, &hs[a])
			for r := range s.dim[i] {
				for q := range s.dim[b.fixes[a]] {
					if a == n && q > r {
						continue
					}
					c.SetSym(b.off[n]+r, b.off[a]+q, v[r*3+q])
				}
			}
		}
		if !fixes {
			continue
		}
		var drift [9]float64
		for r := range s.dim[i] {
			for q := range s.dim[i] {
				drift[r*3+q] = c.At(b.off[n]+r, b.off[n]+q)
			}
		}
		s.drift[i] = drift
		s.fixNoise(c, &b, n, i)
	}
	return b, c
}

// fixNoise adds the fixes' own errors to segment block b's covariance c
// for its n-th fix, i: white with the covariance the fix states (I in its
// whitened residual), or, for a sensor with a Gauss-Markov part
// (fusion.Sensor: share f, time constant tau), white (1 - f) I plus the
// part gm gm^T (sysFix.gm), which the sensor's earlier fixes a of the
// block share by exp(-dt/tau), dt the time between the two fixes (the
// first-order Gauss-Markov process of "Design: Sensors": A. Gelb, Applied
// Optimal Estimation, 1974, sec. 4.5). That is the filter's own model,
// one process per sensor; it makes the fit generalised least squares in
// the camera's correlated errors too, where counting them as white took
// fixes that repeat an error as independent evidence of a parameter.
// Each fix's robust weight w scales its errors' rows and columns by
// 1/sqrt(w) (for a white fix: its variance by 1/w, as before), which
// keeps c positive definite. A segment's errors are taken as independent
// of the segments' before it (the anchors absorb most of what a bias
// carries over).
func (s *sysSolver) fixNoise(c *mat.SymDense, b *segBlock, n, i int) {
	f := &s.m.fixes[i]
	sen := &s.m.cfg.Sensors[f.sensor]
	d := s.dim[i]
	own := &s.noise[i]
	for r := range d {
		for q := 0; q <= r; q++ {
			c.SetSym(b.off[n]+r, b.off[n]+q, c.At(b.off[n]+r, b.off[n]+q)+own[r*3+q]/s.w[i])
		}
	}
	if sen.CorrelatedFraction <= 0 {
		return
	}
	full := fixDim(sen.Kind)
	for a := range n {
		j := b.fixes[a]
		fa := &s.m.fixes[j]
		if fa.sensor != f.sensor {
			continue
		}
		rho := math.Exp(-math.Abs(float64(f.stamp-fa.stamp))*1e-9/sen.CorrelationTimeS) / math.Sqrt(s.w[i]*s.w[j])
		for r := range d {
			for q := range s.dim[j] {
				var v float64
				for k := range full {
					v += f.gm[r*3+k] * fa.gm[q*3+k]
				}
				c.SetSym(b.off[n]+r, b.off[a]+q, c.At(b.off[n]+r, b.off[a]+q)+rho*v)
			}
		}
	}
}

// ownNoise returns fix i's own error covariance in its whitened residual
// (fixNoise), without its weight.
func (m *sysModel) ownNoise(i int) [9]float64 {
	f := &m.fixes[i]
	sen := &m.cfg.Sensors[f.sensor]
	d := f.dim
	var own [9]float64
	white := 1.0
	if sen.CorrelatedFraction > 0 {
		white = 1 - sen.CorrelatedFraction
	}
	full := fixDim(sen.Kind)
	for r := range d {
		own[r*3+r] = white
		if sen.CorrelatedFraction <= 0 {
			continue
		}
		for q := range d {
			for k := range full {
				own[r*3+q] += f.gm[r*3+k] * f.gm[q*3+k]
			}
		}
	}
	return own
}

// fixDim is the dimension of a fix of the kind with every component.
func fixDim(k fusion.FixKind) int {
	switch k {
	case fusion.FixPose:
		return 3
	case fusion.FixPosition, fusion.FixLandmark:
		return 2
	}
	return 1
}

// poseJacobian returns the Jacobian (3x3, rows past the fix's dimension
// zero) of fix i's whitened residual in the field pose p of the robot, by
// forward differences.
func (s *sysSolver) poseJacobian(i int, g []float64, p estimator.Pose) [9]float64 {
	var h [9]float64
	var e0 [3]float64
	s.m.residual(i, g, p, &e0)
	const d = 1e-7
	for c := range 3 {
		q := p
		switch c {
		case 0:
			q.X += d
		case 1:
			q.Y += d
		case 2:
			q.Heading += d
		}
		var e [3]float64
		s.m.residual(i, g, q, &e)
		for r := range s.dim[i] {
			h[r*3+c] = (e[r] - e0[r]) / d
		}
	}
	return h
}
