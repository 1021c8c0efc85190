package fusion_test

import (
	"math"
	"math/rand/v2"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// trustCount is what a run did with the inconsistent flag.
type trustCount struct {
	raised           int   // times raised
	applied, flagged int   // applied camera fixes, and those it stood on
	firstNs          int64 // stamp of the first raise, -1 if none
}

// trustRun feeds a simulated run to a robot, with every camera fix's stated
// covariance multiplied by fixScale and the configured IMU heading variance
// by imuScale, and counts what the inconsistent flag did.
func trustRun(t *testing.T, sc fusiontest.Scenario, gate, fixScale, imuScale float64) trustCount {
	t.Helper()
	s := fusiontest.New(sc)
	cfg := s.Config()
	cfg.GateProbability = gate
	cfg.Noise.IMUHeadingVarRad2 *= imuScale
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	c := trustCount{firstNs: -1}
	for {
		in, ok := s.Next()
		if !ok {
			break
		}
		if in.Fix != nil {
			f := *in.Fix
			f.Cov = append([]float64(nil), f.Cov...)
			for i := range f.Cov {
				f.Cov[i] *= fixScale
			}
			in.Fix = &f
		}
		was := r.Pose().Distrust&fusion.TrustInconsistent != 0
		res := fusiontest.Feed(r, &in)
		// A raise is the inconsistent reason appearing, whatever the other
		// reasons do.
		if !was && r.Pose().Distrust&fusion.TrustInconsistent != 0 {
			for _, e := range res.Events {
				if e.Kind == fusion.EventTrustLost && c.raised == 0 {
					c.firstNs = e.StampNs
				}
			}
			c.raised++
		}
		if in.Fix != nil && res.Verdict == fusion.VerdictApplied {
			c.applied++
			if r.Pose().Distrust&fusion.TrustInconsistent != 0 {
				c.flagged++
			}
		}
	}
	return c
}

// TestTrustInconsistent: the inconsistent flag is raised when fixes or IMU
// headings disagree with the covariance, stands while they do, and stays
// down while they do not.
//
// Honest sensors: each test of the fix window (20 fixes) exceeds its 0.999
// chi-square quantile (gonum stat/distuv) with probability at most 0.001
// (less, since applied fixes passed the gate), so ten minutes at 10 Hz give
// at most about 6 exceedances in expectation; the IMU window tests at a
// tenth of that probability, ten times as often, so about 6 more. A raise
// needs an exceedance, and exceedances come in runs (consecutive windows
// share all but one value) that raise the flag once; the test allows 6
// raises. A camera or an IMU
// that claims half its real standard deviation (NIS four times its
// dimension) raises the flag once, and it stands on at least 90% of the
// fixes after it: no flapping, because it clears only when the window's sum
// is back to its median. A cart turned by hand raises it within 20 ms,
// before the pose is recovered.
func TestTrustInconsistent(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 21, DurationS: 600}
	c := trustRun(t, sc, 0.99, 1, 1)
	t.Logf("honest sensors: raised %d times, on %d of %d applied fixes", c.raised, c.flagged, c.applied)
	if c.applied < 5000 || c.raised > 6 || c.flagged > c.applied/50 {
		t.Errorf("honest sensors: inconsistent raised %d times, standing on %d of %d applied fixes", c.raised, c.flagged, c.applied)
	}
	sc.DurationS = 120
	for _, k := range []struct {
		name               string
		fixScale, imuScale float64
	}{{"overconfident camera", 0.25, 1}, {"overconfident IMU", 1, 0.25}} {
		// Nothing gated, so that the fix window sees the full NIS.
		c := trustRun(t, sc, 1-1e-12, k.fixScale, k.imuScale)
		t.Logf("%s: raised %d times, on %d of %d applied fixes", k.name, c.raised, c.flagged, c.applied)
		if c.raised != 1 || c.flagged < c.applied*9/10 {
			t.Errorf("%s: inconsistent raised %d times, standing on %d of %d applied fixes", k.name, c.raised, c.flagged, c.applied)
		}
	}
	bump := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 1, DurationS: 50, OutlierFraction: 0.05,
		Bump: &fusiontest.Bump{AtS: 45, DXM: 0.8, DYM: 0.6, DRad: 0.35}}
	c = trustRun(t, bump, 0.99, 1, 1)
	if at := float64(c.firstNs) * 1e-9; c.raised != 1 || at < 45 || at > 45.02 {
		t.Errorf("turned by hand at 45 s: inconsistent raised %d times, first at %.3f s", c.raised, at)
	}
}

