package calib

import (
	"errors"
	"math"
	"slices"
	"testing"

	"gonum.org/v1/gonum/stat"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// squareRun drives a differential drive round a square of side sideM by its
// odometry (the controller believes nominal wheels of equal size, wheelbase
// nominalB) and returns the true stopping position less the computed one.
// The true wheels roll scaleL and scaleR times the travel the robot
// believes, trueB apart; the truth and the belief both advance by the arc
// model (estimator.Advance), exact for a constant wheel ratio.
func squareRun(ccw bool, sideM, nominalB, trueB, scaleL, scaleR float64) [2]float64 {
	var truth, belief estimator.Pose
	step := func(dl, dr float64) {
		belief = estimator.Advance(belief, estimator.Step{ForwardM: (dl + dr) / 2, TurnRad: (dr - dl) / nominalB})
		tl, tr := dl*scaleL, dr*scaleR
		truth = estimator.Advance(truth, estimator.Step{ForwardM: (tl + tr) / 2, TurnRad: (tr - tl) / trueB})
	}
	turn := nominalB / 2 * math.Pi / 2 // each wheel's travel in a 90-degree turn in place
	if !ccw {
		turn = -turn
	}
	for range 4 {
		step(sideM, sideM)
		step(-turn, turn)
	}
	return [2]float64{truth.X - belief.X, truth.Y - belief.Y}
}

// TestUMBmarkRecoversGeometry: the closed-form corrections of the
// bidirectional square test (Borenstein and Feng 1996, "Measurement and
// correction of systematic odometry errors in mobile robots", IEEE Trans.
// Robotics and Automation 12(6); the formulas from memory, their signs
// derived in UMBmark's comment) recover the diameter ratio and the wheelbase
// injected into a noise-free simulated differential drive on the paper's
// 4 m square. The closed form is first order in the errors: one test
// recovers small errors within 0.1%; larger ones (a ratio of 1.01 and a
// wheelbase 2% off on a 0.4 m base: 0.1 rad per side) within 0.2% and 1.5%,
// and within 0.1% once the test is repeated with the corrections applied
// (three rounds), as a user would.
func TestUMBmarkRecoversGeometry(t *testing.T) {
	const side = 4.0
	for _, tc := range []struct {
		name         string
		b, ratio, eb float64 // nominal wheelbase, true D_R/D_L, true wheelbase factor
		rounds       int     // runs of the test, each on the robot corrected by the ones before
	}{
		{"ratio 1.001, wheelbase +0.5%", 0.4, 1.001, 1.005, 1},
		{"ratio 0.999, wheelbase -0.3%", 0.5, 0.999, 0.997, 1},
		{"ratio 1.01, wheelbase +2%", 0.4, 1.01, 1.02, 3},
		{"ratio 0.995, wheelbase -1.5%", 0.4, 0.995, 0.985, 3},
		{"ratio only", 0.5, 1.005, 1, 3},
		{"wheelbase only", 0.35, 1, 1.02, 3},
		{"none", 0.4, 1, 1, 1},
	} {
		t.Run(tc.name, func(t *testing.T) {
			sl, sr := 2/(tc.ratio+1), 2*tc.ratio/(tc.ratio+1) // mean 1, ratio sr/sl
			trueB := tc.b * tc.eb
			b, cl, cr := tc.b, 1.0, 1.0 // the robot's belief, corrected round by round
			for round := range tc.rounds {
				cw := squareRun(false, side, b, trueB, sl/cl, sr/cr)
				ccw := squareRun(true, side, b, trueB, sl/cl, sr/cr)
				c, err := UMBmark(cw, ccw, side, b)
				if err != nil {
					t.Fatal(err)
				}
				if math.Abs(c.ScaleLeft+c.ScaleRight-2) > 1e-12 {
					t.Errorf("scales %v and %v do not average 1", c.ScaleLeft, c.ScaleRight)
				}
				if round == 0 && tc.rounds > 1 {
					// Second order in the errors (beta about 0.1 rad here):
					// the ratio within 0.2%, the wheelbase within 1.5%.
					if math.Abs(c.DiameterRatio/tc.ratio-1) > 2e-3 {
						t.Errorf("first round: diameter ratio %.6f, want %.6f within 0.2%%", c.DiameterRatio, tc.ratio)
					}
					if math.Abs(c.WheelbaseM/trueB-1) > 0.015 {
						t.Errorf("first round: wheelbase %.6f m, want %.6f m within 1.5%%", c.WheelbaseM, trueB)
					}
				}
				b, cl, cr = c.WheelbaseM, cl*c.ScaleLeft, cr*c.ScaleRight
			}
			rel := func(name string, got, want float64) {
				if math.Abs(got/want-1) > 1e-3 {
					t.Errorf("%s %.6f, want %.6f within 0.1%%", name, got, want)
				}
			}
			rel("diameter ratio", cr/cl, tc.ratio)
			rel("scale left", cl, sl)
			rel("scale right", cr, sr)
			rel("wheelbase", b, trueB)
			// Corrected, the odometry closes both squares within a centimetre.
			cw := squareRun(false, side, b, trueB, sl/cl, sr/cr)
			ccw := squareRun(true, side, b, trueB, sl/cl, sr/cr)
			if e := math.Max(math.Hypot(cw[0], cw[1]), math.Hypot(ccw[0], ccw[1])); e > 0.01 {
				t.Errorf("corrected return errors %v, %v: %.3g m, want below 1 cm", cw, ccw, e)
			}
		})
	}
}

func TestUMBmarkRefuses(t *testing.T) {
	for _, tc := range []struct {
		name        string
		cw, ccw     [2]float64
		side, wheel float64
	}{
		{"no side", [2]float64{}, [2]float64{}, 0, 0.4},
		{"no wheelbase", [2]float64{}, [2]float64{}, 4, -1},
		{"not finite", [2]float64{math.NaN(), 0}, [2]float64{}, 4, 0.4},
		{"arc inside the wheelbase", [2]float64{-16, 0}, [2]float64{16, 0}, 4, 5},
		{"beyond the closed form", [2]float64{-30, 0}, [2]float64{-30, 0}, 4, 0.4},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if _, err := UMBmark(tc.cw, tc.ccw, tc.side, tc.wheel); !errors.Is(err, ErrSquareTest) {
				t.Errorf("error %v, want ErrSquareTest", err)
			}
		})
	}
}

