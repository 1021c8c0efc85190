package estimator

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// gyroLayouts are layouts with a gyro scale: with the IMU offset alone (5
// states), and after the odometry calibration and before a bias block (10).
func gyroLayouts() []Layout {
	return []Layout{
		MustLayout(LayoutSpec{IMUOffset: true, GyroScale: true}),
		MustLayout(LayoutSpec{IMUOffset: true, OdometryScale: true, RateBias: true, GyroScale: true, Biases: []BiasSpec{
			{Dim: 3, TauS: 1.5, Cov: [9]float64{4e-4, 1e-5, 0, 1e-5, 4e-4, 0, 0, 0, 1e-4}},
		}}),
	}
}

// gyroFilter returns a filter of layout l with a random mean (scales near
// 1, gyro scale near 0), a random well-conditioned covariance and a random
// IMU heading and turn (the turn well above the step's threshold).
func gyroFilter(t *testing.T, rng *rand.Rand, l Layout) *Filter {
	n := l.Size()
	x := make([]float64, n)
	for i := range x {
		x[i] = 0.3 * rng.NormFloat64()
	}
	if l.ForwardScale() >= 0 {
		x[l.ForwardScale()] += 1
		x[l.TurnScale()] += 1
	}
	x[l.GyroScale()] = 0.02 * rng.NormFloat64()
	f, err := NewFilter(&l, x, randomCov(rng, n, 0.05, 0.001))
	if err != nil {
		t.Fatal(err)
	}
	f.st.imuRef = Wrap(3 * rng.NormFloat64())
	f.st.imuTurn = (0.3 + rng.Float64()) * float64(1-2*rng.IntN(2))
	f.st.imuWheel = 0.01 * rng.NormFloat64()
	return f
}

// TestGyroTurnUnwrapped: the IMU's turn to a heading after a silence in
// which the robot turned more than half a turn keeps its whole turns: the
// predictions' heading changes since the last IMU heading (imuWheel) sum
// to the turn, 5 rad in 100 steps, and unwrap the difference of the two
// wrapped headings (5 - 2 pi taken alone), which the heading's step then
// takes whole; an IMU heading, and an offset initialisation, start the
// sum again. Before, the step took 5 - 2 pi.
func TestGyroTurnUnwrapped(t *testing.T) {
	rng := rand.New(rand.NewPCG(46, 46))
	for _, l := range gyroLayouts() {
		f := gyroFilter(t, rng, l)
		f.st.imuTurn, f.st.imuWheel = 0, 0
		if ts := l.TurnScale(); ts >= 0 {
			f.st.x[ts] = 1 // the random one may be 0.6
		}
		if rb := l.RateBias(); rb >= 0 {
			f.st.x[rb] = 0
		}
		turn := 5.0 * float64(1-2*rng.IntN(2))
		cu := [9]float64{1e-6, 0, 0, 0, 1e-6, 0, 0, 0, 1e-6}
		var q [MaxStates]float64
		for range 100 {
			f.Predict(Step{ForwardM: 0.001, TurnRad: turn / 100}, &cu, 0.01, &q)
		}
		// The estimate's own turn is the steps' sum (a turn scale of 1,
		// no rate bias); the IMU's, (1 + g) times the true one.
		if w := f.st.imuWheel; math.Abs(w-turn) > 1e-9 {
			t.Fatalf("%d states: the estimate's turn since the IMU heading %v, want about %v", l.Size(), w, turn)
		}
		z := Wrap(f.st.imuRef + turn*1.01)
		m := Measurement{Kind: KindIMUHeading, Z: [3]float64{z}, R: [9]float64{2.5e-5}}
		u, own := f.st.GyroStep(&l, m.R[0], z)
		if !own || math.Abs(u-turn*1.01) > 1e-9 {
			t.Errorf("%d states: step of %v (own turn %v), want the whole %v", l.Size(), u, own, turn*1.01)
		}
		if _, err := f.Update(&m, NoGate()); err != nil {
			t.Fatal(err)
		}
		if f.st.imuWheel != 0 || f.st.imuRef != z || f.st.imuTurn != 0 {
			t.Errorf("%d states: after the heading, wheel turn %v, reference %v, turn %v; want 0, %v, 0", l.Size(), f.st.imuWheel, f.st.imuRef, f.st.imuTurn, z)
		}
		f.st.imuWheel = 1
		if err := f.InitOffset(0.2, 1e-4); err != nil {
			t.Fatal(err)
		}
		if f.st.imuWheel != 0 {
			t.Errorf("%d states: the offset initialised, wheel turn %v, want 0", l.Size(), f.st.imuWheel)
		}
	}
}

