package estimator

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Indices of the state vector's fixed part; the optional states follow as
// the Layout places them.
const (
	IX      = 0 // field x, metres
	IY      = 1 // field y, metres
	IHead   = 2 // heading, radians
	IOffset = 3 // IMU heading zero relative to the field, radians, when the layout has it
)

// State is a copy of a filter's estimate: mean and covariance. It is a plain
// value (fixed-size arrays, no pointers), cheap to copy, which is what the
// fusion layer's history window stores as checkpoints. Read it with the
// accessors; the zero value is empty (size 0).
type State struct {
	// n is the state size, 3 to MaxStates.
	n int
	// angles has bit i set for each angular state i (wrapped).
	angles uint16
	// x is the mean; entries past n are zero.
	x [MaxStates]float64
	// p is the n x n covariance, row-major with stride MaxStates.
	p [MaxStates * MaxStates]float64
	// eiv is, with a turn scale in the layout, M = E[c e^T] (EIVDim x
	// EIVDim row-major): c = P[q, s_t], the turn scale's covariance with
	// q, the pose and the IMU offset, and e their error. The reported
	// turns enter c, and their own noise enters e, so the two correlate
	// and an update would pull s_t towards 0 (errors in variables); Update
	// takes that expected pull out (DEVELOPERS.md, "Design: State"). The
	// offset's row and column are zero without one; all of it is zero
	// without a turn scale.
	eiv [eivSize]float64
	// eivc is the compensation's consider column psi: the sensitivity of
	// the estimate's error to d, the unknown relative error of the
	// noise of the reported steps that PredictReported is given (the pull
	// Update takes out is computed from it; the true one is (1 + d) times
	// that), a consider parameter of mean 0 and standard deviation
	// LayoutSpec.NoiseRatioStd, s. p includes s^2 psi psi^T, and the
	// covariance of the state with d is s^2 psi (DEVELOPERS.md, "Design:
	// State"). Zero until an update takes a pull out; entries past n are
	// zero.
	eivc [MaxStates]float64
	// imuRef and imuTurn are, with a gyro scale in the layout, the IMU
	// heading (wrapped, radians) of the last IMU update or offset
	// initialisation, and the IMU's turn from the heading before it to
	// that one (0 after an initialisation): the next IMU heading's update
	// first moves the offset by the gyro scale times imuTurn
	// (Filter.Update). imuWheel is the estimate's own turn since then,
	// its predictions' heading changes summed unwrapped, by which the
	// IMU's turn to the next heading is unwrapped (State.imuDelta). All
	// zero without a gyro scale.
	imuRef, imuTurn, imuWheel float64
}

// EIVDim is the order of the errors-in-variables moments (State's eiv):
// the pose and the IMU offset, whose row and column stay zero in a layout
// without one.
const EIVDim = 4

// eivDim and eivSize are EIVDim and the number of moments.
const (
	eivDim  = EIVDim
	eivSize = eivDim * eivDim
)

// EIVMoments are the errors-in-variables moments, EIVDim x EIVDim
// row-major (State.EIV).
type EIVMoments = [eivSize]float64

// NewState returns the state of size n (3 to MaxStates) whose angular
// states are the bits of angles (Layout.Angles), with mean x (length n) and
// covariance p (n x n row-major), copied as they are: no checks of the
// values, so that a stored state comes back bit for bit. It panics with
// ErrShape on a wrong size.
func NewState(n int, angles uint16, x, p []float64) State {
	if n < 3 || n > MaxStates || len(x) != n || len(p) != n*n {
		panic(fmt.Errorf("%w: state of size %d with a mean of length %d and a covariance of length %d", ErrShape, n, len(x), len(p)))
	}
	s := State{n: n, angles: angles}
	copy(s.x[:], x)
	for i := 0; i < n; i++ {
		copy(s.p[i*stride:i*stride+n], p[i*n:(i+1)*n])
	}
	return s
}

// CopyFrom makes s a copy of src. For states of one size it copies only
// the Size() x Size() part that is in use (every entry beyond it is zero in
// both), which is what keeps checkpoints cheap.
func (s *State) CopyFrom(src *State) {
	n := src.n
	if s.n != n {
		*s = *src
		return
	}
	s.angles = src.angles
	copy(s.x[:n], src.x[:n])
	// One block from the first row's start to the last row's end: the
	// columns past n between rows are zero in both.
	copy(s.p[:(n-1)*stride+n], src.p[:(n-1)*stride+n])
	s.eiv = src.eiv
	copy(s.eivc[:n], src.eivc[:n])
	s.imuRef, s.imuTurn, s.imuWheel = src.imuRef, src.imuTurn, src.imuWheel
}

// IMUGyro returns the IMU heading of the last IMU update, the IMU's turn
// up to it, by whose gyro scale times the next IMU update moves the
// offset, and the estimate's own turn since (State's imuRef, imuTurn and
// imuWheel; zero without a gyro scale).
func (s *State) IMUGyro() (ref, turn, wheel float64) { return s.imuRef, s.imuTurn, s.imuWheel }

// SetIMUGyro sets them (a state read back from a snapshot).
func (s *State) SetIMUGyro(ref, turn, wheel float64) {
	s.imuRef, s.imuTurn, s.imuWheel = ref, turn, wheel
}

// EIV returns the errors-in-variables moments of the turn scale (State's
// eiv; zero without a turn scale).
func (s *State) EIV() [eivSize]float64 { return s.eiv }

// SetEIV sets them (a state read back from a snapshot).
func (s *State) SetEIV(m [eivSize]float64) { s.eiv = m }

// EIVConsider returns the consider column of the turn scale's
// compensation (State's eivc; entries past Size() are zero, all of it
// zero without a turn scale).
func (s *State) EIVConsider() [MaxStates]float64 { return s.eivc }

// SetEIVConsider sets it (a state read back from a snapshot); entries
// past Size() are taken as zero.
func (s *State) SetEIVConsider(c [MaxStates]float64) {
	s.eivc = [MaxStates]float64{}
	copy(s.eivc[:s.n], c[:s.n])
}

// SetPacked makes s the state of size n with angular states angles whose
// packed form (Filter.Pack) is src, copying only what is in use when s
// already has that size. The packed form's length says what it holds:
// the moments and their consider column follow the covariance when there
// are EIVDim^2 + n more values, and the IMU heading, turn and wheel turn
// of a gyro scale are the last three values when three more are left.
func (s *State) SetPacked(n int, angles uint16, src []float64) {
	if s.n != n {
		*s = State{n: n}
	}
	s.angles = angles
	copy(s.x[:n], src[:n])
	for i := 0; i < n; i++ {
		copy(s.p[i*stride:i*stride+n], src[n+i*n:n+(i+1)*n])
	}
	s.eiv = [eivSize]float64{}
	s.eivc = [MaxStates]float64{}
	rest := len(src) - n - n*n
	if rest >= eivSize+n {
		copy(s.eiv[:], src[n+n*n:])
		copy(s.eivc[:n], src[n+n*n+eivSize:])
		rest -= eivSize + n
	}
	s.imuRef, s.imuTurn, s.imuWheel = 0, 0, 0
	if rest == 3 {
		s.imuRef, s.imuTurn, s.imuWheel = src[len(src)-3], src[len(src)-2], src[len(src)-1]
	}
}

