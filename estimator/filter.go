package estimator

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Indices of the state vector.
const (
	IX      = 0 // field x, metres
	IY      = 1 // field y, metres
	IHead   = 2 // heading, radians
	IOffset = 3 // IMU heading zero relative to the field, radians
)

// State is a copy of a filter's estimate: mean and covariance. It is a plain
// value (fixed-size arrays), cheap to copy, which is what the fusion layer's
// history window stores as checkpoints. Read it with the accessors; the
// zero value is empty (size 0).
type State struct {
	// n is the state size, 3 or 4.
	n int
	// x is the mean; entries past n are zero.
	x [4]float64
	// p is the n x n covariance, row-major with stride 4.
	p [16]float64
}

// NewState returns the state of size n (3 or 4) with mean x (length n) and
// covariance p (n x n row-major), copied as they are: no checks of the
// values, so that a stored state comes back bit for bit. It panics with
// ErrShape on a wrong size.
func NewState(n int, x, p []float64) State {
	if n != 3 && n != 4 || len(x) != n || len(p) != n*n {
		panic(fmt.Errorf("%w: state of size %d with a mean of length %d and a covariance of length %d", ErrShape, n, len(x), len(p)))
	}
	s := State{n: n}
	copy(s.x[:], x)
	for i := 0; i < n; i++ {
		copy(s.p[i*4:i*4+n], p[i*n:(i+1)*n])
	}
	return s
}

// Size returns the state size: 3 (x, y, heading) or 4 (with the IMU
// offset); 0 for the zero State.
func (s *State) Size() int { return s.n }

// Pose returns the pose part of the state.
func (s *State) Pose() Pose { return Pose{s.x[IX], s.x[IY], s.x[IHead]} }

// MeanAt returns mean component i (metres or radians, see IX..IOffset).
func (s *State) MeanAt(i int) float64 { return s.x[i] }

// Var returns the variance of state component i.
func (s *State) Var(i int) float64 { return s.p[i*4+i] }

// At returns covariance entry (i, j).
func (s *State) At(i, j int) float64 { return s.p[i*4+j] }

// MeanInto writes the mean into dst[:Size()]. It panics with ErrShape if
// dst is shorter.
func (s *State) MeanInto(dst []float64) {
	if len(dst) < s.n {
		panic(fmt.Errorf("%w: mean of %d into %d", ErrShape, s.n, len(dst)))
	}
	copy(dst, s.x[:s.n])
}

// CovarianceInto writes the Size() x Size() covariance, row-major, into
// dst. It panics with ErrShape if dst is shorter.
func (s *State) CovarianceInto(dst []float64) {
	n := s.n
	if len(dst) < n*n {
		panic(fmt.Errorf("%w: covariance of %dx%d into %d", ErrShape, n, n, len(dst)))
	}
	for i := 0; i < n; i++ {
		copy(dst[i*n:(i+1)*n], s.p[i*4:i*4+n])
	}
}

// PoseCovarianceInto writes the 3x3 row-major covariance of (x, y,
// heading) into dst.
func (s *State) PoseCovarianceInto(dst *[9]float64) {
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			dst[i*3+j] = s.p[i*4+j]
		}
	}
}

// Mean returns the mean as a gonum vector of length Size().
func (s *State) Mean() *mat.VecDense {
	return mat.NewVecDense(s.n, append([]float64(nil), s.x[:s.n]...))
}

// Covariance returns the covariance as a gonum symmetric matrix.
func (s *State) Covariance() *mat.SymDense {
	c := mat.NewSymDense(s.n, nil)
	for i := 0; i < s.n; i++ {
		for j := i; j < s.n; j++ {
			c.SetSym(i, j, s.p[i*4+j])
		}
	}
	return c
}

// Outcome says what became of one Update.
type Outcome struct {
	// NIS is the normalised innovation squared v^T S^-1 v.
	NIS float64
	// Dim is the measurement's dimension (the NIS degrees of freedom).
	Dim int
	// Gated is true when NIS exceeded the gate and nothing changed.
	Gated bool
}

