package estimator

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/mat"
)

// TestQuarterCircle drives a robot with two parallel wheels and one lateral
// wheel a quarter circle of radius R to the left. Closed-form geometry of the
// circle (common practice): the inner wheel rolls (R - w)*pi/2, the outer
// (R + w)*pi/2, a lateral wheel at x = c rolls c*pi/2, and the reference point
// ends at (R, R) facing +y.
func TestQuarterCircle(t *testing.T) {
	const (
		r = 2.0   // radius of the reference point's path, m
		w = 0.15  // half the track of the parallel wheels, m
		c = -0.10 // lateral wheel's body x, m
	)
	turn := math.Pi / 2
	coefs := [][3]float64{WheelCoef(0, w, 0), WheelCoef(0, -w, 0), WheelCoef(c, 0, math.Pi/2)}
	travels := []float64{(r - w) * turn, (r + w) * turn, c * turn}
	for _, pieces := range []int{1, 7, 1000} {
		p := Pose{}
		for k := 0; k < pieces; k++ {
			rows := make([]Row, 3)
			for i := range rows {
				rows[i] = Row{Coef: coefs[i], Value: travels[i] / float64(pieces)}
			}
			var sol StepSolution
			if err := SolveStep(rows, 1e-12, &sol); err != nil {
				t.Fatal(err)
			}
			p = Advance(p, sol.Step)
		}
		want := Pose{r, r, math.Pi / 2}
		if d := poseDist(p, want); d > 1e-12 {
			t.Errorf("%d pieces: end pose %+v, want %+v (distance %g)", pieces, p, want, d)
		}
	}
}

// TestAdvanceMatchesIntegration compares Advance with a fine fourth-order
// Runge-Kutta integration of the planar kinematics of constant body
// velocities, dx/dt = v cos th - u sin th, dy/dt = v sin th + u cos th,
// dth/dt = w (common practice; RK4 as in any numerical analysis text).
func TestAdvanceMatchesIntegration(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 1))
	for trial := 0; trial < 50; trial++ {
		p0 := Pose{rng.NormFloat64(), rng.NormFloat64(), Wrap(rng.Float64() * 7)}
		s := Step{rng.NormFloat64(), 0.3 * rng.NormFloat64(), 2 * rng.NormFloat64()}
		if trial == 0 {
			s.TurnRad = 0
		}
		got := Advance(p0, s)
		want := integrate(p0, s, 20000)
		if d := poseDist(got, want); d > 1e-10 {
			t.Errorf("step %+v from %+v: Advance %+v, RK4 %+v (distance %g)", s, p0, got, want, d)
		}
	}
}

func integrate(p Pose, s Step, steps int) Pose {
	deriv := func(th float64) (float64, float64, float64) {
		sn, cs := math.Sincos(th)
		return s.ForwardM*cs - s.LeftM*sn, s.ForwardM*sn + s.LeftM*cs, s.TurnRad
	}
	h := 1 / float64(steps)
	x, y, th := p.X, p.Y, p.Heading
	for i := 0; i < steps; i++ {
		x1, y1, t1 := deriv(th)
		x2, y2, t2 := deriv(th + h/2*t1)
		x3, y3, t3 := deriv(th + h/2*t2)
		x4, y4, t4 := deriv(th + h*t3)
		x += h / 6 * (x1 + 2*x2 + 2*x3 + x4)
		y += h / 6 * (y1 + 2*y2 + 2*y3 + y4)
		th += h / 6 * (t1 + 2*t2 + 2*t3 + t4)
	}
	return Pose{x, y, Wrap(th)}
}