// Size returns the state size; 0 for the zero State.
func (s *State) Size() int { return s.n }

// Angles returns the set of angular states (bit i for state i).
func (s *State) Angles() uint16 { return s.angles }

// isAngle reports whether state i is wrapped.
func (s *State) isAngle(i int) bool { return s.angles&(1<<i) != 0 }

// Pose returns the pose part of the state.
func (s *State) Pose() Pose { return Pose{s.x[IX], s.x[IY], s.x[IHead]} }

// MeanAt returns mean component i (metres, radians or as the layout says).
func (s *State) MeanAt(i int) float64 { return s.x[i] }

// Var returns the variance of state component i.
func (s *State) Var(i int) float64 { return s.p[i*stride+i] }

// At returns covariance entry (i, j).
func (s *State) At(i, j int) float64 { return s.p[i*stride+j] }

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
		copy(dst[i*n:(i+1)*n], s.p[i*stride:i*stride+n])
	}
}

// PoseCovarianceInto writes the 3x3 row-major covariance of (x, y,
// heading) into dst.
func (s *State) PoseCovarianceInto(dst *[9]float64) {
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			dst[i*3+j] = s.p[i*stride+j]
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
			c.SetSym(i, j, s.p[i*stride+j])
		}
	}
	return c
}

// wrapAngles wraps the angular states of the mean.
func (s *State) wrapAngles() {
	for a, i := s.angles, 0; a != 0; a, i = a>>1, i+1 {
		if a&1 != 0 {
			s.x[i] = Wrap(s.x[i])
		}
	}
}

// Outcome says what became of one Update.
type Outcome struct {
	// NIS is the normalised innovation squared v^T S^-1 v with the
	// measurement's own covariance (the raw NIS, before any robust
	// re-weighting): the one the gate and the consistency statistics use.
	NIS float64
	// Dim is the measurement's dimension (the NIS degrees of freedom).
	Dim int
	// Gated is true when NIS exceeded the gate and nothing changed.
	Gated bool
	// Weight is the robust weight w the update used (its noise was R / w);
	// 1 without a robust model, 0 when gated.
	Weight float64
	// LogDetS is the natural log of the determinant of the raw innovation
	// covariance S = H P H^T + R (R the measurement's own, before any robust
	// re-weighting), in the log of the product of the components' units:
	// with NIS, a Gaussian innovation's log-likelihood is
	// -(LogDetS + NIS + Dim log 2pi) / 2.
	LogDetS float64
	// Whitened is L^-1 v, the innovation v whitened by the Cholesky factor
	// L of the raw S (first Dim entries; dimensionless). Under a consistent
	// filter its components are independent standard normals, white in
	// time (Mehra 1970); NIS is its squared length.
	Whitened [3]float64
}

// Filter is the extended Kalman filter. The zero value is not usable; make
// one with NewFilter.
type Filter struct {
	st     State
	layout Layout

	// Scratch, reused by every call.
	h     [3 * MaxStates]float64
	s, l  [9]float64
	r     [9]float64
	k     [MaxStates * 3]float64
	pht   [MaxStates * 3]float64
	chol  [MaxStates * MaxStates]float64
	saved State
	// unturned is the estimate before an IMU heading's gyro turn, kept
	// for a gated or failed update (Update).
	unturned State
	// phi caches the bias blocks' decay exp(-dt/tau) for the intervals
	// phiDt (odometry mostly comes at one rate, split now and then by a
	// late fix); a pure function of dt, so the cache changes no result.
	phi   [2][maxBlocks]float64
	phiDt [2]float64
	phiOK [2]bool
	cur   int // the phi entry in use
}