// Filter is the extended Kalman filter. The zero value is not usable; make
// one with NewFilter.
type Filter struct {
	st State

	// Scratch, reused by every call.
	fu    [9]float64
	a     [16]float64
	h     [12]float64
	s, l  [9]float64
	k     [12]float64
	pht   [12]float64
	chol  [16]float64
	saved State
}

// NewFilter returns a filter with n states (3, or 4 with the IMU offset)
// at mean x and covariance p (n x n row-major). It panics on a wrong n or
// lengths and returns an error if p is not a valid covariance.
func NewFilter(n int, x, p []float64) (*Filter, error) {
	if n != 3 && n != 4 {
		panic(fmt.Errorf("%w: state size %d, want 3 or 4", ErrShape, n))
	}
	if len(x) != n || len(p) != n*n {
		panic(fmt.Errorf("%w: mean of length %d and covariance of length %d for %d states", ErrShape, len(x), len(p), n))
	}
	for _, v := range x {
		if !finite(v) {
			return nil, fmt.Errorf("initial state: %w", ErrNotFinite)
		}
	}
	if err := CheckCovariance(p, n); err != nil {
		return nil, fmt.Errorf("initial covariance: %w", err)
	}
	f := &Filter{}
	f.st.n = n
	copy(f.st.x[:], x)
	f.st.x[IHead] = Wrap(f.st.x[IHead])
	if n == 4 {
		f.st.x[IOffset] = Wrap(f.st.x[IOffset])
	}
	for i := 0; i < n; i++ {
		copy(f.st.p[i*4:i*4+n], p[i*n:(i+1)*n])
	}
	return f, nil
}

// N returns the state size.
func (f *Filter) N() int { return f.st.n }

// State returns a copy of the estimate.
func (f *Filter) State() State { return f.st }

// SetState replaces the estimate by a copy of s (a checkpoint taken with
// State). It panics if s has another state size.
func (f *Filter) SetState(s *State) {
	if s.n != f.st.n {
		panic(fmt.Errorf("%w: state of size %d set on a filter of size %d", ErrShape, s.n, f.st.n))
	}
	f.st = *s
}

// Pose returns the pose part of the mean.
func (f *Filter) Pose() Pose { return f.st.Pose() }

// Predict moves the estimate by the body step u with 3x3 row-major step
// covariance cu, and adds q (length N, variances) to the diagonal: the
// time-driven process noise (heading random walk, IMU offset random walk).
//
//	x' = f(x, u),  P' = Fx P Fx^T + Fu cu Fu^T + diag(q)
func (f *Filter) Predict(u Step, cu *[9]float64, q *[4]float64) {
	n := f.st.n
	p := f.st.Pose()
	// Advance and ArcJacobians, sharing the trigonometry.
	var c chord
	c.set(p.Heading, u)
	np := c.advance(p, u)
	f.st.x[IX], f.st.x[IY], f.st.x[IHead] = np.X, np.Y, np.Heading
	fu := &f.fu
	c.jacobians(nil, fu)

	// P = F P F^T, where F is the identity except for the heading column of
	// the position rows (fx[2] = a, fx[5] = b): the rows first, then the
	// columns.
	P := &f.st.p
	a, b := -c.k*c.cy, c.k*c.cx
	for j := 0; j < n; j++ {
		P[0*4+j] += a * P[2*4+j]
		P[1*4+j] += b * P[2*4+j]
	}
	for i := 0; i < n; i++ {
		P[i*4+0] += a * P[i*4+2]
		P[i*4+1] += b * P[i*4+2]
	}
	// P += Fu cu Fu^T on the pose block.
	var g [9]float64
	Sandwich(&g, fu, cu)
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			P[i*4+j] += g[i*3+j]
		}
	}
	for i := 0; i < n; i++ {
		P[i*4+i] += q[i]
	}
	symmetrise(P[:], n, 4)
}

