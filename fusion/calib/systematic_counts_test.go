package calib

import (
	"math"
	"slices"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// ivTotals sums what intervals made of odo: each wheel's travel, the time
// covered, the IMU turn (NaN where the run has no rotation IMU), and the
// number of intervals.
// The configuration is the robot's, with its defaults (the speed limit).
func ivTotals(t *testing.T, c fusion.Config, odo []fusion.Odometry) (travel []float64, covered int64, turn float64, n int) {
	r, err := fusion.New(c)
	if err != nil {
		t.Fatal(err)
	}
	cfg := r.Config()
	m := &sysModel{cfg: &cfg, nw: len(cfg.Wheels), rotation: cfg.IMU == fusion.IMURotation}
	if err := m.intervals(Samples(odo)); err != nil {
		t.Fatal(err)
	}
	travel = make([]float64, m.nw)
	for _, iv := range m.ivs {
		for i := range travel {
			travel[i] += m.travel[int(iv.off)+i]
		}
		covered += iv.t1 - iv.t0
		turn += iv.imu
	}
	return travel, covered, turn, len(m.ivs)
}

// TestCountsJumpsAsTheRobot: the fit judges a count jump by the next
// sample, as the robot does (fusion's TestCountsGlitchCostsNothing and
// TestCountsRestartTakesNextSample). One bad reading costs no travel and
// no time; counts that start afresh (a restarted encoder controller) cost
// the jump's period only, left out as a gap.
func TestCountsJumpsAsTheRobot(t *testing.T) {
	for _, layout := range []fusiontest.Layout{fusiontest.FreeWheelTurn, fusiontest.DriveWheelTurn} {
		r := simulateSys(fusiontest.Scenario{Layout: layout, Counts: true, IMU: true, Seed: 5, DurationS: 20})
		odo := r.odo
		k := len(odo) / 2
		for odo[k].Counts == nil {
			k++
		}
		wantTr, wantCov, wantTurn, wantN := ivTotals(t, r.cfg, odo)
		if wantN < 100 {
			t.Fatalf("%v: %d intervals", layout, wantN)
		}

		glitch := slices.Clone(odo)
		glitch[k].Counts = slices.Clone(odo[k].Counts)
		glitch[k].Counts[0] += 20000 // 0.5 m in 5 ms
		tr, cov, turn, n := ivTotals(t, r.cfg, glitch)
		if n != wantN-1 || cov != wantCov {
			t.Errorf("%v glitch: %d intervals covering %d ns, want %d covering %d", layout, n, cov, wantN-1, wantCov)
		}
		for i := range tr {
			if math.Abs(tr[i]-wantTr[i]) > 1e-9 {
				t.Errorf("%v glitch: wheel %d travels %.9f m, want %.9f", layout, i, tr[i], wantTr[i])
			}
		}
		if math.Abs(turn-wantTurn) > 1e-9 && !math.IsNaN(wantTurn) {
			t.Errorf("%v glitch: IMU turns %.9f rad, want %.9f", layout, turn, wantTurn)
		}

		restart := slices.Clone(odo)
		for j := k; j < len(restart); j++ {
			if restart[j].Counts != nil {
				restart[j].Counts = slices.Clone(restart[j].Counts)
				for i := range restart[j].Counts {
					restart[j].Counts[i] += 30000 - odo[k].Counts[i]
				}
			}
		}
		prev := k - 1
		for odo[prev].Counts == nil {
			prev--
		}
		period := odo[k].StampNs - odo[prev].StampNs
		_, lostCov, _, _ := ivTotals(t, r.cfg, odo[prev:k+1])
		tr, cov, _, n = ivTotals(t, r.cfg, restart)
		if n != wantN-1 || cov != wantCov-period || lostCov != period {
			t.Errorf("%v restart: %d intervals covering %d ns, want %d covering %d", layout, n, cov, wantN-1, wantCov-period)
		}
		// The jump's period is the one lost: its travel is what the
		// restarted run lacks.
		lostTr, _, _, _ := ivTotals(t, r.cfg, odo[prev:k+1])
		for i := range tr {
			if math.Abs(tr[i]+lostTr[i]-wantTr[i]) > 1e-9 {
				t.Errorf("%v restart: wheel %d travels %.9f m, want %.9f", layout, i, tr[i], wantTr[i]-lostTr[i])
			}
		}
	}
}
