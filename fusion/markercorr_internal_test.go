package fusion

import (
	"errors"
	"math"
	"testing"

	"gonum.org/v1/gonum/mat"

	"reckon.example/estimator"
)

// standingCamera returns a robot standing at the origin, facing +x, with a
// landmark camera at its reference point whose range error has the
// correlated fraction f over tau seconds, each landmark's own, and one
// landmark 4 m ahead: a range fix measures x alone (H = [-1 0 0]).
func standingCamera(t *testing.T, f, tau, rangeStd float64) *Robot {
	t.Helper()
	cfg := Config{
		Wheels:     []Wheel{{Name: "l", YM: 0.2}, {Name: "r", YM: -0.2}},
		NoSideSlip: true,
		StartCov:   []float64{100, 0, 0, 0, 100, 0, 0, 0, 0.01},
		Landmarks:  []Landmark{{ID: "m", XM: 4}},
		Sensors: []Sensor{{ID: "cam", Kind: FixLandmark, Cov: []float64{rangeStd * rangeStd, 0, 0, 1e-4},
			CorrelationTimeS: tau, CorrelatedFraction: f, CorrelatedPerLandmark: true}},
	}
	r, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	return r
}

// TestRepeatFactorInformation: n range fixes of one landmark dt apart, by
// a robot standing still, carry the information that generalised least
// squares draws from n observations of a constant in noise of covariance
// s^2 ((1 - f) I + f rho^|i-j|), rho = exp(-dt / tau): 1^T Sigma^-1 1,
// computed here by gonum's Cholesky inverse. The filter's first fix counts
// in full and each next at (1 - rho) / (1 + rho) of its correlated share
// (markercorr.go), which for an AR(1) error (f near 1) is that sum
// exactly (from memory: the AR(1) precision matrix is tridiagonal, its
// entries summing to (n (1 - rho) + 2 rho) / ((1 + rho) s^2)). Without the
// inflation (every fix at its full covariance as white noise) the
// information is n / s^2: 11 times too much here.
func TestRepeatFactorInformation(t *testing.T) {
	const f, tau, s, n, dtNs = 0.999, 1.5, 0.05, 40, int64(200e6)
	r := standingCamera(t, f, tau, s)
	for k := 0; k <= n; k++ {
		stamp := int64(k+1) * dtNs
		if res := r.AddOdometry(Odometry{StartNs: stamp - dtNs, StampNs: stamp, TravelM: []float64{0, 0}}); res.Err != nil {
			t.Fatal(res.Err)
		}
		if k == 0 {
			continue
		}
		rng := 4.0
		if res := r.AddFix(Fix{StampNs: stamp, SensorID: "cam", Kind: FixLandmark, LandmarkID: "m", RangeM: &rng}); res.Verdict != VerdictApplied {
			t.Fatalf("fix %d: %v %v", k, res.Verdict, res.Err)
		}
	}
	p := r.Pose()
	got := 1/p.Cov[0] - 1.0/100
	rho := math.Exp(-float64(dtNs) * 1e-9 / tau)
	sigma := mat.NewSymDense(n, nil)
	for i := 0; i < n; i++ {
		for j := i; j < n; j++ {
			v := f * math.Pow(rho, float64(j-i))
			if i == j {
				v += 1 - f
			}
			sigma.SetSym(i, j, s*s*v)
		}
	}
	var ch mat.Cholesky
	if !ch.Factorize(sigma) {
		t.Fatal("noise covariance not positive definite")
	}
	var inv mat.SymDense
	if err := ch.InverseTo(&inv); err != nil {
		t.Fatal(err)
	}
	var want float64
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			want += inv.At(i, j)
		}
	}
	closed := (float64(n)*(1-rho) + 2*rho) / ((1 + rho) * s * s)
	t.Logf("information in x: filter %.1f, GLS %.1f, AR(1) closed form %.1f, as white %.1f", got, want, closed, float64(n)/(s*s))
	if math.Abs(got/want-1) > 0.01 {
		t.Errorf("the filter drew %.1f m^-2 of information from %d fixes; generalised least squares draws %.1f", got, n, want)
	}
}

// TestMarkTableSnapshot: the fixes folded out of the window (markTable)
// and a recovery candidate's per-landmark sensor survive a snapshot, and
// a snapshot that names a sensor without per-landmark errors is refused.
func TestMarkTableSnapshot(t *testing.T) {
	r := standingCamera(t, 0.5, 1.5, 0.05)
	r.marks.note(0, 1, 12345)
	c := candidate{stamp: 5, fixStamp: 5, meas: estimator.Measurement{Kind: estimator.KindRange, LandmarkX: 4, Z: [3]float64{4}, R: [9]float64{0.0025}}}
	c.setCorr(&r.cfg, 0)
	r.cands = append(r.cands, c)
	b, err := r.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	got, err := RestoreSnapshot(r.Config(), b)
	if err != nil {
		t.Fatal(err)
	}
	if got.marks != r.marks || len(got.cands) != 1 || got.cands[0].corrSensor != 1 || got.cands[0].corr != c.corr {
		t.Errorf("restored %+v and %+v, want %+v and %+v", got.marks, got.cands, r.marks, c)
	}
	r.marks[0].sensor = 3
	b, err = r.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	if _, err := RestoreSnapshot(r.Config(), b); !errors.Is(err, ErrSnapshot) {
		t.Errorf("a landmark fix of sensor 3 of 1 restored: %v", err)
	}
}
