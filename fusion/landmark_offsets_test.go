package fusion_test

import (
	"math"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// TestLandmarkOffsets: on two minutes among 16 aisle markers each 3 cm
// off its map, the offsets the landmark blocks learnt, joined over each
// marker's visits (CombineOffsets), are consistent with the simulator's
// true offsets (the mean of their normalised squared errors, 2 degrees of
// freedom each, within the two-sided 95% chi-square band of 2N degrees
// over N markers, quantiles from gonum stat/distuv: chiBand) and closer to
// them than the map is (their RMS error below the survey error's RMS).
func TestLandmarkOffsets(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, MarkerCount: 16, Seed: 12, DurationS: 120,
		Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}}
	s := fusiontest.New(sc)
	cfg := s.TrueModelConfig()
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	r.CollectLandmarkOffsets()
	for in, ok := s.Next(); ok; in, ok = s.Next() {
		fusiontest.Feed(r, &in)
	}
	visits := r.FinishLandmarkOffsets()
	offs := fusion.CombineOffsets(visits)
	var nees, errSq, mapSq float64
	n := 0
	for _, o := range offs {
		dx, dy, ok := s.MarkerOffset(o.ID)
		if !ok {
			t.Fatalf("an offset of %s, which the camera never saw", o.ID)
		}
		ex, ey := o.DXM-dx, o.DYM-dy
		q, ok := o.Mahalanobis(dx, dy)
		if !ok {
			t.Fatalf("%s: covariance %v not positive definite", o.ID, o.Cov)
		}
		nees += q
		errSq += ex*ex + ey*ey
		mapSq += dx*dx + dy*dy
		n++
		t.Logf("%s: estimated (%+.3f, %+.3f) m, sd (%.3f, %.3f); true (%+.3f, %+.3f)", o.ID, o.DXM, o.DYM, math.Sqrt(o.Cov[0]), math.Sqrt(o.Cov[3]), dx, dy)
	}
	if n < 8 {
		t.Fatalf("offsets of %d markers from %d visits", n, len(visits))
	}
	lo, hi := chiBand(2*n, n)
	mean := nees / float64(n)
	rmsErr, rmsMap := math.Sqrt(errSq/float64(n)), math.Sqrt(mapSq/float64(n))
	t.Logf("%d markers, %d visits: mean normalised squared error %.2f, band [%.2f, %.2f]; RMS error %.4f m against the map's %.4f m", n, len(visits), mean, lo, hi, rmsErr, rmsMap)
	if mean < lo || mean > hi {
		t.Errorf("offsets inconsistent with the truth: mean %.2f outside [%.2f, %.2f]", mean, lo, hi)
	}
	if rmsErr >= rmsMap {
		t.Errorf("the learnt offsets (RMS error %.4f m) are no closer to the truth than the map (%.4f m)", rmsErr, rmsMap)
	}
}