// Update applies measurement m unless gate refuses its NIS. It returns the
// NIS. A gated measurement, or one that fails with an error, leaves the
// filter unchanged. The update is in Joseph form,
//
//	P' = (I - K H) P (I - K H)^T + K R K^T,
//
// symmetrised and checked by Cholesky (Bar-Shalom, Li and Kirubarajan, 2001,
// eq. 5.2.3-18 for the Joseph form; DEVELOPERS.md, "Design: Measurement
// updates").
func (f *Filter) Update(m *Measurement, gate Gate) (Outcome, error) {
	d := m.Kind.Dim()
	out := Outcome{Dim: d}
	var v [3]float64
	if err := f.innovation(m, &v); err != nil {
		return out, err
	}
	if err := f.innovationCovariance(m); err != nil {
		return out, err
	}
	out.NIS = f.nis(&v, d)
	if !gate.Passes(out.NIS) {
		out.Gated = true
		return out, nil
	}
	f.gain(d)
	return out, f.correct(m, &v)
}

// innovation writes z - h(x) into v (angles wrapped) and the Jacobian H
// into f.h.
func (f *Filter) innovation(m *Measurement, v *[3]float64) error {
	d := m.Kind.Dim()
	for i := 0; i < d; i++ {
		if !finite(m.Z[i]) {
			return fmt.Errorf("measurement %s component %d: %w", m.Kind, i, ErrNotFinite)
		}
	}
	var z [3]float64
	if err := m.predict(f.st.x[:], f.st.n, &z, &f.h); err != nil {
		return err
	}
	for i := 0; i < d; i++ {
		v[i] = m.Z[i] - z[i]
		if m.Kind.IsAngle(i) {
			v[i] = Wrap(v[i])
		}
	}
	return nil
}

// innovationCovariance forms P H^T in f.k (n x d, stride 3, until the gain
// replaces it) and S = H P H^T + R in f.s, and factorises S into f.l.
func (f *Filter) innovationCovariance(m *Measurement) error {
	n, d := f.st.n, m.Kind.Dim()
	P, H := &f.st.p, &f.h
	for i := 0; i < n; i++ {
		for j := 0; j < d; j++ {
			var acc float64
			for k := 0; k < n; k++ {
				acc += P[i*4+k] * H[j*4+k]
			}
			f.k[i*3+j] = acc
		}
	}
	for i := 0; i < d; i++ {
		for j := 0; j < d; j++ {
			var acc float64
			for k := 0; k < n; k++ {
				acc += H[i*4+k] * f.k[k*3+j]
			}
			f.s[i*3+j] = acc + m.R[i*3+j]
		}
	}
	symmetrise(f.s[:], d, measStride)
	if !cholesky(f.s[:], f.l[:], d, measStride) {
		return fmt.Errorf("innovation covariance of %s: %w", m.Kind, ErrNotPositiveDefinite)
	}
	return nil
}

// nis returns v^T S^-1 v from the factor of S in f.l.
func (f *Filter) nis(v *[3]float64, d int) float64 {
	var y [3]float64
	cholForward(f.l[:], d, measStride, v[:], y[:])
	var q float64
	for i := 0; i < d; i++ {
		q += y[i] * y[i]
	}
	return q
}

// gain keeps P H^T in f.pht and replaces f.k by K = P H^T S^-1, solving
// S K_i^T = PHt_i^T row by row.
func (f *Filter) gain(d int) {
	f.pht = f.k
	for i := 0; i < f.st.n; i++ {
		var row, sol [3]float64
		copy(row[:d], f.k[i*3:i*3+d])
		cholSolveVec(f.l[:], d, measStride, row[:], sol[:])
		copy(f.k[i*3:i*3+d], sol[:d])
	}
}

// correct moves the mean by K v and the covariance by the Joseph form, and
// takes both back if the covariance is no longer positive definite.
func (f *Filter) correct(m *Measurement, v *[3]float64) error {
	n, d := f.st.n, m.Kind.Dim()
	f.saved = f.st
	for i := 0; i < n; i++ {
		var acc float64
		for j := 0; j < d; j++ {
			acc += f.k[i*3+j] * v[j]
		}
		f.st.x[i] += acc
	}
	f.st.x[IHead] = Wrap(f.st.x[IHead])
	if n == 4 {
		f.st.x[IOffset] = Wrap(f.st.x[IOffset])
	}
	f.joseph(m, n, d)
	if !cholesky(f.st.p[:], f.chol[:], n, 4) {
		f.st = f.saved
		return fmt.Errorf("state covariance after %s update: %w", m.Kind, ErrNotPositiveDefinite)
	}
	return nil
}