// squareReturns splits a run of the bidirectional square test
// (fusiontest.Scenario.SquareM) into its squares, the stretches of moving
// odometry, and returns each square's return error in the conventions of
// Correction: the true stopping position less the one the odometry
// computes (dead reckoned by the arc model through the nominal wheels at
// +-wheelbaseM/2), both in the frame of the true starting pose.
func squareReturns(odo []fusion.Odometry, truth []estimator.Pose, wheelbaseM float64) (cw, ccw [][2]float64) {
	var start estimator.Pose
	var belief estimator.Pose
	var turned float64
	moving := false
	for k, o := range odo {
		dl, dr := o.TravelM[0], o.TravelM[1]
		if dl != 0 || dr != 0 {
			if !moving {
				moving, belief, turned = true, estimator.Pose{}, 0
				if k > 0 {
					start = truth[k-1]
				}
			}
			u := estimator.Step{ForwardM: (dl + dr) / 2, TurnRad: (dr - dl) / wheelbaseM}
			belief = estimator.Advance(belief, u)
			turned += u.TurnRad
			continue
		}
		if !moving {
			continue
		}
		moving = false
		end := estimator.Compose(inverse(start), truth[k-1])
		e := [2]float64{end.X - belief.X, end.Y - belief.Y}
		if turned < 0 {
			cw = append(cw, e)
		} else {
			ccw = append(ccw, e)
		}
	}
	return cw, ccw
}

// centroid returns the mean of the points and the standard error of the
// mean of their x.
func centroid(pts [][2]float64) (c [2]float64, seX float64) {
	xs := make([]float64, len(pts))
	for i, p := range pts {
		c[0] += p[0] / float64(len(pts))
		c[1] += p[1] / float64(len(pts))
		xs[i] = p[0]
	}
	return c, stat.StdDev(xs, nil) / math.Sqrt(float64(len(pts)))
}