// TestOutlierInFrameKeepsTrust: a camera sees three mapped posts in each
// frame (10 Hz), and in every fifth frame its last sighting is a gross
// outlier, 2 m long in range. The other two posts of the frame are
// applied, so the estimate agrees with what the camera saw then: the
// outlier is refused but the estimate stays trusted (before, each such
// frame lost trust until the next one). When the cart is pushed 0.5 m, all
// three sightings of a frame disagree, and trust is lost at once.
func TestOutlierInFrameKeepsTrust(t *testing.T) {
	posts := []fusion.Landmark{{ID: "a", XM: 4, YM: 1.5}, {ID: "b", XM: 4, YM: -1.5}, {ID: "c", XM: 6, YM: 0.5}}
	const rangeStd, bearingStd = 0.02, 0.01
	cfg := fusion.Config{Landmarks: posts, Sensors: []fusion.Sensor{{ID: "camera", Kind: fusion.FixLandmark,
		Cov: []float64{rangeStd * rangeStd, 0, 0, bearingStd * bearingStd}}}}
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(9, 10))
	var truth estimator.Pose
	step := estimator.Step{ForwardM: 0.002, TurnRad: 0.0002} // 0.2 m/s at 100 Hz
	var lostBefore, outliers int
	lostAfterPush, firstFrameAfterPush := int64(-1), int64(-1)
	for k := int64(0); k < 600; k++ {
		t0, t1 := k*10e6, (k+1)*10e6
		truth = estimator.Advance(truth, step)
		pushed := k >= 400
		if k == 400 {
			truth = estimator.Pose{X: truth.X + 0.5, Y: truth.Y - 0.3, Heading: truth.Heading}
		}
		r.AddOdometry(fusion.Odometry{StartNs: t0, StampNs: t1, Step: &step})
		if k%10 != 9 {
			continue
		}
		frame := k / 10
		if pushed && firstFrameAfterPush < 0 {
			firstFrameAfterPush = t1
		}
		for i, l := range posts {
			dx, dy := l.XM-truth.X, l.YM-truth.Y
			rg := math.Hypot(dx, dy) + rng.NormFloat64()*rangeStd
			b := estimator.Wrap(math.Atan2(dy, dx) - truth.Heading + rng.NormFloat64()*bearingStd)
			if !pushed && frame%5 == 2 && i == len(posts)-1 {
				rg += 2
				outliers++
			}
			res := r.AddFix(fusion.Fix{StampNs: t1, SensorID: "camera", Kind: fusion.FixLandmark, LandmarkID: l.ID, RangeM: &rg, BearingRad: &b})
			for _, e := range res.Events {
				if e.Kind != fusion.EventTrustLost {
					continue
				}
				if !pushed {
					lostBefore++
					t.Logf("trust lost before the push at %.2f s: %s", float64(e.StampNs)*1e-9, e.Detail)
				} else if lostAfterPush < 0 {
					lostAfterPush = t1
				}
			}
		}
	}
	if outliers == 0 || lostBefore != 0 {
		t.Errorf("trust lost %d times over %d frames with an outlier beside two applied posts, want 0", lostBefore, outliers)
	}
	if lostAfterPush != firstFrameAfterPush {
		t.Errorf("after the push, trust lost at %d ns, want the first frame's stamp, %d ns", lostAfterPush, firstFrameAfterPush)
	}
}
