package fusion_test

import (
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// TestHeldSplitMatchesInsert: an IMU heading stamped between two odometry
// samples gives the robot the same estimate, bit for bit, and the same
// verdict and NIS, whether it arrives before the second (held, then
// released into the interval as it is appended: appendSplit) or just
// after it (inserted into the interval and replayed: the general path).
// The order of arrival must not change the estimate (common practice for
// an estimator that orders its inputs by stamp).
func TestHeldSplitMatchesInsert(t *testing.T) {
	for _, gate := range []bool{false, true} {
		sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 11, DurationS: 20}
		sm := fusiontest.New(sc)
		cfg := sm.Config()
		cfg.GateIMU = gate
		held, late := mustRobot(t, cfg), mustRobot(t, cfg)
		var pending []fusiontest.Input // headings waiting for the odometry past them (late)
		splits, headings := 0, 0
		stampOf := map[uint64]int64{} // the held robot's headings, by sequence
		nis := map[int64]float64{}    // their NIS, by stamp
		for {
			in, ok := sm.Next()
			if !ok {
				break
			}
			if in.Heading != nil {
				headings++
				res := fusiontest.Feed(held, &in)
				if res.Verdict == fusion.VerdictHeld {
					stampOf[res.Seq] = in.StampNs()
					pending = append(pending, in)
					continue
				}
				if got := fusiontest.Feed(late, &in); got.Verdict != res.Verdict || got.NIS != res.NIS {
					t.Fatalf("heading %d: %v NIS %v arriving late, %v NIS %v in order", in.StampNs(), got.Verdict, got.NIS, res.Verdict, res.NIS)
				}
				continue
			}
			res := fusiontest.Feed(held, &in)
			lres := fusiontest.Feed(late, &in)
			if res.Verdict != lres.Verdict {
				t.Fatalf("input at %d: verdict %v held, %v late", in.StampNs(), res.Verdict, lres.Verdict)
			}
			for _, rs := range res.Resolved {
				nis[stampOf[rs.Seq]] = rs.NIS
			}
			var still []fusiontest.Input
			for _, h := range pending {
				if in.Odometry == nil || h.StampNs() > in.Odometry.StampNs {
					still = append(still, h)
					continue
				}
				splits++
				got := fusiontest.Feed(late, &h)
				if want, ok := nis[h.StampNs()]; !ok || got.NIS != want {
					t.Fatalf("heading at %d: NIS %v arriving late, %v released (%v)", h.StampNs(), got.NIS, want, ok)
				}
			}
			pending = still
			if a, b := held.Estimate(), late.Estimate(); a != b {
				t.Fatalf("after the input at %d the estimates differ:\nheld %+v\nlate %+v", in.StampNs(), a, b)
			}
		}
		if splits < headings/4 {
			t.Fatalf("gate %v: only %d of %d headings were held", gate, splits, headings)
		}
	}
}

func mustRobot(t *testing.T, cfg fusion.Config) *fusion.Robot {
	t.Helper()
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	return r
}