// TestGyroScaleLayout: the gyro scale follows the odometry calibration,
// comes before the bias blocks, and needs the IMU offset.
func TestGyroScaleLayout(t *testing.T) {
	ls := gyroLayouts()
	if g := ls[0].GyroScale(); g != 4 || ls[0].Size() != 5 {
		t.Errorf("offset and gyro scale: gyro at %d of %d, want 4 of 5", g, ls[0].Size())
	}
	if at, _ := ls[1].Bias(0); ls[1].GyroScale() != 7 || at != 8 {
		t.Errorf("full layout: gyro at %d, bias block at %d, want 7 and 8", ls[1].GyroScale(), at)
	}
	if l := MustLayout(LayoutSpec{IMUOffset: true}); l.GyroScale() != -1 {
		t.Errorf("layout without it: gyro at %d, want -1", l.GyroScale())
	}
	if _, err := NewLayout(LayoutSpec{GyroScale: true}); !errors.Is(err, ErrShape) {
		t.Errorf("gyro scale without an IMU offset: %v, want ErrShape", err)
	}
}

// TestGyroTurnMatchesFiniteDifferences: the gyro turn's Jacobian, which
// GyroTurn propagates the covariance with (F = I + dpsi e_offset e_g^T),
// equals the central differences of its mean (gonum diff/fd), and the
// covariance equals F P F^T formed with gonum mat (the EKF's prediction,
// Bar-Shalom, Li and Kirubarajan 2001, sec. 5.2, with no process noise).
func TestGyroTurnMatchesFiniteDifferences(t *testing.T) {
	rng := rand.New(rand.NewPCG(41, 41))
	for _, l := range gyroLayouts() {
		n := l.Size()
		for trial := 0; trial < 5; trial++ {
			f := gyroFilter(t, rng, l)
			st := f.State()
			dpsi := Wrap(2 * rng.NormFloat64())
			mean := func(dst, x []float64) {
				s := NewState(n, st.angles, x, flatP(&st))
				s.GyroTurn(&l, dpsi)
				copy(dst, s.x[:n])
			}
			num := meanJacobian(&st, append([]float64(nil), st.x[:n]...), mean)
			F := eye(n)
			F.Set(l.Offset(), l.GyroScale(), dpsi)
			what := fmt.Sprintf("%d states, dpsi %.3f", n, dpsi)
			closeMats(t, what+": Jacobian", num, F, 1e-7)

			var want mat.Dense
			want.Product(F, stateDense(&st), F.T())
			f.GyroTurn(dpsi)
			got := f.State()
			closeMats(t, what+": covariance", stateDense(&got), &want, 1e-14)
			o, g := l.Offset(), l.GyroScale()
			if w := Wrap(st.x[o] + st.x[g]*dpsi); got.x[o] != w {
				t.Errorf("%s: offset %v, want %v", what, got.x[o], w)
			}
		}
	}
}