// NewFilter returns a filter with the layout l at mean x and covariance p
// (Size x Size row-major). It panics on wrong lengths and returns an error
// if p is not a valid covariance.
func NewFilter(l *Layout, x, p []float64) (*Filter, error) {
	n := l.Size()
	if n < 3 || n > MaxStates {
		panic(fmt.Errorf("%w: state size %d; make the layout with NewLayout", ErrShape, n))
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
	f := &Filter{layout: *l}
	f.st = NewState(n, l.Angles(), x, p)
	f.st.wrapAngles()
	// Symmetric to the bit: Predict keeps it so outside the pose block.
	symmetrise(f.st.p[:], n, stride)
	return f, nil
}

// N returns the state size.
func (f *Filter) N() int { return f.st.n }

// Layout returns the filter's state layout.
func (f *Filter) Layout() *Layout { return &f.layout }

// State returns a copy of the estimate.
func (f *Filter) State() State { return f.st }

// Position95 returns the estimate's State.Position95 without copying the
// estimate.
func (f *Filter) Position95() float64 { return f.st.Position95() }

// Var returns the estimate's variance of state i without copying the
// estimate.
func (f *Filter) Var(i int) float64 { return f.st.Var(i) }

// StateInto copies the estimate into dst (State.CopyFrom).
func (f *Filter) StateInto(dst *State) { dst.CopyFrom(&f.st) }

// PackedSize returns the length of the filter's packed estimate: the mean
// and the covariance, N + N*N values, with a turn scale the 16
// errors-in-variables moments (State's eiv) and the N values of their
// consider column (eivc), and with a gyro scale the IMU's last heading,
// its turn and the estimate's since (imuRef, imuTurn, imuWheel).
func (f *Filter) PackedSize() int {
	n := f.st.n + f.st.n*f.st.n
	if f.layout.turnScale >= 0 {
		n += eivSize + f.st.n
	}
	if f.layout.gyro >= 0 {
		n += 3
	}
	return n
}

// Pack writes the estimate into dst (PackedSize values: the mean, then the
// covariance row-major, then the moments and their consider column, then
// the IMU's last heading, its turn and the estimate's since), the compact
// form a history of checkpoints keeps.
func (f *Filter) Pack(dst []float64) {
	n := f.st.n
	copy(dst[:n], f.st.x[:n])
	for i := 0; i < n; i++ {
		copy(dst[n+i*n:n+(i+1)*n], f.st.p[i*stride:i*stride+n])
	}
	if f.layout.turnScale >= 0 {
		copy(dst[n+n*n:n+n*n+eivSize], f.st.eiv[:])
		copy(dst[n+n*n+eivSize:n+n*n+eivSize+n], f.st.eivc[:n])
	}
	if k := f.PackedSize(); f.layout.gyro >= 0 {
		dst[k-3], dst[k-2], dst[k-1] = f.st.imuRef, f.st.imuTurn, f.st.imuWheel
	}
}

// Unpack replaces the estimate by the packed one in src (written by Pack
// on a filter of the same layout), bit for bit.
func (f *Filter) Unpack(src []float64) {
	n := f.st.n
	copy(f.st.x[:n], src[:n])
	for i := 0; i < n; i++ {
		copy(f.st.p[i*stride:i*stride+n], src[n+i*n:n+(i+1)*n])
	}
	if f.layout.turnScale >= 0 {
		copy(f.st.eiv[:], src[n+n*n:n+n*n+eivSize])
		copy(f.st.eivc[:n], src[n+n*n+eivSize:n+n*n+eivSize+n])
	}
	if k := f.PackedSize(); f.layout.gyro >= 0 {
		f.st.imuRef, f.st.imuTurn, f.st.imuWheel = src[k-3], src[k-2], src[k-1]
	}
}

// SetState replaces the estimate by a copy of s (a checkpoint taken with
// State or StateInto). It panics if s has another state size.
func (f *Filter) SetState(s *State) {
	if s.n != f.st.n {
		panic(fmt.Errorf("%w: state of size %d set on a filter of size %d", ErrShape, s.n, f.st.n))
	}
	f.st.CopyFrom(s)
}

// Pose returns the pose part of the mean.
func (f *Filter) Pose() Pose { return f.st.Pose() }

// transition is the linearised motion over one interval: F = I + E, where
// E is non-zero only in the pose rows (columns heading and the calibration
// states) and on the bias blocks' diagonal (phi - 1).
type transition struct {
	// cols are the columns of E's pose rows: heading, then the
	// calibration states present; e[i][c] for pose row i.
	cols [4]int
	nc   int
	e    [3][4]float64
	// u is the true step (scaled and with the rate bias); fu its step
	// Jacobian times diag(s_f, s_f, s_t), for the reported step's noise.
	u  Step
	fu [9]float64
	c  chord
	// raw is the step Jacobian d(pose')/d(true step), row-major.
	raw [9]float64
}

// motion fills t for the step u reported over dtS seconds from the state st.
func (f *Filter) motion(t *transition, st *State, u Step, dtS float64) {
	l := &f.layout
	sf, stt, br := 1.0, 1.0, 0.0
	if l.forwardScale >= 0 {
		sf, stt = st.x[l.forwardScale], st.x[l.turnScale]
	}
	if l.rate >= 0 {
		br = st.x[l.rate]
	}
	t.u = Step{sf * u.ForwardM, sf * u.LeftM, stt*u.TurnRad + br*dtS}
	t.c.set(st.x[IHead], t.u)
	fu := &t.raw
	t.c.jacobians(nil, fu)
	// Columns of E: d(pose')/d(heading) less the identity, and the
	// derivatives through the true step u' = (s_f a, s_f b, s_t dth + b_r dt).
	t.cols[0], t.nc = IHead, 1
	t.e[0][0], t.e[1][0], t.e[2][0] = -t.c.k*t.c.cy, t.c.k*t.c.cx, 0
	if l.forwardScale >= 0 {
		t.cols[1], t.cols[2] = l.forwardScale, l.turnScale
		for i := 0; i < 3; i++ {
			t.e[i][1] = fu[i*3+0]*u.ForwardM + fu[i*3+1]*u.LeftM
			t.e[i][2] = fu[i*3+2] * u.TurnRad
		}
		t.nc = 3
	}
	if l.rate >= 0 {
		t.cols[t.nc] = l.rate
		for i := 0; i < 3; i++ {
			t.e[i][t.nc] = fu[i*3+2] * dtS
		}
		t.nc++
	}
	for i := 0; i < 3; i++ {
		t.fu[i*3+0] = fu[i*3+0] * sf
		t.fu[i*3+1] = fu[i*3+1] * sf
		t.fu[i*3+2] = fu[i*3+2] * stt
	}
}

// Predict moves the estimate by the body step u the odometry reported over
// dtS seconds, with 3x3 row-major step covariance cu, and adds q (variances,
// one per state) to the diagonal: the time- and travel-driven process noise
// (heading and IMU offset random walks, calibration random walks). The step
// the pose moves by is the calibrated one, (s_f a, s_f b, s_t dth + b_r dt),
// where the layout has those states; bias blocks decay by exp(-dtS/tau) and
// gain their Gauss-Markov noise (DEVELOPERS.md, "Design: Motion prediction",
// "Design: Sensors").
//
//	x' = f(x, u),  P' = F P F^T + G cu G^T + diag(q) + Q_bias
func (f *Filter) Predict(u Step, cu *[9]float64, dtS float64, q *[MaxStates]float64) {
	f.PredictReported(u, cu, nil, dtS, q)
}

// PredictReported is Predict for a step whose report carries noise of its
// own: rep (3x3 row-major, nil for none) is the part of cu that lies in the
// reported step (the wheels' noise, a slipping wheel's inflation of it
// included, but not the scrub, rotation the wheels do not see; none for
// steps from commanded velocities, whose noise is the truth's departure
// from them). With a turn scale in the layout it moves
// the errors-in-variables moments (State's eiv):
//
//	M' = F M F^T - sum_k d_k (G rep_k)^T
//
// F the pose block of the transition (bordered by a 1 for the IMU offset,
// which a step does not move), G the step Jacobian times the scales, and,
// on the pose block alone, d_k the change of P[pose, s_t] per unit of reported step
// component k (d(pose')/d(step_k) times P[s_f, s_t] for forward and left,
// times P[s_t, s_t] for the turn) and rep_k column k of rep: the reported
// step enters P[pose, s_t] and its noise enters the pose's error with the
// opposite sign.
func (f *Filter) PredictReported(u Step, cu, rep *[9]float64, dtS float64, q *[MaxStates]float64) {
	var t transition
	f.motion(&t, &f.st, u, dtS)
	if f.layout.turnScale >= 0 && (rep != nil || f.st.eiv != [eivSize]float64{}) {
		f.predictEIV(&t, rep)
	}
	if f.st.eivc != [MaxStates]float64{} {
		// The consider column moves as a column of P: psi' = F psi.
		c := &f.st.eivc
		var d [3]float64
		for a := 0; a < 3; a++ {
			for k := 0; k < t.nc; k++ {
				d[a] += t.e[a][k] * c[t.cols[k]]
			}
		}
		c[IX], c[IY], c[IHead] = c[IX]+d[0], c[IY]+d[1], c[IHead]+d[2]
	}
	n := f.st.n
	np := t.c.advance(f.st.Pose(), t.u)
	if f.layout.gyro >= 0 {
		// Bounded: past maxIMUWheel the gyro scale's own error over the
		// turn is past half a turn, and the unwrapping means nothing.
		w := f.st.imuWheel + Wrap(np.Heading-f.st.x[IHead])
		f.st.imuWheel = math.Max(-maxIMUWheel, math.Min(maxIMUWheel, w))
	}
	f.st.x[IX], f.st.x[IY], f.st.x[IHead] = np.X, np.Y, np.Heading

	// P = F P F^T with F = I + E, E non-zero only in the pose rows: the
	// pose rows of M = F P are r_a = P_a + sum_c e[a][c] P_cols[c]; the
	// product M F^T changes only the pose columns, and since P is
	// symmetric its pose columns outside the pose block are the pose rows
	// r_a, mirrored; the pose block is r_a(b) + sum_c r_a(cols[c]) e[b][c].
	// Without calibration states the heading row of E is zero (rows = 2).
	P := &f.st.p
	rows := 3
	if t.nc == 1 {
		rows = 2
	}
	var r [3][MaxStates]float64
	for a := 0; a < 3; a++ {
		copy(r[a][:n], P[a*stride:a*stride+n])
	}
	for a := 0; a < rows; a++ {
		ra := &r[a]
		for c := 0; c < t.nc; c++ {
			e := t.e[a][c]
			pc := P[t.cols[c]*stride : t.cols[c]*stride+n]
			for j, v := range pc {
				ra[j] += e * v
			}
		}
	}
	for a := 0; a < 3; a++ {
		for j := 3; j < n; j++ {
			P[a*stride+j], P[j*stride+a] = r[a][j], r[a][j]
		}
	}
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			acc := r[a][b]
			if b < rows {
				for c := 0; c < t.nc; c++ {
					acc += r[a][t.cols[c]] * t.e[b][c]
				}
			}
			P[a*stride+b] = acc
		}
	}
	// P += G cu G^T on the pose block.
	var g [9]float64
	Sandwich(&g, &t.fu, cu)
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			P[i*stride+j] += g[i*3+j]
		}
	}
	f.decay(dtS)
	for i := 0; i < n; i++ {
		P[i*stride+i] += q[i]
	}
	// Everything outside the pose block was written symmetric.
	symmetrise(P[:], 3, stride)
}

