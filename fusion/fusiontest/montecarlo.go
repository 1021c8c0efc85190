package fusiontest

import (
	"errors"
	"fmt"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// NEESResult is the pose NEES of Monte Carlo runs of one scenario at evenly
// spaced checkpoints, with the NEES test's two-sided 95% band for the
// average over the runs: [chi2_{3N}(0.025)/N, chi2_{3N}(0.975)/N] for N runs
// (Bar-Shalom, Li and Kirubarajan, Estimation with Applications to Tracking
// and Navigation, 2001, sec. 5.4.2).
type NEESResult struct {
	Runs int
	// Avg is the average NEES over the runs at each checkpoint k (stamp
	// k*every); 0 where a checkpoint was not evaluated.
	Avg []float64
	// Lo and Hi bound the band of the average.
	Lo, Hi float64
	// Counted is how many checkpoints were evaluated in every run; Inside
	// the fraction of them whose average lies in the band; Mean the mean of
	// their averages.
	Counted int
	Inside  float64
	Mean    float64
	// Recoveries counts the move recoveries over all runs. A checkpoint
	// that a recovery put before the history window in some run is left
	// out.
	Recoveries int
	// Fixes and Gated count the fixes decided over all runs and those the
	// gate refused.
	Fixes, Gated int
}

// GatedFraction is the fraction of fixes the gate refused.
func (n *NEESResult) GatedFraction() float64 {
	if n.Fixes == 0 {
		return 0
	}
	return float64(n.Gated) / float64(n.Fixes)
}

// Consistent reports whether the runs pass the NEES test: at least
// minInside of the checkpoints inside the band (below 0.95 to allow for the
// correlation between checkpoints of one run) and the mean inside it too.
func (n *NEESResult) Consistent(minInside float64) bool {
	return n.Inside >= minInside && n.Mean >= n.Lo && n.Mean <= n.Hi
}

// String summarises the result for a test log.
func (n *NEESResult) String() string {
	return fmt.Sprintf("mean NEES %.2f over %d runs, %.0f%% of %d checkpoints inside the 95%% band [%.2f, %.2f]; %.1f%% of fixes gated, %d recoveries",
		n.Mean, n.Runs, 100*n.Inside, n.Counted, n.Lo, n.Hi, 100*n.GatedFraction(), n.Recoveries)
}

// MonteCarloNEES runs sc with seeds sc.Seed to sc.Seed+runs-1, each robot
// configured by config (for instance (*Sim).WhiteConfig), and returns the
// pose NEES at every checkpoint everyNs apart. A checkpoint's NEES is taken
// with PoseAt once every input up to 0.3 s after it (its late fixes) has
// arrived; the first and the last checkpoints are left out.
func MonteCarloNEES(sc Scenario, runs int, everyNs int64, config func(*Sim) fusion.Config) (NEESResult, error) {
	sc.defaults()
	checkpoints := int(sc.DurationS*1e9/float64(everyNs)) + 1
	sum := make([]float64, checkpoints)
	n := make([]int, checkpoints)
	seed := sc.Seed
	dist := distuv.ChiSquared{K: float64(3 * runs)}
	res := NEESResult{Runs: runs, Avg: sum, Lo: dist.Quantile(0.025) / float64(runs), Hi: dist.Quantile(0.975) / float64(runs)}
	for run := 0; run < runs; run++ {
		sc.Seed = seed + uint64(run)
		if err := neesRun(sc, everyNs, config, sum, n, &res); err != nil {
			return NEESResult{}, fmt.Errorf("seed %d: %w", sc.Seed, err)
		}
	}
	inside := 0
	for k := 1; k < checkpoints-1; k++ {
		if n[k] < runs {
			sum[k] = 0
			continue
		}
		sum[k] /= float64(runs)
		res.Counted++
		res.Mean += sum[k]
		if sum[k] >= res.Lo && sum[k] <= res.Hi {
			inside++
		}
	}
	if res.Counted < checkpoints/2 {
		return res, fmt.Errorf("only %d of %d checkpoints evaluated", res.Counted, checkpoints)
	}
	res.Mean /= float64(res.Counted)
	res.Inside = float64(inside) / float64(res.Counted)
	return res, nil
}

// neesRun adds one run's NEES at each checkpoint to sum, counts the
// checkpoints evaluated in n, and adds its recoveries and fix verdicts to
// res.
func neesRun(sc Scenario, everyNs int64, config func(*Sim) fusion.Config, sum []float64, n []int, res *NEESResult) error {
	s := New(sc)
	r, err := fusion.New(config(s))
	if err != nil {
		return err
	}
	heldFixes := map[uint64]bool{}
	verdict := func(v fusion.Verdict) {
		res.Fixes++
		if v == fusion.VerdictGated {
			res.Gated++
		}
	}
	truth := map[int64]estimator.Pose{}
	next := 1 // no odometry ends at 0 in travel mode
	for {
		in, ok := s.Next()
		if !ok {
			res.Recoveries += int(r.Stats().Recoveries)
			return nil
		}
		out := Feed(r, &in)
		switch {
		case in.Fix != nil && out.Verdict == fusion.VerdictHeld:
			heldFixes[out.Seq] = true
		case in.Fix != nil:
			verdict(out.Verdict)
		}
		for _, rs := range out.Resolved {
			if heldFixes[rs.Seq] {
				delete(heldFixes, rs.Seq)
				verdict(rs.Verdict)
			}
		}
		if in.Odometry != nil && in.Odometry.StampNs%everyNs == 0 {
			truth[in.Odometry.StampNs] = in.Truth
		}
		for next < len(sum) {
			ts := int64(next) * everyNs
			tr, have := truth[ts]
			if !have || r.NewestNs() < ts+300e6 {
				break
			}
			delete(truth, ts)
			next++
			p, err := r.PoseAt(ts)
			if errors.Is(err, fusion.ErrTooOld) {
				continue // a recovery re-initialised the pose after ts
			} else if err != nil {
				return fmt.Errorf("PoseAt(%d): %w", ts, err)
			}
			q, err := estimator.PoseNEES(p.Pose, &p.Cov, tr)
			if err != nil {
				return fmt.Errorf("covariance at %d: %w", ts, err)
			}
			sum[ts/everyNs] += q
			n[ts/everyNs]++
		}
	}
}