// TestGyroUpdateMatchesGonum: an IMU heading on a layout with a gyro scale
// is the textbook extended Kalman filter (Bar-Shalom, Li and Kirubarajan
// 2001, sec. 5.2) of the prediction x' = x + u g e_offset,
// P' = F P F^T, u the IMU's turn summed up to its last heading, followed
// by the update with H = [0 0 1 1 0 ...], in Joseph form (eq. 5.2.3-18),
// formed with gonum mat; the turn then restarts from wrap(z - last
// heading) and the last heading becomes z. A heading that turned past
// GyroJumpSigmas since the last one has u include that turn, and the turn
// restarts from 0. Below the step's threshold (GyroStepSigmas) the turn
// only adds up. A gated heading changes nothing, heading and turn
// included.
func TestGyroUpdateMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(43, 43))
	for _, l := range gyroLayouts() {
		n := l.Size()
		for trial := 0; trial < 5; trial++ {
			f := gyroFilter(t, rng, l)
			st := f.State()
			o, g := l.Offset(), l.GyroScale()
			// Trials 0 and 1: a heading that turned past GyroJumpSigmas
			// since the last one (a silence of the IMU), whose own turn
			// the step takes too; 2 and 3: a heading at the robot's rates
			// (0.1 of the jump), the step the summed turn alone.
			sd := math.Sqrt(2 * 2.5e-5)
			d := (1 + rng.Float64()) * GyroJumpSigmas * sd * float64(1-2*(trial%2))
			if trial >= 2 {
				d *= 0.1
			}
			z := Wrap(st.imuRef + d)
			m := Measurement{Kind: KindIMUHeading, Z: [3]float64{z}, R: [9]float64{2.5e-5}}
			dpsi, own := st.imuTurn, trial < 2
			if own {
				dpsi += Wrap(z - st.imuRef)
			}
			if trial == 4 {
				// Below the threshold: no step, the turn adds up.
				dpsi = 0
				f.st.imuTurn = 0.5 * GyroStepSigmas * sd
				st = f.State()
			}
			what := fmt.Sprintf("%d states, turn %.3f", n, dpsi)

			F := eye(n)
			F.Set(o, g, dpsi)
			x := mat.NewVecDense(n, append([]float64(nil), st.x[:n]...))
			x.SetVec(o, x.AtVec(o)+dpsi*x.AtVec(g))
			var P mat.Dense
			P.Product(F, stateDense(&st), F.T())
			H := mat.NewDense(1, n, nil)
			H.Set(0, IHead, 1)
			H.Set(0, o, 1)
			v := Wrap(z - x.AtVec(IHead) - x.AtVec(o))
			var pht, S mat.Dense
			pht.Mul(&P, H.T())
			S.Mul(H, &pht)
			s := S.At(0, 0) + m.R[0]
			K := mat.NewDense(n, 1, nil)
			for i := 0; i < n; i++ {
				if !l.consider(i) {
					K.Set(i, 0, pht.At(i, 0)/s)
				}
			}
			var kh, ikh, want, krk mat.Dense
			kh.Mul(K, H)
			ikh.Sub(eye(n), &kh)
			want.Product(&ikh, &P, ikh.T())
			krk.Mul(K, K.T())
			krk.Scale(m.R[0], &krk)
			want.Add(&want, &krk)
			var wantX mat.VecDense
			wantX.AddScaledVec(x, v, K.ColView(0))

			out, err := f.Update(&m, NoGate())
			if err != nil {
				t.Fatal(err)
			}
			got := f.State()
			if step, stepOwn := st.GyroStep(&l, m.R[0], z); math.Abs(out.NIS-v*v/s) > 1e-9*out.NIS+1e-12 || step != dpsi || stepOwn != own {
				t.Errorf("%s: NIS %v, step %v (own turn %v); want %v, %v (%v)", what, out.NIS, step, stepOwn, v*v/s, dpsi, own)
			}
			for i := 0; i < n; i++ {
				d := got.x[i] - wantX.AtVec(i)
				if st.isAngle(i) {
					d = Wrap(d)
				}
				if math.Abs(d) > 1e-12 {
					t.Errorf("%s: mean %d %v, want %v", what, i, got.x[i], wantX.AtVec(i))
				}
			}
			closeMats(t, what+": covariance", stateDense(&got), &want, 1e-12)
			wantTurn := Wrap(z - st.imuRef)
			switch {
			case own:
				wantTurn = 0
			case dpsi == 0:
				wantTurn += st.imuTurn
			}
			if got.imuRef != z || got.imuTurn != wantTurn {
				t.Errorf("%s: heading %v and turn %v after the update, want %v and %v", what, got.imuRef, got.imuTurn, z, wantTurn)
			}

			// Gated: nothing moves, the reference stays.
			before := f.State()
			m.Z[0] = Wrap(z + 1)
			if out, err := f.Update(&m, GateAbove(1e-9)); err != nil || !out.Gated {
				t.Fatalf("%s: gated update: %+v %v", what, out, err)
			}
			if after := f.State(); after != before {
				t.Errorf("%s: a gated IMU heading changed the state", what)
			}
		}
	}
}

// TestGyroNoAllocations: an IMU heading with a gyro scale allocates
// nothing (slog's habit: a zero-allocation test on the hot path).
func TestGyroNoAllocations(t *testing.T) {
	rng := rand.New(rand.NewPCG(44, 44))
	f := gyroFilter(t, rng, gyroLayouts()[1])
	m := Measurement{Kind: KindIMUHeading, Z: [3]float64{0.3}, R: [9]float64{2.5e-5}}
	allocs := testing.AllocsPerRun(100, func() {
		m.Z[0] = Wrap(m.Z[0] + 0.01)
		_, _ = f.Update(&m, NoGate())
	})
	if allocs != 0 {
		t.Errorf("an IMU heading with a gyro scale allocates %v times per update", allocs)
	}
}

// TestGyroPackRoundTrip: the packed estimate of a layout with a gyro scale
// carries the IMU reference heading (Pack, Unpack, SetPacked).
func TestGyroPackRoundTrip(t *testing.T) {
	rng := rand.New(rand.NewPCG(45, 45))
	for _, l := range gyroLayouts() {
		f := gyroFilter(t, rng, l)
		buf := make([]float64, f.PackedSize())
		f.Pack(buf)
		var s State
		s.SetPacked(l.Size(), l.Angles(), buf)
		if st := f.State(); s != st {
			t.Errorf("%d states: SetPacked of the packed estimate differs (reference %v, want %v)", l.Size(), s.imuRef, st.imuRef)
		}
		h := gyroFilter(t, rng, l)
		h.Unpack(buf)
		if a, b := h.State(), f.State(); a != b {
			t.Errorf("%d states: Unpack of the packed estimate differs", l.Size())
		}
	}
}