// predictEIV moves the turn scale's errors-in-variables moments over the
// step of t (PredictReported), before P is moved. Written out by hand: it
// runs on every step, replays of the window included.
func (f *Filter) predictEIV(t *transition, rep *[9]float64) {
	m := &f.st.eiv
	// F = I + e in the heading column of the position rows, e = (e0,
	// e1): F M adds e_a times row 2 to rows 0 and 1; (F M) F^T adds e_b
	// times column 2 to columns 0 and 1. The offset's row and column move
	// only with F's position rows (the offset is not moved by a step).
	e0, e1 := t.e[0][0], t.e[1][0]
	for b := 0; b < eivDim; b++ {
		m[b] += e0 * m[2*eivDim+b]
		m[eivDim+b] += e1 * m[2*eivDim+b]
	}
	for a := 0; a < eivDim; a++ {
		r := m[a*eivDim : a*eivDim+eivDim]
		r[0] += e0 * r[2]
		r[1] += e1 * r[2]
	}
	if rep != nil {
		// M -= D R G^T on the pose block: D = raw diag(c), c =
		// (P[s_f,s_t], P[s_f,s_t], P[s_t,s_t]); R = rep; G = t.fu.
		ts, fs := f.layout.turnScale, f.layout.forwardScale
		pts, pfs := f.st.p[ts*stride+ts], f.st.p[fs*stride+ts]
		r, g, w := rep, &t.fu, &t.raw
		// rg[k][b] = (R G^T)[k][b] = sum_j R[k][j] G[b][j], scaled by c_k.
		var rg [3][3]float64
		for k := 0; k < 3; k++ {
			c := pfs
			if k == 2 {
				c = pts
			}
			r0, r1, r2 := r[k*3]*c, r[k*3+1]*c, r[k*3+2]*c
			rg[k][0] = r0*g[0] + r1*g[1] + r2*g[2]
			rg[k][1] = r0*g[3] + r1*g[4] + r2*g[5]
			rg[k][2] = r0*g[6] + r1*g[7] + r2*g[8]
		}
		for a := 0; a < 3; a++ {
			for b := 0; b < 3; b++ {
				m[a*eivDim+b] -= w[a*3]*rg[0][b] + w[a*3+1]*rg[1][b] + w[a*3+2]*rg[2][b]
			}
		}
	}
}

// decay applies the bias blocks' Gauss-Markov transition over dtS seconds:
// b' = phi b + w with phi = exp(-dtS/tau) and w of covariance
// (1 - phi^2) C, C the block's stationary covariance. Splitting an interval
// composes exactly: phi(f dt) phi((1-f) dt) = phi(dt), and the variances
// add up to the same (1 - phi^2) C.
func (f *Filter) decay(dtS float64) {
	l := &f.layout
	n := f.st.n
	P := &f.st.p
	phis := f.decays(dtS)
	for k := 0; k < l.nb; k++ {
		b := &l.blocks[k]
		phi := phis[k]
		for i := b.at; i < b.at+b.Dim; i++ {
			f.st.x[i] *= phi
			f.st.eivc[i] *= phi
			for j := 0; j < n; j++ {
				P[i*stride+j] *= phi
				P[j*stride+i] *= phi
			}
		}
		w := 1 - phi*phi
		for i := 0; i < b.Dim; i++ {
			for j := 0; j < b.Dim; j++ {
				P[(b.at+i)*stride+b.at+j] += w * b.Cov[i*3+j]
			}
		}
	}
}

// decays returns the bias blocks' decay over dtS seconds.
func (f *Filter) decays(dtS float64) *[maxBlocks]float64 {
	for c := range f.phiOK {
		if f.phiOK[c] && f.phiDt[c] == dtS {
			return &f.phi[c]
		}
	}
	// Replace the entry not used last.
	f.cur = 1 - f.cur
	c := f.cur
	for k := 0; k < f.layout.nb; k++ {
		f.phi[c][k] = math.Exp(-dtS / f.layout.blocks[k].TauS)
	}
	f.phiDt[c], f.phiOK[c] = dtS, true
	return &f.phi[c]
}

// Transition writes into dst the Jacobian F of the motion Predict applies
// to the state from (N x N, row-major with stride MaxStates), for the
// Rauch-Tung-Striebel smoother.
func (f *Filter) Transition(dst *[MaxStates * MaxStates]float64, from *State, u Step, dtS float64) {
	var t transition
	f.motion(&t, from, u, dtS)
	*dst = [MaxStates * MaxStates]float64{}
	for i := 0; i < f.st.n; i++ {
		dst[i*stride+i] = 1
	}
	for i := 0; i < 3; i++ {
		for c := 0; c < t.nc; c++ {
			dst[i*stride+t.cols[c]] += t.e[i][c]
		}
	}
	l := &f.layout
	phis := f.decays(dtS)
	for k := 0; k < l.nb; k++ {
		b := &l.blocks[k]
		for i := b.at; i < b.at+b.Dim; i++ {
			dst[i*stride+i] = phis[k]
		}
	}
}

// Update applies measurement m unless gate refuses its NIS. It returns the
// raw NIS (with the measurement's own covariance). A gated measurement, or
// one that fails with an error, leaves the filter unchanged. With a robust
// model the update uses the noise R / w, w the model's weight of the raw
// NIS (DEVELOPERS.md, "Design: Measurement updates"). Bias and mount
// states are consider states (a landmark block's are estimated): their gain
// rows are zero, and so are those of the states m.Hold marks for this
// update. The update is in Joseph form,
//
//	P' = (I - K H) P (I - K H)^T + K R K^T,
//
// which holds for any gain, symmetrised and checked by Cholesky
// (Bar-Shalom, Li and Kirubarajan, 2001, eq. 5.2.3-18 for the Joseph form).
func (f *Filter) Update(m *Measurement, gate Gate) (Outcome, error) {
	if m.Kind == KindIMUHeading && f.layout.gyro >= 0 {
		return f.updateGyro(m, gate)
	}
	return f.update(m, gate, nil)
}

