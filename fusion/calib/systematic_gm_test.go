package calib

import (
	"fmt"
	"math"
	"slices"
	"testing"

	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// correlatedRun is a two-minute run of the drive-wheel cart driving
// figure eights among 16 aisle markers, its camera giving range and
// bearing 3.3 times a second with errors 95% Gauss-Markov of time constant
// 2 s (consecutive sightings 0.3 s apart correlate 0.95 exp(-0.15) = 0.82),
// and the configuration that declares that model (TrueModelConfig:
// correlated_fraction 0.95, correlation_time_s 2) with the camera's mount
// configured 3 cm forward and 0.035 rad to the left of the truth. It also
// returns the true mount.
func correlatedRun(seed uint64) (sysRun, fusion.Config, [3]float64) {
	sc := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: seed, DurationS: 120, MarkerCount: 16, FigureEight: true,
		CameraHz: 10 / 3.0, SensorCovariance: true, Errors: fusiontest.Errors{CameraTauS: 2, CameraCorrelated: 0.95}}
	r := simulateSysWith(sc, (*fusiontest.Sim).TrueModelConfig)
	cfg := r.cfg
	m := cfg.Sensors[0].Mount
	cfg.Sensors = slices.Clone(cfg.Sensors)
	cfg.Sensors[0].Mount.X += 0.03
	cfg.Sensors[0].Mount.Heading += 0.035
	return r, cfg, [3]float64{m.X, m.Y, m.Heading}
}

// mountCheck is what TestSystematicGaussMarkovMount finds for one mount
// parameter over the seeds.
type mountCheck struct {
	name             string
	rmsZ, spread, cv float64
	beyond2          int
}

// gaussMarkovMounts fits correlatedRun over the seeds, with the camera's
// Gauss-Markov model as configured or (white) with it taken out, and sums
// up the mount's errors against its standard errors.
func gaussMarkovMounts(t *testing.T, seeds int, white bool) []mountCheck {
	errs := make([][]float64, 3)
	ses := make([][]float64, 3)
	var names [3]string
	for seed := uint64(1); seed <= uint64(seeds); seed++ {
		r, cfg, truth := correlatedRun(seed)
		if white {
			cfg.Sensors[0].CorrelatedFraction, cfg.Sensors[0].CorrelationTimeS = 0, 0
		}
		fit, err := FitSystematic(cfg, r.odo, r.fixes, SystematicOptions{})
		if err != nil {
			t.Fatal(err)
		}
		for _, k := range []ParamKind{MountX, MountY, MountHeading} {
			p, ok := fit.Param(k, 0)
			if !ok {
				t.Fatalf("no %v parameter", k)
			}
			j := int(k - MountX)
			names[j] = p.Name
			errs[j] = append(errs[j], p.Fitted-truth[j])
			ses[j] = append(ses[j], p.StdErr)
		}
	}
	var out []mountCheck
	for j := range 3 {
		c := mountCheck{name: names[j]}
		var z2, e2 float64
		for i, e := range errs[j] {
			z := e / ses[j][i]
			z2 += z * z
			e2 += e * e
			if math.Abs(z) > 2 {
				c.beyond2++
			}
		}
		m, sd := stat.MeanStdDev(ses[j], nil)
		c.rmsZ = math.Sqrt(z2 / float64(seeds))
		c.spread = math.Sqrt(e2/float64(seeds)) / m
		c.cv = sd / m
		out = append(out, c)
	}
	return out
}