// TestUMBmarkAgreesWithSystematicFit: the bidirectional square test
// (Borenstein and Feng 1996, "Measurement and correction of systematic
// odometry errors in mobile robots", IEEE Trans. Robotics and Automation
// 12(6): 4 m squares, five runs each way, corrections from the centroids
// of the return errors) and FitSystematic on the same simulated run, with
// its camera fixes, find the same diameter ratio and wheelbase of a
// differential drive whose right wheel reports 0.2% more than it rolls
// (E_d = 1/1.002) and whose configured wheelbase is 1% wide (E_b =
// 1/1.01). They agree within twice their combined standard errors (the
// fit's, and UMBmark's from the scatter of the runs about each centroid)
// plus UMBmark's first-order error for these errors, measured on the
// noise-free square (squareRun). The odometry's noise is a hundredth of
// the simulator's default (0.5 mm per root metre), a well-kept robot on a
// hard floor: at the default a square's return errs by some 40 cm, and
// five runs would not tell the errors apart. The fit recovers the truth
// within two standard errors too.
func TestUMBmarkAgreesWithSystematicFit(t *testing.T) {
	if testing.Short() {
		t.Skip("a nine-minute fit")
	}
	const side, scaleErr, trackErr = 4.0, 0.002, 0.01
	sc := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 3, SquareM: side, OdometryNoiseScale: 0.01,
		DurationS: 5*2*(2+4*(10+3.14)) + 1, Errors: fusiontest.Errors{WheelScales: []float64{0, scaleErr}}}
	sm := fusiontest.New(sc)
	cfg := sm.Config()
	var odo []fusion.Odometry
	var truth []estimator.Pose
	var fixes []fusion.Fix
	for {
		in, ok := sm.Next()
		if !ok {
			break
		}
		switch {
		case in.Odometry != nil:
			odo, truth = append(odo, *in.Odometry), append(truth, in.Truth)
		case in.Fix != nil:
			fixes = append(fixes, *in.Fix)
		}
	}
	trueB := 2 * cfg.Wheels[0].YM
	cfg.Wheels = slices.Clone(cfg.Wheels)
	for i := range cfg.Wheels {
		cfg.Wheels[i].YM *= 1 + trackErr
	}
	nominalB := 2 * cfg.Wheels[0].YM
	wantEd, wantEb := 1/(1+scaleErr), 1/(1+trackErr)

	// UMBmark from the return errors, and its standard errors from their
	// scatter: alpha and beta are (x_cw +- x_ccw) / (-4L), each with
	// standard error sqrt(se_cw^2 + se_ccw^2) / 4L, taken through the
	// closed form by differences.
	cwErr, ccwErr := squareReturns(odo, truth, nominalB)
	if len(cwErr) != 5 || len(ccwErr) != 5 {
		t.Fatalf("%d clockwise and %d counter-clockwise squares, want 5 each", len(cwErr), len(ccwErr))
	}
	cw, seCW := centroid(cwErr)
	ccw, seCCW := centroid(ccwErr)
	umb, err := UMBmark(cw, ccw, side, nominalB)
	if err != nil {
		t.Fatal(err)
	}
	seAB := math.Hypot(seCW, seCCW) / (4 * side)
	const h = 1e-4 // metres of centroid: moves alpha or beta by h/(2L)
	dA, err := UMBmark([2]float64{cw[0] - h, cw[1]}, [2]float64{ccw[0] - h, ccw[1]}, side, nominalB)
	if err != nil {
		t.Fatal(err)
	}
	dB, err := UMBmark([2]float64{cw[0] - h, cw[1]}, [2]float64{ccw[0] + h, ccw[1]}, side, nominalB)
	if err != nil {
		t.Fatal(err)
	}
	seUmbEb := math.Abs(dA.WheelbaseFactor-umb.WheelbaseFactor) / (h / (2 * side)) * seAB
	seUmbEd := math.Abs(dB.DiameterRatio-umb.DiameterRatio) / (h / (2 * side)) * seAB

	// UMBmark's first-order error for these errors, without noise.
	sl, sr := 1.0, wantEd
	exact, err := UMBmark(squareRun(false, side, nominalB, trueB, sl, sr), squareRun(true, side, nominalB, trueB, sl, sr), side, nominalB)
	if err != nil {
		t.Fatal(err)
	}
	biasEd, biasEb := math.Abs(exact.DiameterRatio-wantEd), math.Abs(exact.WheelbaseFactor-wantEb)

	fit, err := FitSystematic(cfg, odo, fixes, SystematicOptions{})
	if err != nil {
		t.Fatal(err)
	}
	pl, _ := fit.Param(WheelScale, 0)
	pr, _ := fit.Param(WheelScale, 1)
	ps, _ := fit.Param(WheelSpread, 0)
	fitEd := pr.Fitted / pl.Fitted
	// The scales' covariance is not reported; leaving it out overstates
	// the ratio's standard error (both scales share the distance driven).
	seFitEd := fitEd * math.Hypot(pl.StdErr/pl.Fitted, pr.StdErr/pr.Fitted)
	for _, c := range []struct {
		name                       string
		want, fit, seFit, umb, seU float64
		bias                       float64
	}{
		{"diameter ratio E_d", wantEd, fitEd, seFitEd, umb.DiameterRatio, seUmbEd, biasEd},
		{"wheelbase factor E_b", wantEb, ps.Fitted, ps.StdErr, umb.WheelbaseFactor, seUmbEb, biasEb},
	} {
		tol := 2*math.Hypot(c.seFit, c.seU) + c.bias
		t.Logf("%-22s truth %.5f  fit %.5f +- %.5f  UMBmark %.5f +- %.5f (first order %.5f)  difference %.5f, tolerance %.5f",
			c.name, c.want, c.fit, c.seFit, c.umb, c.seU, c.bias, c.fit-c.umb, tol)
		if math.Abs(c.fit-c.umb) > tol {
			t.Errorf("%s: fit %.5f and UMBmark %.5f differ by more than %.5f", c.name, c.fit, c.umb, tol)
		}
		if math.Abs(c.fit-c.want) > 2*c.seFit {
			t.Errorf("%s: fit %.5f +- %.5f, truth %.5f", c.name, c.fit, c.seFit, c.want)
		}
	}
}