// joseph replaces P by (I-KH) P (I-KH)^T + K R K^T, formed as rank-d
// corrections instead of n x n products:
//
//	A  = (I-KH) P = P - K (H P)
//	P' = A (I-KH)^T + K R K^T = A + (K R - A H^T) K^T
//
// which is the same expression, regrouped (3dn^2 + nd^2 products instead of
// 2n^3 + 2dn^2 + nd^2). H P is the transpose of P H^T, which Update kept in
// f.pht (P is symmetric).
func (f *Filter) joseph(m *Measurement, n, d int) {
	P := &f.st.p
	K, H := &f.k, &f.h
	// A = P - K (H P), with (H P)[a][j] = pht[j][a].
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			acc := P[i*4+j]
			for a := 0; a < d; a++ {
				acc -= K[i*3+a] * f.pht[j*3+a]
			}
			f.a[i*4+j] = acc
		}
	}
	// C = K R - A H^T (n x d, stride 3).
	var c [12]float64
	for i := 0; i < n; i++ {
		for a := 0; a < d; a++ {
			var kr, ah float64
			for b := 0; b < d; b++ {
				kr += K[i*3+b] * m.R[b*3+a]
			}
			for k := 0; k < n; k++ {
				ah += f.a[i*4+k] * H[a*4+k]
			}
			c[i*3+a] = kr - ah
		}
	}
	// P' = A + C K^T.
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			acc := f.a[i*4+j]
			for a := 0; a < d; a++ {
				acc += c[i*3+a] * K[j*3+a]
			}
			P[i*4+j] = acc
		}
	}
	symmetrise(P[:], n, 4)
}

// InitOffset initialises the IMU offset from an absolute IMU heading z with
// variance r (DEVELOPERS.md, "Design: State"): offset = wrap(z - heading), with variance
// P_hh + r and covariance -P_h,s with every other state s, because the
// offset is z - heading and inherits heading's correlations with the
// opposite sign. It panics on a 3-state filter.
func (f *Filter) InitOffset(z, r float64) error {
	if f.st.n != 4 {
		panic("estimator: InitOffset on a filter without an IMU offset state")
	}
	if !finite(z) || !finite(r) || !(r > 0) {
		return fmt.Errorf("IMU heading %v with variance %v: %w", z, r, ErrNotFinite)
	}
	P := &f.st.p
	f.st.x[IOffset] = Wrap(z - f.st.x[IHead])
	for s := 0; s < 3; s++ {
		P[IOffset*4+s] = -P[IHead*4+s]
		P[s*4+IOffset] = -P[IHead*4+s]
	}
	P[IOffset*4+IOffset] = P[IHead*4+IHead] + r
	return nil
}

// Reset sets the pose part of the estimate to pose with 3x3 covariance c
// (row-major), clearing its correlation with the IMU offset, whose own
// variance is kept. The caller re-initialises the offset on the next IMU
// sample.
func (f *Filter) Reset(pose Pose, c *[9]float64) error {
	if !finite(pose.X) || !finite(pose.Y) || !finite(pose.Heading) {
		return fmt.Errorf("pose: %w", ErrNotFinite)
	}
	if err := CheckCovariance(c[:], 3); err != nil {
		return fmt.Errorf("pose covariance: %w", err)
	}
	f.st.x[IX], f.st.x[IY], f.st.x[IHead] = pose.X, pose.Y, Wrap(pose.Heading)
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			f.st.p[i*4+j] = c[i*3+j]
		}
		if f.st.n == 4 {
			f.st.p[i*4+3], f.st.p[3*4+i] = 0, 0
		}
	}
	return nil
}

// Position95 returns the radius in metres of the 95% position ellipse's major
// semi-axis: sqrt(chi2_2(0.95) * largest eigenvalue of the position block).
func (s *State) Position95() float64 {
	a, b, c := s.p[0], s.p[1], s.p[5]
	lmax := (a+c)/2 + math.Sqrt(((a-c)/2)*((a-c)/2)+b*b)
	// chi-square 2 dof, 0.95 quantile = -2 ln(0.05) (closed form for 2 dof).
	return math.Sqrt(-2 * math.Log(0.05) * lmax)
}
