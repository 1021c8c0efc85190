package calib

import (
	"math"
	"math/rand/v2"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// TestExpectedChord checks the fit's prediction of where the robot is
// under a heading random walk (sysModel.hv) against the closed form and a
// Monte Carlo of the walk. A robot commanded straight at v whose heading
// wanders by a random walk of q rad^2/s from a known heading at the anchor
// is expected at x(t) = v (2/q) (1 - exp(-q t/2)) along it: E[cos d] =
// exp(-s^2/2) for d normal with variance s^2 (the characteristic function
// of the normal distribution; common practice), integrated over the path
// with s^2 = q t. The Monte Carlo draws the walk itself, independently of
// the fit's code. Dead reckoning
// without the walk puts it at v t, 2.5% further after 10 s at q = 0.01.
func TestExpectedChord(t *testing.T) {
	const (
		q    = 0.01 // rad^2/s
		v    = 0.5  // m/s
		dtNs = 10_000_000
		n    = 1000 // 10 s of 100 Hz steps
	)
	cfg := fusiontest.Scenario{Layout: fusiontest.Commanded}.Config()
	cfg.Noise.StepTurnVarRad2PerS = q
	cfg.Noise.StepTurnVarRad2PerRad = 1e-12
	cfg.Noise.HeadingVarRad2PerS = 0
	if d := cfg.HeadingDriftVarPerS(); d != 0 {
		t.Fatalf("heading drift %g, want 0 for this check", d)
	}
	var odo []fusion.Odometry
	for k := range int64(n) {
		odo = append(odo, fusion.Odometry{StartNs: k * dtNs, StampNs: (k + 1) * dtNs, Step: &estimator.Step{ForwardM: v * dtNs * 1e-9}})
	}
	var fixes []fusion.Fix
	for k := range int64(20) {
		ts := (k + 1) * 500_000_000
		fixes = append(fixes, fusion.Fix{StampNs: ts, SensorID: cfg.Sensors[0].ID, Kind: fusion.FixPose, XM: v * float64(ts) * 1e-9, Cov: []float64{1e-4, 0, 0, 0, 1e-4, 0, 0, 0, 1e-4}})
	}
	m, err := newSysModel(&cfg, Samples(odo), fixes, SystematicOptions{SegmentS: 100})
	if err != nil {
		t.Fatal(err)
	}
	if len(m.segStart) != 1 {
		t.Fatalf("%d segments, want 1", len(m.segStart))
	}
	g := make([]float64, len(m.params))
	for j, p := range m.params {
		g[j] = p.Configured
	}
	m.deadReckon(g)
	m.anchorPoses()
	anchor := float64(m.segStart[0]) * 1e-9

	// Monte Carlo of the walk from the anchor (the model's own noise:
	// q dt per step), 4000 paths.
	rng := rand.New(rand.NewPCG(1, 2))
	const paths = 4000
	sum := make([][2]float64, len(fixes))
	for range paths {
		var x, y, h float64
		fi := 0
		for k := range n {
			t0 := float64(k) * dtNs * 1e-9
			if t0 < anchor-1e-9 {
				continue
			}
			// The arc model's step at the walked heading, the walk's
			// increment after it (the filter's order: predict, then noise).
			s := estimator.Advance(estimator.Pose{Heading: h}, estimator.Step{ForwardM: v * dtNs * 1e-9})
			x, y = x+s.X, y+s.Y
			h += rng.NormFloat64() * math.Sqrt(q*dtNs*1e-9)
			for fi < len(fixes) && float64(fixes[fi].StampNs)*1e-9 <= t0+dtNs*1e-9+1e-9 {
				if float64(fixes[fi].StampNs)*1e-9 > anchor+1e-9 {
					sum[fi][0] += x
					sum[fi][1] += y
				}
				fi++
			}
		}
	}
	for i := range fixes {
		ti := float64(fixes[i].StampNs)*1e-9 - anchor
		if ti <= 0 {
			continue
		}
		rel := m.relative(i, g)
		closed := v * 2 / q * (1 - math.Exp(-q*ti/2))
		mc := sum[i][0] / paths
		// The Monte Carlo, 4000 paths, agrees with the closed form to
		// 0.3 mm here; the arc model's 5 mm steps differ from the
		// continuous path by less than 2e-4 of its length.
		if math.Abs(rel.X-closed) > 2e-4*ti+1e-4 || math.Abs(rel.X-mc) > 3e-3 || math.Abs(rel.Y) > 1e-9 {
			t.Errorf("fix at %.1f s after the anchor: predicted (%.5f, %.5f), closed form %.5f, Monte Carlo %.5f (%d paths), dead reckoning %.5f",
				ti, rel.X, rel.Y, closed, mc, paths, v*ti)
		}
	}
	last := float64(fixes[len(fixes)-1].StampNs)*1e-9 - anchor
	if rel := m.relative(len(fixes)-1, g); v*last-rel.X < 0.02 {
		t.Errorf("after %.1f s the prediction is %.4f m, only %.4f m short of dead reckoning's; the walk's expected shortfall is %.4f m",
			last, rel.X, v*last-rel.X, v*last-v*2/q*(1-math.Exp(-q*last/2)))
	}
}
