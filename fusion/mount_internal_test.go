package fusion

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/mat"

	"reckon.example/estimator"
)

// TestFoldMountBlock: recovery's foldBias takes a landmark sensor's mount
// block out of the measurement and adds its share of the error to R, H_m
// P_mm H_m^T, with H_m the derivative of the range and bearing in the
// mount's three numbers, here by central finite differences of the
// measurement model with the mount moved (gonum diff/fd), independent of
// the model's own Jacobian.
func TestFoldMountBlock(t *testing.T) {
	cfg := Config{
		Wheels:    []Wheel{{YM: 0.12}, {YM: -0.12}, {XM: -0.08, DirectionRad: math.Pi / 2}},
		Landmarks: []Landmark{{ID: "m1", XM: 3, YM: 1}},
		Sensors: []Sensor{{ID: "cam", Kind: FixLandmark, Mount: estimator.Pose{X: 0.15, Y: 0.02, Heading: 0.1},
			Cov: []float64{4e-4, 0, 0, 1e-4}, MountStd: [3]float64{0.01, 0.02, 0.03}}},
	}
	r, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	r.f.Reset(estimator.Pose{X: 0.4, Y: -0.3, Heading: 0.7}, &[9]float64{0.01, 0, 0, 0, 0.01, 0, 0, 0, 0.004})
	rng, brg := 2.6, 0.2
	m := estimator.Measurement{Kind: estimator.KindRangeBearing, LandmarkX: 3, LandmarkY: 1, Z: [3]float64{rng, brg}}
	if err := r.cfg.Sensors[0].sensorFix(&Fix{Kind: FixLandmark, SensorID: "cam", LandmarkID: "m1", RangeM: &rng, BearingRad: &brg}, r.sensorBias[0], r.sensorMount[0], &m); err != nil {
		t.Fatal(err)
	}
	if m.MountError == 0 {
		t.Fatal("the sensor's fix names no mount error states")
	}
	before := m
	st := r.f.State()
	r.foldBias(&m, &st)
	if m.MountError != 0 {
		t.Fatalf("MountError %d left after folding", m.MountError)
	}
	x := make([]float64, r.n)
	for i := range x {
		x[i] = st.MeanAt(i)
	}
	h := mat.NewDense(2, 3, nil)
	fd.Jacobian(h, func(dst, dm []float64) {
		mm := before
		mm.MountError = 0
		mm.Mount.X += dm[0]
		mm.Mount.Y += dm[1]
		mm.Mount.Heading += dm[2]
		z, _, err := mm.Predicted(x)
		if err != nil {
			t.Fatal(err)
		}
		copy(dst, z)
	}, []float64{0, 0, 0}, &fd.JacobianSettings{Formula: fd.Central})
	pmm := mat.NewDiagDense(3, []float64{1e-4, 4e-4, 9e-4})
	var hp, add mat.Dense
	hp.Mul(h, pmm)
	add.Mul(&hp, h.T())
	for i := range 2 {
		for j := range 2 {
			want := before.R[i*3+j] + add.At(i, j)
			if math.Abs(m.R[i*3+j]-want) > 1e-9*math.Max(1, math.Abs(want)) {
				t.Errorf("R[%d][%d] = %g, want %g", i, j, m.R[i*3+j], want)
			}
		}
	}
}