// UpdateRepeat is Update with the covariance extra (m.Kind.Dim() square,
// stride 3) added to the noise of the gain and the Joseph form, not to the
// NIS or the gate: the noise of a measurement that repeats part of earlier
// ones' error carries less information than its covariance says, while
// its own innovation is still distributed with its covariance (fusion's
// per-landmark correlated errors, whose extra also raises the white share
// of the noise to the correlated one so that the Joseph form bounds the
// error; DEVELOPERS.md, "Design: Sensors"). Not for IMU headings.
func (f *Filter) UpdateRepeat(m *Measurement, gate Gate, extra *[9]float64) (Outcome, error) {
	if m.Kind == KindIMUHeading {
		return Outcome{Dim: m.Kind.Dim()}, fmt.Errorf("estimator: UpdateRepeat of an IMU heading")
	}
	return f.update(m, gate, extra)
}

// updateGyro applies an IMU heading z on a layout with a gyro scale g
// (DEVELOPERS.md, "Design: State"). The IMU's heading zero moves by g
// times the IMU's own turn, a known input, so before an update the offset
// may take the step
//
//	offset' = offset + g u,   P' = F P F^T,   F = I + u e_offset e_g^T,
//
// noise-free, with u the IMU's turn summed over its headings before z
// since the last step (State's imuTurn), once abs(u) reaches
// GyroStepSigmas standard deviations of a difference of two readings,
// sqrt(2 R). Not the turn up to z: that carries z's own noise, which the
// innovation carries too, so every update would pull g by about
// P[g, g] R / S the same way (errors in variables: g ran from 0 to 0.18 in
// 300 s on the depot tug). Not every interval's turn either: the noise of
// the readings that the estimate has just averaged in is in each, and on
// a straight, where u is that noise alone, the update regressed it on
// itself (g to -0.026 in 145 s). Summed to the threshold, the noise is at
// most a share 1 / GyroStepSigmas^2 of a step's turn, a straight makes no
// step, and the offset lags by at most g GyroStepSigmas sqrt(2 R), a
// tenth of a reading's standard deviation for a gyro 1.5% off. After the
// update the turn gains wrap(z - imuRef) and the reference becomes z. A
// gated or failed update takes the step back too and leaves both.
func (f *Filter) updateGyro(m *Measurement, gate Gate) (Outcome, error) {
	z := Wrap(m.Z[0])
	f.unturned.CopyFrom(&f.st)
	u, own := f.st.GyroStep(&f.layout, m.R[0], z)
	if u != 0 {
		f.GyroTurn(u)
		f.st.imuTurn = 0
	}
	out, err := f.update(m, gate, nil)
	if err != nil || out.Gated {
		f.st.CopyFrom(&f.unturned)
		return out, err
	}
	if !own {
		f.st.imuTurn += f.unturned.imuDelta(z)
	}
	f.st.imuRef, f.st.imuWheel = z, 0
	return out, nil
}

// maxIMUWheel bounds the estimate's own turn since the IMU's last heading
// (State's imuWheel), radians: an IMU silent while the robot turned that
// far, 16,000 turns, is no longer unwrapped by it (a gyro 0.1% off is
// 100 rad off by then).
const maxIMUWheel = 1e5

// imuDelta returns the IMU's turn from its last heading to z (wrapped):
// their difference, unwrapped by the estimate's own turn since
// (imuWheel), so that a silence of the IMU through more than half a turn
// keeps its whole turns (the gyro scale's error over them is far below
// half a turn).
func (s *State) imuDelta(z float64) float64 {
	return Unwrap(Wrap(z-s.imuRef), s.imuWheel)
}

// GyroStep returns the turn u by which an IMU heading z (wrapped) of
// variance r applied to the state s of layout l moves the offset first (u
// times the gyro scale; Filter.Update), or 0 for none, and whether u
// holds z's own turn from the last heading: the IMU's summed turn once it
// reaches GyroStepSigmas sqrt(2 r); and with z's own turn added when that
// turn alone reaches GyroJumpSigmas sqrt(2 r), the turn over a silence of
// the IMU (or a spin faster than its readings). 0 without a gyro scale.
func (s *State) GyroStep(l *Layout, r, z float64) (u float64, own bool) {
	if l.gyro < 0 {
		return 0, false
	}
	d, sd := s.imuDelta(z), math.Sqrt(2*r)
	switch {
	case math.Abs(d) >= GyroJumpSigmas*sd:
		return s.imuTurn + d, true
	case math.Abs(s.imuTurn) >= GyroStepSigmas*sd:
		return s.imuTurn, false
	}
	return 0, false
}

// GyroStepSigmas is the IMU turn that a gyro scale's step waits for, in
// standard deviations of the difference of two of the IMU's readings,
// sqrt(2 R) (Filter.Update of an IMU heading).
const GyroStepSigmas = 5.0

// GyroJumpSigmas is the turn since the IMU's last heading, in the same
// standard deviations, past which a heading's step takes that turn too,
// before its update (Filter.Update of an IMU heading). Left for the next
// heading's step, as a shorter one is, the turn over a silence of the IMU
// was taken twice: the heading's update, seeing the offset's move by g
// times it unexplained, gave part of it to the offset and the heading,
// and the next step moved the offset by the whole of it again, whose
// update put the double count on g (the zero 6.5 standard deviations off
// after a 3 s silence in a spin, TestGyroScaleIMUSilence). Its own
// reading's noise in the step's turn pulls g by about r / d^2 at the
// equilibrium of such steps (errors in variables, the reason the step
// waits otherwise): at most 1 / (2 GyroJumpSigmas^2), 0.08% of scale, and
// only at such jumps; the turns of readings that come at a robot's rates
// stay under it (0.02 rad at 1 rad/s and 50 Hz, against 0.053 rad for a
// reading of 1.5 mrad).
const GyroJumpSigmas = 25.0

// GyroTurn moves the IMU offset by the gyro scale times the IMU's turn
// dpsi (radians), with the covariance P' = F P F^T for F = I + dpsi
// e_offset e_g^T (the Jacobian of the offset in the gyro scale is dpsi):
// the offset's row and column gain dpsi times the scale's, and its
// variance dpsi^2 P[g, g] besides. The compensation's consider column
// moves as a column of P. The errors-in-variables moments stay: they are
// over the pose and the offset, and the step adds to the offset's the
// moments with the gyro scale, which they leave out as they do every
// state beyond the offset. It panics on a layout without a gyro scale.
func (f *Filter) GyroTurn(dpsi float64) { f.st.GyroTurn(&f.layout, dpsi) }

