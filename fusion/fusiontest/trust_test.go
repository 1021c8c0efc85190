package fusiontest

import (
	"math"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// TestTrustMonitor: a constructed run, observed every 10 ms for 2 s, with
// covariance diag(0.01 m^2, 0.01 m^2, 0.001 rad^2). An error of 0.5 m in x
// gives NEES 25, above the 3-dof 99.9% quantile 16.27 (NIST/SEMATECH
// e-Handbook 1.3.6.7.4, from memory); 0.39 m gives 15.2, below it.
// Trusted and outside from 0.5 to 0.8 s and from 1.7 to 1.75 s: 0.35 s in
// two episodes, one over 0.2 s. Outside but distrusted from 1.0 to 1.5 s,
// and trusted just inside from 0.85 to 0.95 s: no violation.
func TestTrustMonitor(t *testing.T) {
	m := NewTrustMonitor()
	for k := int64(0); k <= 200; k++ {
		p := fusion.FusedPose{StampNs: k * 10e6, Cov: [9]float64{0.01, 0, 0, 0, 0.01, 0, 0, 0, 0.001}}
		var e float64
		switch {
		case k >= 50 && k < 80, k >= 170 && k < 175:
			e = 0.5
		case k >= 85 && k < 95:
			e = 0.39
		case k >= 100 && k < 150:
			e = 0.5
			p.Distrust = fusion.TrustFixesRefused
		}
		if err := m.Observe(p, estimator.Pose{X: e}); err != nil {
			t.Fatal(err)
		}
	}
	r := m.Report()
	t.Log(&r)
	near := func(a, b float64) bool { return math.Abs(a-b) < 1e-9 }
	if !near(r.SimulatedS, 2) || !near(r.TrustedS, 1.5) || !near(r.ViolationS, 0.35) {
		t.Errorf("simulated %.3f s, trusted %.3f s, violations %.3f s; want 2, 1.5, 0.35", r.SimulatedS, r.TrustedS, r.ViolationS)
	}
	if len(r.Episodes) != 2 || !near(r.LongestS(), 0.3) || r.Over(0.2) != 1 || r.Episodes[1] != (TrustEpisode{1700e6, 1750e6}) {
		t.Errorf("episodes %+v, want 0.5-0.8 s and 1.7-1.75 s", r.Episodes)
	}
	var sum TrustReport
	sum.Add(r)
	sum.Add(r)
	if !near(sum.ViolationS, 0.7) || sum.Over(0.2) != 2 {
		t.Errorf("two reports add to %v", &sum)
	}
	if err := m.Observe(fusion.FusedPose{StampNs: 0, Cov: [9]float64{0.01, 0, 0, 0, 0.01, 0, 0, 0, 0.001}}, estimator.Pose{}); err == nil {
		t.Error("a stamp running backwards was taken")
	}
}

// TestTrustViolationsRun: the harness runs a scenario end to end; without
// noise the estimate never leaves its region, and it covers the run.
func TestTrustViolationsRun(t *testing.T) {
	r, err := TrustViolations(Scenario{Layout: DriveWheelTurn, NoiseFree: true, DurationS: 30}, (*Sim).Config)
	if err != nil {
		t.Fatal(err)
	}
	t.Log(&r)
	if math.Abs(r.SimulatedS-30) > 0.01 || r.ViolationS != 0 || r.TrustedS < 25 {
		t.Errorf("noise-free run: %v", &r)
	}
}
