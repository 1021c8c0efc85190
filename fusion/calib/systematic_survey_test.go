package calib

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/mat"

	"reckon.example/fusion"
)

// TestSurveyErrorWeights: the systematic fit takes a landmark's survey
// error into a range-bearing fix's covariance as diag(v, v / r^2) (an
// isotropic error v I of the landmark's position, projected on the line of
// sight and across it over the range r; closed form), with the landmark's
// own position_std_m before the configuration's landmark_position_std_m:
// the fix's whitening W makes W C W^T the identity for that C. A range-only
// fix takes v; a bearing-only one keeps its covariance.
func TestSurveyErrorWeights(t *testing.T) {
	cfg := fusion.Config{
		Sensors:              []fusion.Sensor{{ID: "cam", Kind: fusion.FixLandmark, Cov: []float64{4e-4, 0, 0, 1e-4}}},
		Landmarks:            []fusion.Landmark{{ID: "a", XM: 3, YM: 1}, {ID: "b", XM: -2, YM: 4, PositionStdM: 0.05}},
		LandmarkPositionStdM: 0.03,
	}
	rng, brg := 2.0, 0.1
	fixes := []fusion.Fix{
		{SensorID: "cam", StampNs: 1, LandmarkID: "a", RangeM: &rng, BearingRad: &brg},
		{SensorID: "cam", StampNs: 2, LandmarkID: "b", RangeM: &rng, BearingRad: &brg},
		{SensorID: "cam", StampNs: 3, LandmarkID: "a", RangeM: &rng, Cov: []float64{4e-4}},
		{SensorID: "cam", StampNs: 4, LandmarkID: "a", BearingRad: &brg, Cov: []float64{1e-4}},
	}
	want := [][]float64{
		{4e-4 + 9e-4, 0, 0, 1e-4 + 9e-4/4},
		{4e-4 + 25e-4, 0, 0, 1e-4 + 25e-4/4},
		{4e-4 + 9e-4},
		{1e-4},
	}
	m := &sysModel{cfg: &cfg, ivs: []sysInterval{{t0: 0, t1: 10}}}
	m.prepareFixes(fixes)
	if len(m.fixes) != len(want) {
		t.Fatalf("%d fixes prepared, want %d", len(m.fixes), len(want))
	}
	for i, f := range m.fixes {
		n := f.dim
		w := mat.NewDense(n, n, nil)
		for a := range n {
			for b := range n {
				w.Set(a, b, f.winv[a*n+b])
			}
		}
		var wc, wcw mat.Dense
		wc.Mul(w, mat.NewDense(n, n, want[i]))
		wcw.Mul(&wc, w.T())
		if !mat.EqualApprox(&wcw, eye(n), 1e-9) {
			t.Errorf("fix %d: W C W^T = %v, want the identity", i, mat.Formatted(&wcw))
		}
	}
	if !(math.Abs(cfg.LandmarkSurveyVar(&cfg.Landmarks[1])-25e-4) < 1e-15) {
		t.Error("the landmark's own survey error is not its variance")
	}
}

func eye(n int) *mat.Dense {
	d := mat.NewDense(n, n, nil)
	for i := range n {
		d.Set(i, i, 1)
	}
	return d
}