// GyroTurn is Filter.GyroTurn on the state s of layout l (the smoother's
// prediction of a step with an IMU heading in it).
func (s *State) GyroTurn(l *Layout, dpsi float64) {
	g := l.gyro
	if g < 0 || s.n != l.n {
		panic("estimator: GyroTurn on a state without a gyro scale")
	}
	o, n, P := l.offset, s.n, &s.p
	s.x[o] = Wrap(s.x[o] + s.x[g]*dpsi)
	s.eivc[o] += dpsi * s.eivc[g]
	pgg := P[g*stride+g]
	poo := P[o*stride+o] + 2*dpsi*P[o*stride+g] + dpsi*dpsi*pgg
	for j := 0; j < n; j++ {
		if j != o {
			v := P[o*stride+j] + dpsi*P[g*stride+j]
			P[o*stride+j], P[j*stride+o] = v, v
		}
	}
	P[o*stride+o] = poo
}

// update is Update without the gyro scale's turn; extra, if not nil, is
// UpdateRepeat's.
func (f *Filter) update(m *Measurement, gate Gate, extra *[9]float64) (Outcome, error) {
	d := m.Kind.Dim()
	out := Outcome{Dim: d}
	var v [3]float64
	if err := f.innovation(m, &v); err != nil {
		return out, err
	}
	f.r = m.R
	if m.LandmarkVar > 0 && m.LandmarkError == 0 {
		f.addLandmarkVar(m, d)
	}
	r0 := f.r
	if err := f.innovationCovariance(d); err != nil {
		return out, fmt.Errorf("innovation covariance of %s: %w", m.Kind, err)
	}
	out.NIS = f.nis(&v, d, &out.Whitened)
	for i := 0; i < d; i++ {
		out.LogDetS += 2 * math.Log(f.l[i*measStride+i])
	}
	if !gate.Passes(out.NIS) {
		out.Gated = true
		return out, nil
	}
	out.Weight = m.Robust.Weight(out.NIS, d)
	if out.Weight < 1 {
		// S = H P H^T + R / w: only the noise term changes.
		for i := 0; i < d; i++ {
			for j := 0; j < d; j++ {
				f.r[i*3+j] = r0[i*3+j] / out.Weight
				f.s[i*3+j] += f.r[i*3+j] - r0[i*3+j]
			}
		}
		if !cholesky(f.s[:], f.l[:], d, measStride) {
			return out, fmt.Errorf("re-weighted innovation covariance of %s: %w", m.Kind, ErrNotPositiveDefinite)
		}
	}
	if extra != nil {
		// S = H P H^T + R / w + extra, for the gain alone.
		for i := 0; i < d; i++ {
			for j := 0; j < d; j++ {
				f.r[i*3+j] += extra[i*3+j]
				f.s[i*3+j] += extra[i*3+j]
			}
		}
		if !cholesky(f.s[:], f.l[:], d, measStride) {
			return out, fmt.Errorf("repeat-inflated innovation covariance of %s: %w", m.Kind, ErrNotPositiveDefinite)
		}
	}
	f.gain(d, m.Hold)
	return out, f.correct(m, &v)
}

// eivPull returns the expected pull of this update on the turn scale that
// the reported turns' own noise causes, sum_ab A_ab M_ab with A = H_p^T
// S^-1 H_p over the pose and IMU offset columns: E[K_s v] = E[c^T H_p^T S^-1 (H_p e + w)]
// for the scale's gain row K_s = c^T H_p^T S^-1 (bias-compensated least
// squares; T. Soderstrom, "Errors-in-variables methods in system
// identification", Automatica 43(6), 2007, from memory). 0 when the update
// leaves the turn scale where it is.
func (f *Filter) eivPull(d int) float64 {
	ts := f.layout.turnScale
	if ts < 0 || f.st.eiv == [eivSize]float64{} || (f.k[ts*3] == 0 && f.k[ts*3+1] == 0 && f.k[ts*3+2] == 0) {
		return 0
	}
	k := f.eivStates()
	// sum_ab A_ab M_ab = sum_ij (S^-1)_ij (H_p M H_p^T)_ij: d solves for
	// the columns of S^-1 instead of k for S^-1 H_p.
	m := &f.st.eiv
	var hm [3][eivDim]float64 // H_p M
	for i := 0; i < d; i++ {
		h := f.h[i*stride : i*stride+k]
		for b := 0; b < k; b++ {
			for a, ha := range h {
				hm[i][b] += ha * m[a*eivDim+b]
			}
		}
	}
	var pull float64
	for j := 0; j < d; j++ {
		var e, sj [3]float64 // column j of S^-1
		e[j] = 1
		cholSolveVec(f.l[:], d, measStride, e[:], sj[:])
		h := f.h[j*stride : j*stride+k]
		for i := 0; i < d; i++ {
			var acc float64
			for b, hb := range h {
				acc += hm[i][b] * hb
			}
			pull += sj[i] * acc
		}
	}
	return pull
}

// eivStates returns how many states the moments cover: the pose, and the
// IMU offset when the layout has it.
func (f *Filter) eivStates() int {
	if f.layout.offset == IOffset {
		return 4
	}
	return 3
}

// updateEIV moves the errors-in-variables moments through an update with
// gain f.k: both c and the error of the pose (and IMU offset) are
// multiplied by T = I - K_p H_p, the pose and offset block of I - K H, so
// M' = T M T^T.
func (f *Filter) updateEIV(d int) {
	k := f.eivStates()
	var t [eivSize]float64
	for a := 0; a < k; a++ {
		for b := 0; b < k; b++ {
			var kh float64
			for j := 0; j < d; j++ {
				kh += f.k[a*3+j] * f.h[j*stride+b]
			}
			t[a*eivDim+b] = -kh
		}
		t[a*eivDim+a]++
	}
	var tm, tt [eivSize]float64
	for a := 0; a < k; a++ {
		for b := 0; b < k; b++ {
			tt[a*eivDim+b] = t[b*eivDim+a]
		}
	}
	eivMul(&tm, &t, &f.st.eiv, k)
	eivMul(&f.st.eiv, &tm, &tt, k)
}