// TestComposition: a constant twist split into fractions composes to the
// same pose (DEVELOPERS.md, "Design: Motion prediction"; exact for constant-twist motion) to 1e-12.
func TestComposition(t *testing.T) {
	rng := rand.New(rand.NewPCG(2, 2))
	for trial := 0; trial < 200; trial++ {
		p0 := Pose{rng.NormFloat64(), rng.NormFloat64(), Wrap(rng.Float64() * 7)}
		s := Step{rng.NormFloat64(), 0.2 * rng.NormFloat64(), 1.5 * rng.NormFloat64()}
		if trial%10 == 0 {
			s.TurnRad = 1e-9 * rng.NormFloat64()
		}
		whole := Advance(p0, s)
		f := rng.Float64()
		split := Advance(Advance(p0, s.Scale(f)), s.Scale(1-f))
		if d := poseDist(whole, split); d > 1e-12 {
			t.Errorf("twist %+v split at %.3f: %+v vs %+v (distance %g)", s, f, split, whole, d)
		}
	}
}

// TestArcJacobians checks the analytic Jacobians against central finite
// differences from gonum's diff/fd, including rotation at and around the
// series threshold.
func TestArcJacobians(t *testing.T) {
	turns := []float64{0, 1e-9, -3e-5, 2*seriesBelow - 1e-9, 2*seriesBelow + 1e-9, 0.01, -0.7, 2.5, math.Pi}
	rng := rand.New(rand.NewPCG(3, 3))
	for _, turn := range turns {
		p := Pose{rng.NormFloat64(), rng.NormFloat64(), Wrap(rng.Float64() * 7)}
		s := Step{0.3 + rng.Float64(), 0.1 * rng.NormFloat64(), turn}
		var fx, fu [9]float64
		ArcJacobians(p, s, &fx, &fu)
		numX := mat.NewDense(3, 3, nil)
		fd.Jacobian(numX, func(dst, v []float64) {
			q := Advance(Pose{v[0], v[1], v[2]}, s)
			dst[0], dst[1], dst[2] = q.X, q.Y, unwrapNear(q.Heading, p.Heading+s.TurnRad)
		}, []float64{p.X, p.Y, p.Heading}, &fd.JacobianSettings{Formula: fd.Central})
		numU := mat.NewDense(3, 3, nil)
		fd.Jacobian(numU, func(dst, v []float64) {
			q := Advance(p, Step{v[0], v[1], v[2]})
			dst[0], dst[1], dst[2] = q.X, q.Y, unwrapNear(q.Heading, p.Heading+s.TurnRad)
		}, []float64{s.ForwardM, s.LeftM, s.TurnRad}, &fd.JacobianSettings{Formula: fd.Central})
		// Central differences with gonum's default step have errors near 1e-9.
		compareMat(t, "d pose'/d pose", turn, fx[:], numX, 1e-7)
		compareMat(t, "d pose'/d step", turn, fu[:], numU, 1e-7)
	}
}

// TestArcFactorsSeries: the series and the closed form of sin(h)/h and its
// derivative agree where they meet (the truncated Taylor series errs by
// less than h^4/120; common practice).
func TestArcFactorsSeries(t *testing.T) {
	h := seriesBelow
	s1, d1 := arcFactors(2 * h * (1 - 1e-9))
	s2, d2 := arcFactors(2 * h * (1 + 1e-9))
	if math.Abs(s1-s2) > 1e-15 || math.Abs(d1-d2) > 1e-11 {
		t.Errorf("discontinuity at the series threshold: s %v vs %v, ds %v vs %v", s1, s2, d1, d2)
	}
}

func unwrapNear(a, ref float64) float64 { return ref + Wrap(a-ref) }

func poseDist(a, b Pose) float64 {
	return math.Hypot(a.X-b.X, a.Y-b.Y) + math.Abs(Wrap(a.Heading-b.Heading))
}

func compareMat(t *testing.T, what string, tag float64, got []float64, want *mat.Dense, tol float64) {
	t.Helper()
	r, c := want.Dims()
	for i := 0; i < r; i++ {
		for j := 0; j < c; j++ {
			g, w := got[i*c+j], want.At(i, j)
			if math.Abs(g-w) > tol*math.Max(1, math.Abs(w)) {
				t.Errorf("%s (case %g) [%d,%d]: analytic %.12g, finite difference %.12g", what, tag, i, j, g, w)
			}
		}
	}
}