// TestSystematicGaussMarkovMount: the camera's errors are correlated over
// seconds (correlatedRun), and the fit weights them by the camera's
// Gauss-Markov model (a first-order Gauss-Markov process, A. Gelb, Applied
// Optimal Estimation, 1974, sec. 4.5, as "Design: Sensors" declares it),
// which makes it generalised least squares (A. C. Aitken, 1935) in the
// camera's errors too. Over 12 seeds, for each of the mount's x, y and
// heading: the root mean square of error over standard error lies within
// sqrt(q/12) for q the 2.5% and 97.5% quantiles of the chi-square with 12
// degrees of freedom, [0.61, 1.39] (for a consistent estimator the sum of
// the 12 squares is chi-square; common practice, gonum distuv); the spread
// of the errors (their root mean square about the truth) over the mean
// standard error lies in the same band (the standard errors vary little
// from seed to seed, coefficient of variation below 0.25, so the two agree
// to that); and at most 2 of the 12 errors lie beyond 2 standard errors
// (for a consistent estimator each does with probability 0.0455, so 3 or
// more do with probability 0.015: binomial, gonum distuv). Measured:
// root mean squares 0.69, 1.14 and 1.22, spreads 0.70, 1.13 and 1.25, 0, 1
// and 1 beyond 2.
//
// The same runs fitted with the camera taken as white (its
// correlated_fraction 0, the fit as it was before) fail: the mount's y
// lies beyond 2 standard errors on 3 of the 12 seeds, its root mean square
// of error over standard error is 1.48 and its spread 1.45 times the mean
// standard error (the model's own standard error, before the
// segment-robust one is taken if larger, gives 1.85).
func TestSystematicGaussMarkovMount(t *testing.T) {
	if testing.Short() {
		t.Skip("24 two-minute fits")
	}
	const seeds = 12
	chi2 := distuv.ChiSquared{K: seeds}
	lo, hi := math.Sqrt(chi2.Quantile(0.025)/seeds), math.Sqrt(chi2.Quantile(0.975)/seeds)
	bin := distuv.Binomial{N: seeds, P: 2 * distuv.UnitNormal.CDF(-2)}
	maxBeyond := 0
	for 1-bin.CDF(float64(maxBeyond)) > 0.05 {
		maxBeyond++
	}
	t.Logf("band of the root mean square of error / standard error over %d seeds [%.2f, %.2f]; at most %d beyond 2 (P(more) = %.3f)",
		seeds, lo, hi, maxBeyond, 1-bin.CDF(float64(maxBeyond)))
	fails := func(c mountCheck) []string {
		var why []string
		if c.rmsZ < lo || c.rmsZ > hi {
			why = append(why, fmt.Sprintf("RMS of error / standard error %.2f outside [%.2f, %.2f]", c.rmsZ, lo, hi))
		}
		if c.spread < lo || c.spread > hi {
			why = append(why, fmt.Sprintf("spread over mean standard error %.2f outside [%.2f, %.2f]", c.spread, lo, hi))
		}
		if c.beyond2 > maxBeyond {
			why = append(why, fmt.Sprintf("%d of %d beyond 2 standard errors, at most %d", c.beyond2, seeds, maxBeyond))
		}
		return why
	}
	for _, c := range gaussMarkovMounts(t, seeds, false) {
		t.Logf("Gauss-Markov %-38s RMS z %.2f, spread / SE %.2f, cv of SE %.2f, %d beyond 2", c.name, c.rmsZ, c.spread, c.cv, c.beyond2)
		for _, w := range fails(c) {
			t.Errorf("%s: %s", c.name, w)
		}
		if c.cv > 0.25 {
			t.Errorf("%s: standard errors vary by %.2f of their mean, want below 0.25", c.name, c.cv)
		}
	}
	failed := false
	for _, c := range gaussMarkovMounts(t, seeds, true) {
		why := fails(c)
		t.Logf("white        %-38s RMS z %.2f, spread / SE %.2f, cv of SE %.2f, %d beyond 2 %v", c.name, c.rmsZ, c.spread, c.cv, c.beyond2, why)
		failed = failed || len(why) > 0
	}
	if !failed {
		t.Errorf("the white-weighted fit passes the checks too: they do not tell the Gauss-Markov weighting from white")
	}
}

// TestSystematicWhiteness: the fit's whiteness test of a sensor's
// residuals (SensorWhiteness) on correlatedRun's camera, 95% Gauss-Markov
// with a time constant of 2 s, over 2 seeds. Weighted by the model the
// simulator draws from, the whitened residuals of consecutive fixes are
// uncorrelated: each lag-one correlation within 3.5 of its standard
// deviations 1/sqrt(pairs) of 0 (Bar-Shalom, Li and Kirubarajan 2001, sec.
// 5.4.2; 3.5 for a false alarm once in about 2,000 seeds), and not flagged.
// Weighted as white, the same fixes correlate above 0.3 and are flagged
// (0.48 to 0.61 over seeds 1 to 4, 12 to 15 standard deviations).
// A camera whose errors are white and configured so (the same run without
// the Gauss-Markov part) is not flagged either. Simulator truth.
func TestSystematicWhiteness(t *testing.T) {
	for seed := uint64(1); seed <= 2; seed++ {
		r, cfg, _ := correlatedRun(seed)
		for _, white := range []bool{false, true} {
			c := cfg
			c.Sensors = slices.Clone(cfg.Sensors)
			if white {
				c.Sensors[0].CorrelatedFraction, c.Sensors[0].CorrelationTimeS = 0, 0
			}
			fit, err := FitSystematic(c, r.odo, r.fixes, SystematicOptions{})
			if err != nil {
				t.Fatal(err)
			}
			w := fit.Whiteness[0]
			z := w.Lag1 * math.Sqrt(float64(w.Pairs))
			t.Logf("seed %d, weighted as white %v: lag-one correlation %.3f over %d pairs (%.1f standard deviations), flagged %v", seed, white, w.Lag1, w.Pairs, z, w.Correlated)
			switch {
			case w.Pairs < 100:
				t.Errorf("seed %d: %d pairs, want hundreds", seed, w.Pairs)
			case !white && (math.Abs(z) > 3.5 || w.Correlated):
				t.Errorf("seed %d, weighted by the true model: lag-one correlation %.3f (%.1f standard deviations), flagged %v", seed, w.Lag1, z, w.Correlated)
			case white && (w.Lag1 < 0.3 || !w.Correlated):
				t.Errorf("seed %d, weighted as white: lag-one correlation %.3f, flagged %v; want above 0.3 and flagged", seed, w.Lag1, w.Correlated)
			}
		}
	}
	// No error processes: the simulator's configuration is the true model.
	r := simulateSys(fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 9, DurationS: 120, MarkerCount: 16, FigureEight: true, CameraHz: 10 / 3.0, SensorCovariance: true})
	fit, err := FitSystematic(r.cfg, r.odo, r.fixes, SystematicOptions{})
	if err != nil {
		t.Fatal(err)
	}
	w := fit.Whiteness[0]
	t.Logf("white camera: lag-one correlation %.3f over %d pairs, flagged %v", w.Lag1, w.Pairs, w.Correlated)
	if z := w.Lag1 * math.Sqrt(float64(w.Pairs)); math.Abs(z) > 3.5 || w.Correlated {
		t.Errorf("white camera configured white: lag-one correlation %.3f (%.1f standard deviations), flagged %v", w.Lag1, z, w.Correlated)
	}
}