// eivMul writes the product a b of the leading k x k blocks of two
// moment-sized matrices into dst (which must be neither).
func eivMul(dst, a, b *[eivSize]float64, k int) {
	for i := 0; i < k; i++ {
		for j := 0; j < k; j++ {
			var acc float64
			for c := 0; c < k; c++ {
				acc += a[i*eivDim+c] * b[c*eivDim+j]
			}
			dst[i*eivDim+j] = acc
		}
	}
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

// addLandmarkVar adds to f.r the landmark's survey error, m.LandmarkVar
// in each axis, through the measurement's Jacobian in the landmark's
// position, which is minus its Jacobian in the robot's (f.h's first two
// columns, just formed): J v J^T, as white noise of this fix alone.
func (f *Filter) addLandmarkVar(m *Measurement, d int) {
	if m.Kind != KindRangeBearing && m.Kind != KindRange && m.Kind != KindBearing {
		return
	}
	for i := 0; i < d; i++ {
		for j := 0; j < d; j++ {
			hi, hj := f.h[i*stride:i*stride+2], f.h[j*stride:j*stride+2]
			f.r[i*3+j] += m.LandmarkVar * (hi[0]*hj[0] + hi[1]*hj[1])
		}
	}
}

// innovationCovariance forms P H^T in f.k (n x d, stride 3, until the gain
// replaces it) and S = H P H^T + f.r in f.s, and factorises S into f.l.
func (f *Filter) innovationCovariance(d int) error {
	n := f.st.n
	P, H := &f.st.p, &f.h
	// H is sparse (a few pose columns and the bias states): the products
	// run over its non-zero columns only.
	var nz [3][MaxStates]int
	var nnz [3]int
	for j := 0; j < d; j++ {
		for k := 0; k < n; k++ {
			if H[j*stride+k] != 0 {
				nz[j][nnz[j]] = k
				nnz[j]++
			}
		}
	}
	for i := 0; i < n; i++ {
		for j := 0; j < d; j++ {
			var acc float64
			for _, k := range nz[j][:nnz[j]] {
				acc += P[i*stride+k] * H[j*stride+k]
			}
			f.k[i*3+j] = acc
		}
	}
	for i := 0; i < d; i++ {
		for j := 0; j < d; j++ {
			var acc float64
			for _, k := range nz[i][:nnz[i]] {
				acc += H[i*stride+k] * f.k[k*3+j]
			}
			f.s[i*3+j] = acc + f.r[i*3+j]
		}
	}
	symmetrise(f.s[:], d, measStride)
	if !cholesky(f.s[:], f.l[:], d, measStride) {
		return ErrNotPositiveDefinite
	}
	return nil
}

// nis returns v^T S^-1 v from the factor of S in f.l.
func (f *Filter) nis(v *[3]float64, d int, y *[3]float64) float64 {
	cholForward(f.l[:], d, measStride, v[:], y[:])
	var q float64
	for i := 0; i < d; i++ {
		q += y[i] * y[i]
	}
	return q
}

// gain keeps P H^T in f.pht and replaces f.k by K = P H^T S^-1, solving
// S K_i^T = PHt_i^T row by row; the rows of consider states, and of the
// states hold marks, are zero (Schmidt 1966).
func (f *Filter) gain(d int, hold uint16) {
	f.pht = f.k
	for i := 0; i < f.st.n; i++ {
		if f.layout.consider(i) || hold&(1<<i) != 0 {
			f.k[i*3], f.k[i*3+1], f.k[i*3+2] = 0, 0, 0
			continue
		}
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
	f.saved.CopyFrom(&f.st)
	pull := f.eivPull(d)
	for i := 0; i < n; i++ {
		var acc float64
		for j := 0; j < d; j++ {
			acc += f.k[i*3+j] * v[j]
		}
		f.st.x[i] += acc
	}
	if ts := f.layout.turnScale; ts >= 0 && f.st.eiv != [eivSize]float64{} {
		f.st.x[ts] -= pull
		f.updateEIV(d)
	}
	f.st.wrapAngles()
	f.joseph(n, d)
	if f.layout.eivVar > 0 && (pull != 0 || f.st.eivc != [MaxStates]float64{}) {
		f.considerEIV(n, d, pull)
	}
	if !cholesky(f.st.p[:], f.chol[:], n, stride) {
		f.st.CopyFrom(&f.saved)
		return fmt.Errorf("state covariance after %s update: %w", m.Kind, ErrNotPositiveDefinite)
	}
	return nil
}

// considerEIV carries the compensation's own uncertainty through an
// update that took pull out of the turn scale (correct), after the Joseph
// form. The true pull is (1 + d) pull, d the consider parameter of
// variance s^2 (State's eivc, LayoutSpec.NoiseRatioStd), so the update
// leaves d pull in the scale's error:
//
//	e' = (I - K H) e + K w + d pull u_s,   psi' = q + pull u_s,   q = (I - K H) psi
//
// (u_s the turn scale's unit vector). The Joseph form has already moved
// the part s^2 psi psi^T of P to s^2 q q^T; the consider covariance adds
// s^2 (psi' psi'^T - q q^T), the rest of the Joseph form of the state
// augmented by d (the Schmidt-Kalman consider covariance: K's row of d is
// zero; S. F. Schmidt 1966; B. D. Tapley, B. E. Schutz and G. H. Born,
// Statistical Orbit Determination, 2004, ch. 6, from memory).
func (f *Filter) considerEIV(n, d int, pull float64) {
	c := &f.st.eivc
	// H psi, then q = psi - K (H psi).
	var hc [3]float64
	for j := 0; j < d; j++ {
		h := f.h[j*stride : j*stride+n]
		for i, v := range h {
			hc[j] += v * c[i]
		}
	}
	for i := 0; i < n; i++ {
		k := f.k[i*3 : i*3+d]
		for j, v := range k {
			c[i] -= v * hc[j]
		}
	}
	if pull == 0 {
		return
	}
	// psi' psi'^T - q q^T = pull (q u^T + u q^T) + pull^2 u u^T.
	ts := f.layout.turnScale
	P := &f.st.p
	for i := 0; i < n; i++ {
		v := f.layout.eivVar * pull * c[i]
		P[i*stride+ts] += v
		P[ts*stride+i] += v
	}
	P[ts*stride+ts] += f.layout.eivVar * pull * pull
	c[ts] += pull
}

// joseph replaces P by (I-KH) P (I-KH)^T + K R K^T (R = f.r), formed as
// rank-d corrections instead of n x n products:
//
//	A  = (I-KH) P = P - K (H P)
//	P' = A (I-KH)^T + K R K^T = A + (K R - A H^T) K^T = A + (K S - P H^T) K^T
//
// which is the same expression, regrouped, and holds for any K:
// A H^T = P H^T - K H P H^T and H P H^T + R = S, the innovation covariance
// the gain was solved with (in f.s; Cholesky wrote its factor elsewhere).
// C = K S - P H^T is the gain's residual: rounding for the Kalman rows,
// -P H^T for the zeroed rows of consider states. H P is the transpose of
// P H^T, which Update kept in f.pht (P is symmetric). P' = P - K (P H^T)^T
// + C K^T is symmetric by construction, so only its upper triangle is
// formed (2d products per entry) and mirrored.
func (f *Filter) joseph(n, d int) {
	P := &f.st.p
	K := &f.k
	var c [MaxStates * 3]float64
	for i := 0; i < n; i++ {
		for a := 0; a < d; a++ {
			acc := -f.pht[i*3+a]
			for b := 0; b < d; b++ {
				acc += K[i*3+b] * f.s[b*3+a]
			}
			c[i*3+a] = acc
		}
	}
	for i := 0; i < n; i++ {
		for j := i; j < n; j++ {
			acc := P[i*stride+j]
			for a := 0; a < d; a++ {
				acc += c[i*3+a]*K[j*3+a] - K[i*3+a]*f.pht[j*3+a]
			}
			P[i*stride+j], P[j*stride+i] = acc, acc
		}
	}
}

// InitOffset initialises the IMU offset from an absolute IMU heading z with
// variance r (DEVELOPERS.md, "Design: State"): offset = wrap(z - heading), with variance
// P_hh + r and covariance -P_h,s with every other state s, because the
// offset is z - heading and inherits heading's correlations with the
// opposite sign. It panics on a filter without the offset state.
func (f *Filter) InitOffset(z, r float64) error {
	if f.layout.offset != IOffset {
		panic("estimator: InitOffset on a filter without an IMU offset state")
	}
	if !finite(z) || !finite(r) || !(r > 0) {
		return fmt.Errorf("IMU heading %v with variance %v: %w", z, r, ErrNotFinite)
	}
	P := &f.st.p
	f.st.x[IOffset] = Wrap(z - f.st.x[IHead])
	for s := 0; s < f.st.n; s++ {
		if s == IOffset {
			continue
		}
		P[IOffset*stride+s] = -P[IHead*stride+s]
		P[s*stride+IOffset] = -P[IHead*stride+s]
	}
	P[IOffset*stride+IOffset] = P[IHead*stride+IHead] + r
	f.st.eivc[IOffset] = -f.st.eivc[IHead]
	if f.layout.gyro >= 0 {
		f.st.imuRef, f.st.imuTurn, f.st.imuWheel = Wrap(z), 0, 0
	}
	// So do the moments: the offset's covariance with the turn scale is
	// minus the heading's, and its error minus the heading's (the
	// reading's own error is independent of both).
	m := &f.st.eiv
	for a := 0; a < eivDim; a++ {
		m[a*eivDim+IOffset] = -m[a*eivDim+IHead]
	}
	for b := 0; b < eivDim; b++ {
		m[IOffset*eivDim+b] = -m[IHead*eivDim+b]
	}
	return nil
}

// Reset sets the pose part of the estimate to pose with 3x3 covariance c
// (row-major), clearing its correlation with every other state (the IMU
// offset, the calibration, the biases), whose own covariance is kept. The
// caller re-initialises the offset on the next IMU sample, unless it keeps
// it (a move recovery): so the errors-in-variables moments keep the
// offset's own, E[c_off e_off], neither of which a reset changes, and
// lose every one with a pose index (the pose's c is zero now, and its new
// error is the reset's, independent of the reported turns).
func (f *Filter) Reset(pose Pose, c *[9]float64) error {
	if !finite(pose.X) || !finite(pose.Y) || !finite(pose.Heading) {
		return fmt.Errorf("pose: %w", ErrNotFinite)
	}
	if err := CheckCovariance(c[:], 3); err != nil {
		return fmt.Errorf("pose covariance: %w", err)
	}
	f.st.x[IX], f.st.x[IY], f.st.x[IHead] = pose.X, pose.Y, Wrap(pose.Heading)
	off := f.st.eiv[IOffset*eivDim+IOffset] // zero without an offset
	f.st.eiv = [eivSize]float64{}
	f.st.eiv[IOffset*eivDim+IOffset] = off
	f.st.eivc[IX], f.st.eivc[IY], f.st.eivc[IHead] = 0, 0, 0
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			f.st.p[i*stride+j] = c[i*3+j]
		}
		for j := 3; j < f.st.n; j++ {
			f.st.p[i*stride+j], f.st.p[j*stride+i] = 0, 0
		}
	}
	return nil
}

// CorrelateBias gives the pose, just Reset from a fix whose error
// includes the bias states bias[c] (0: none) of its components, the
// correlations that fix carries: the reset pose's error is -j times the
// fix's (j the 3x3 Jacobian of the pose in the fix, row-major), and the
// fix's error is its bias's plus white noise, so Cov(pose, s) = -sum_c
// j[a][c] P[bias[c], s] for every state s beyond the pose, the biases' own
// and those correlated with them. A reset that drops them treats later
// fixes of the sensor as news about the pose, though they repeat its bias.
// The covariance stays as it was, uncorrelated, if the result would not be
// positive definite (ErrNotPositiveDefinite).
func (f *Filter) CorrelateBias(bias [3]int, j *[9]float64) error {
	n := f.st.n
	for c := 0; c < 3; c++ {
		if b := bias[c]; b != 0 && (b < 3 || b >= n) {
			return fmt.Errorf("bias state %d of %d: %w", b, n, ErrShape)
		}
	}
	P := &f.st.p
	f.saved.CopyFrom(&f.st)
	for s := 3; s < n; s++ {
		for a := 0; a < 3; a++ {
			var acc float64
			for c := 0; c < 3; c++ {
				if b := bias[c]; b > 0 {
					acc -= j[a*3+c] * f.saved.p[b*stride+s]
				}
			}
			P[a*stride+s], P[s*stride+a] = acc, acc
		}
	}
	// So does the consider column: the pose's error is -j times the
	// bias's.
	for a := 0; a < 3; a++ {
		var acc float64
		for c := 0; c < 3; c++ {
			if b := bias[c]; b > 0 {
				acc -= j[a*3+c] * f.saved.eivc[b]
			}
		}
		f.st.eivc[a] = acc
	}
	if !cholesky(P[:], f.chol[:], n, stride) {
		f.st.CopyFrom(&f.saved)
		return fmt.Errorf("pose correlated with its fix's bias: %w", ErrNotPositiveDefinite)
	}
	return nil
}

// SeedBlock gives the two states from at (a landmark block) to another
// landmark: their mean 0 and their covariance c (2x2 row-major), and no
// correlation with any other state. It forgets the landmark before
// exactly as a Gaussian marginal does, dropping its rows and columns, and
// adds the new one independent of everything the estimate holds: its
// survey error is (DEVELOPERS.md, "Design: Landmark survey error"). It
// panics with ErrShape unless the block lies past the pose within Size().
func (s *State) SeedBlock(at int, c *[4]float64) {
	n := s.n
	if at < 3 || at+2 > n {
		panic(fmt.Errorf("%w: landmark block at %d of a %d-state estimate", ErrShape, at, n))
	}
	for i := at; i < at+2; i++ {
		s.x[i] = 0
		s.eivc[i] = 0
		for j := 0; j < n; j++ {
			s.p[i*stride+j], s.p[j*stride+i] = 0, 0
		}
	}
	s.p[at*stride+at], s.p[at*stride+at+1] = c[0], c[1]
	s.p[(at+1)*stride+at], s.p[(at+1)*stride+at+1] = c[2], c[3]
}

// SeedBlock is State.SeedBlock on the filter's estimate; it returns an
// error, and changes nothing, unless c is a valid covariance.
func (f *Filter) SeedBlock(at int, c *[4]float64) error {
	if err := CheckCovariance(c[:], 2); err != nil {
		return fmt.Errorf("landmark block: %w", err)
	}
	f.st.SeedBlock(at, c)
	return nil
}

// Position95 returns the radius in metres of the 95% position ellipse's major
// semi-axis: sqrt(chi2_2(0.95) * largest eigenvalue of the position block).
func (s *State) Position95() float64 {
	a, b, c := s.p[0], s.p[1], s.p[stride+1]
	lmax := (a+c)/2 + math.Sqrt(((a-c)/2)*((a-c)/2)+b*b)
	return math.Sqrt(chiSquare2Dof95 * lmax)
}

// chiSquare2Dof95 is the chi-square 0.95 quantile with 2 degrees of
// freedom, -2 ln(0.05) (closed form for 2 dof), worked out once: at every
// input (trust) its logarithm was about 6 of the 1,050 cache lines a
// sample touched at robot rates (BenchmarkRatesPathCold, session 25).
var chiSquare2Dof95 = -2 * math.Log(0.05)
