package fusion_test

import (
	"errors"
	"fmt"
	"math"
	"strings"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// The depot tug's site: a survey grid whose start dock lies 43 km east and
// 87 km north of the grid's origin (depotsim_test.go).
var dpFar = dpSite{e: 43210.7, n: 87654.3}

// dpTally is what runs of the depot tug measured at every applied
// odometry sample from dpSettleUs on.
type dpTally struct {
	samples, trusted, inside95 int
	neesSum                    float64
	// Outside the 95% and the 99.9% pose region while trusted.
	trustedOut95, trustedOut999 int
	// longestS is the longest stretch trusted outside the 99.9% region,
	// seconds, and where.
	longestS  float64
	longestAt string
	// By what the tug was doing: samples and of them inside the 95%
	// region, trusted outside it, and trusted outside the 99.9% region.
	kindN, kindIn, kindTrustedOut, kindTrustedOut999 [dpKinds]int
	// Heading within 0.15 rad of +-pi; the 10 s after the camera's reboot.
	westN, westIn, westTrustedOut    int
	rebootN, rebootIn, rebootTrusted int
	// Fixes sent, outliers among them and applied, valid fixes gated.
	fixes, outliers, outliersApplied, validGated int
	recoveries                                   uint64
	// refusals lists every valid input refused (invalid or too old, on
	// arrival or when held), and faults every numerical fault.
	refusals, faults []string
}

func (a *dpTally) add(b *dpTally) {
	a.samples += b.samples
	a.trusted += b.trusted
	a.inside95 += b.inside95
	a.neesSum += b.neesSum
	a.trustedOut95 += b.trustedOut95
	a.trustedOut999 += b.trustedOut999
	if b.longestS > a.longestS {
		a.longestS, a.longestAt = b.longestS, b.longestAt
	}
	for k := range a.kindN {
		a.kindN[k] += b.kindN[k]
		a.kindIn[k] += b.kindIn[k]
		a.kindTrustedOut[k] += b.kindTrustedOut[k]
		a.kindTrustedOut999[k] += b.kindTrustedOut999[k]
	}
	a.westN += b.westN
	a.westIn += b.westIn
	a.westTrustedOut += b.westTrustedOut
	a.rebootN += b.rebootN
	a.rebootIn += b.rebootIn
	a.rebootTrusted += b.rebootTrusted
	a.fixes += b.fixes
	a.outliers += b.outliers
	a.outliersApplied += b.outliersApplied
	a.validGated += b.validGated
	a.recoveries += b.recoveries
	a.refusals = append(a.refusals, b.refusals...)
	a.faults = append(a.faults, b.faults...)
}

func (a *dpTally) String() string {
	pct := func(k, n int) float64 { return 100 * float64(k) / float64(max(n, 1)) }
	var b strings.Builder
	fmt.Fprintf(&b, "%d samples: inside the 95%% region %.2f%%, mean NEES %.2f, trusted %.2f%%; trusted outside 95%% %.2f%%, outside 99.9%% %.3f%%, longest %.2f s (%s)",
		a.samples, pct(a.inside95, a.samples), a.neesSum/float64(max(a.samples, 1)), pct(a.trusted, a.samples),
		pct(a.trustedOut95, a.samples), pct(a.trustedOut999, a.samples), a.longestS, a.longestAt)
	for k := range dpKinds {
		fmt.Fprintf(&b, "; %s %d: inside %.1f%%, trusted outside %.2f%%", k, a.kindN[k], pct(a.kindIn[k], a.kindN[k]), pct(a.kindTrustedOut[k], a.kindN[k]))
	}
	fmt.Fprintf(&b, "; heading near +-pi %d: inside %.1f%%, trusted outside %.2f%%", a.westN, pct(a.westIn, a.westN), pct(a.westTrustedOut, a.westN))
	fmt.Fprintf(&b, "; 10 s after the camera's reboot %d: inside %.1f%%, trusted %.1f%%", a.rebootN, pct(a.rebootIn, a.rebootN), pct(a.rebootTrusted, a.rebootN))
	fmt.Fprintf(&b, "; fixes %d, outliers %d of them applied %d, valid gated %.2f%%, recoveries %d; refusals %d, faults %d",
		a.fixes, a.outliers, a.outliersApplied, pct(a.validGated, a.fixes-a.outliers), a.recoveries, len(a.refusals), len(a.faults))
	return b.String()
}

// dpAnswer is what the robot answered to one input and its pose after it.
type dpAnswer struct {
	res  fusion.Result
	pose fusion.FusedPose
}

// dpFeed feeds a run to a robot of configuration cfg in arrival order, as
// the service does, and returns every answer; a panic fails the test
// through the runtime.
func dpFeed(run *dpRun, cfg fusion.Config) ([]dpAnswer, *fusion.Robot, error) {
	r, err := fusion.New(cfg)
	if err != nil {
		return nil, nil, err
	}
	out := make([]dpAnswer, 0, len(run.ins))
	for i := range run.ins {
		res := dpFeedOne(r, &run.ins[i])
		out = append(out, dpAnswer{res, r.Pose()})
	}
	return out, r, nil
}

// dpFeedOne feeds one input to r.
func dpFeedOne(r *fusion.Robot, in *dpInput) fusion.Result {
	switch {
	case in.odo != nil:
		return r.AddOdometry(*in.odo)
	case in.head != nil:
		return r.AddHeading(*in.head)
	}
	return r.AddFix(*in.fix)
}

// dpMeasure measures one run's answers against its truth.
func dpMeasure(seed uint64, run *dpRun, ans []dpAnswer, stats fusion.Stats) dpTally {
	// 3-dof chi-square quantiles of the pose NEES (gonum stat/distuv).
	q95 := distuv.ChiSquared{K: 3}.Quantile(0.95)
	q999 := distuv.ChiSquared{K: 3}.Quantile(0.999)
	var tl dpTally
	outFrom := int64(-1)
	// The history starts at the first odometry sample: an IMU heading
	// stamped before it (the IMU reads first) is too old by design, and the
	// next heading sets the offset (DEVELOPERS.md, "Design: Time ordering
	// and late measurements").
	first := int64(math.MaxInt64)
	for i := range run.ins {
		if o := run.ins[i].odo; o != nil {
			first = o.StampNs
			break
		}
	}
	stampOf := map[uint64]int64{} // by sequence number
	for i := range ans {
		stampOf[ans[i].res.Seq] = dpStamp(&run.ins[i])
	}
	refused := func(in *dpInput, stamp int64, v fusion.Verdict, err error) {
		if (v == fusion.VerdictInvalid || v == fusion.VerdictTooOld) && !(v == fusion.VerdictTooOld && stamp < first) {
			tl.refusals = append(tl.refusals, fmt.Sprintf("seed %d, input at %.3f s: %v %v", seed, float64(in.arrivalUs)*1e-6, v, err))
		}
	}
	for i := range run.ins {
		in, a := &run.ins[i], &ans[i]
		stamp := dpStamp(in)
		refused(in, stamp, a.res.Verdict, a.res.Err)
		for _, rs := range a.res.Resolved {
			refused(in, stampOf[rs.Seq], rs.Verdict, rs.Err)
		}
		if a.res.Err != nil && strings.Contains(a.res.Err.Error(), "positive definite") {
			tl.faults = append(tl.faults, fmt.Sprintf("seed %d: %v", seed, a.res.Err))
		}
		if err := ghCheckPose(&a.pose); err != nil {
			tl.faults = append(tl.faults, fmt.Sprintf("seed %d, input at %.3f s: %v", seed, float64(in.arrivalUs)*1e-6, err))
			continue
		}
		if in.fix != nil {
			tl.fixes++
			gated := a.res.Verdict == fusion.VerdictGated
			if in.outlier {
				tl.outliers++
				if a.res.Verdict == fusion.VerdictApplied {
					tl.outliersApplied++
				}
			} else if gated {
				tl.validGated++
			}
			continue
		}
		if in.odo == nil || a.res.Verdict != fusion.VerdictApplied || in.odo.StampNs < dpSettleUs*1000 {
			continue
		}
		t := in.odo.StampNs
		nees, err := estimator.PoseNEES(a.pose.Pose, &a.pose.Cov, in.truth)
		if err != nil {
			tl.faults = append(tl.faults, fmt.Sprintf("seed %d: %v", seed, err))
			continue
		}
		trusted := a.pose.Distrust == 0
		inside := nees <= q95
		tl.samples++
		tl.neesSum += nees
		count := func(n, in, trustedOut *int) {
			*n++
			if inside {
				*in++
			} else if trusted {
				*trustedOut++
			}
		}
		var none int
		count(&none, &tl.inside95, &tl.trustedOut95)
		count(&tl.kindN[in.kind], &tl.kindIn[in.kind], &tl.kindTrustedOut[in.kind])
		if math.Abs(in.truth.Heading) > math.Pi-0.15 {
			count(&tl.westN, &tl.westIn, &tl.westTrustedOut)
		}
		if in.sinceCamUs >= 0 {
			var out int
			count(&tl.rebootN, &tl.rebootIn, &out)
			if trusted {
				tl.rebootTrusted++
			}
		}
		if trusted {
			tl.trusted++
		}
		if trusted && nees > q999 {
			tl.trustedOut999++
			tl.kindTrustedOut999[in.kind]++
			if outFrom < 0 {
				outFrom = t
			}
			if d := float64(t-outFrom) * 1e-9; d > tl.longestS {
				tl.longestS, tl.longestAt = d, fmt.Sprintf("seed %d at %.1f s", seed, float64(outFrom)*1e-9)
			}
		} else {
			outFrom = -1
		}
	}
	tl.recoveries = stats.Recoveries
	return tl
}

// dpStamp returns an input's stamp.
func dpStamp(in *dpInput) int64 {
	switch {
	case in.odo != nil:
		return in.odo.StampNs
	case in.head != nil:
		return in.head.StampNs
	}
	return in.fix.StampNs
}

// dpRuns runs n seeded runs of durS seconds at site under depotConfig,
// edited by edit if set.
func dpRuns(t *testing.T, n int, durS float64, site dpSite, e dpErrors, edit func(*fusion.Config)) dpTally {
	t.Helper()
	var sum dpTally
	for k := range n {
		seed := uint64(100 + k)
		run := dpSimulate(seed, durS, site, e)
		cfg := depotConfig(run.start)
		if edit != nil {
			edit(&cfg)
		}
		ans, r, err := dpFeed(&run, cfg)
		if err != nil {
			t.Fatal(err)
		}
		tl := dpMeasure(seed, &run, ans, r.Stats())
		sum.add(&tl)
	}
	return sum
}

// dpMove returns the run in another field frame: every field pose p
// becomes site + rot(turn) (p - from), the IMU's readings unchanged.
func dpMove(run *dpRun, from estimator.Pose, turn float64, to dpSite) dpRun {
	c, sn := math.Cos(turn), math.Sin(turn)
	move := func(x, y, h float64) (float64, float64, float64) {
		dx, dy := x-from.X, y-from.Y
		return to.e + c*dx - sn*dy, to.n + sn*dx + c*dy, estimator.Wrap(h + turn)
	}
	out := dpRun{ins: make([]dpInput, len(run.ins))}
	out.start.X, out.start.Y, out.start.Heading = move(run.start.X, run.start.Y, run.start.Heading)
	for i, in := range run.ins {
		if in.fix != nil {
			f := *in.fix
			f.XM, f.YM, f.HeadingRad = move(f.XM, f.YM, f.HeadingRad)
			in.fix = &f
		}
		in.truth.X, in.truth.Y, in.truth.Heading = move(in.truth.X, in.truth.Y, in.truth.Heading)
		out.ins[i] = in
	}
	return out
}

// dpSame reports the first difference between the answers of a run (a)
// and of the same run in a frame turned by turn (b): verdicts, NIS,
// events, held inputs' resolutions and trust the same, the pose turned
// back to 1e-6 m and rad about the runs' start poses, the covariance to
// 1e-6 of its largest variance.
func dpSame(a, b []dpAnswer, sa, sb estimator.Pose, turn float64) error {
	near := func(x, y float64) bool { return math.Abs(x-y) <= 1e-6*math.Max(1, math.Max(math.Abs(x), math.Abs(y))) }
	c, sn := math.Cos(turn), math.Sin(turn)
	for i := range a {
		p, q := &a[i], &b[i]
		if p.res.Verdict != q.res.Verdict || !near(p.res.NIS, q.res.NIS) || len(p.res.Events) != len(q.res.Events) ||
			len(p.res.Resolved) != len(q.res.Resolved) || p.pose.Distrust != q.pose.Distrust {
			return fmt.Errorf("input %d: %v NIS %g events %v resolved %v %v; moved %v %g %v %v %v", i, p.res.Verdict, p.res.NIS, p.res.Events,
				p.res.Resolved, p.pose.Distrust, q.res.Verdict, q.res.NIS, q.res.Events, q.res.Resolved, q.pose.Distrust)
		}
		for k, e := range p.res.Events {
			if f := q.res.Events[k]; e.Kind != f.Kind || e.StampNs != f.StampNs || !near(e.Value, f.Value) {
				return fmt.Errorf("input %d: event %+v, moved %+v", i, e, f)
			}
		}
		for k, r := range p.res.Resolved {
			if f := q.res.Resolved[k]; r.Seq != f.Seq || r.Verdict != f.Verdict || !near(r.NIS, f.NIS) {
				return fmt.Errorf("input %d: resolved %+v, moved %+v", i, r, f)
			}
		}
		// b's pose taken back: rot(-turn) (b - sb) + sa.
		dx, dy := q.pose.Pose.X-sb.X, q.pose.Pose.Y-sb.Y
		bx, by := sa.X+c*dx+sn*dy, sa.Y-sn*dx+c*dy
		if math.Hypot(bx-p.pose.Pose.X, by-p.pose.Pose.Y) > 1e-6 || math.Abs(estimator.Wrap(q.pose.Pose.Heading-turn-p.pose.Pose.Heading)) > 1e-6 {
			return fmt.Errorf("input %d: pose %+v, moved back (%.9f, %.9f)", i, p.pose.Pose, bx, by)
		}
		// The position block turned back: R^T C R; the cross terms R^T c.
		pc, qc := &p.pose.Cov, &q.pose.Cov
		back := [9]float64{
			c*c*qc[0] + 2*c*sn*qc[1] + sn*sn*qc[4], (c*c-sn*sn)*qc[1] + c*sn*(qc[4]-qc[0]), c*qc[2] + sn*qc[5],
			0, sn*sn*qc[0] - 2*c*sn*qc[1] + c*c*qc[4], -sn*qc[2] + c*qc[5],
			0, 0, qc[8],
		}
		back[3], back[6], back[7] = back[1], back[2], back[5]
		for k := range back {
			if math.Abs(back[k]-pc[k]) > 1e-6*math.Max(pc[0], math.Max(pc[4], pc[8])) {
				return fmt.Errorf("input %d: covariance %v, moved back %v", i, *pc, back)
			}
		}
	}
	return nil
}

// dpLimits are the honesty limits of TestDepotTug, as shares of the
// samples, seconds or counts; each check is named in violations.
type dpLimits struct {
	inside95, meanNEES, trustedOut999, longestS, validGated float64
}

// violations returns what of tl breaks the limits, and the refusals and
// faults, which no run may have.
func (l dpLimits) violations(tl *dpTally) []string {
	var v []string
	share := func(k int) float64 { return float64(k) / float64(max(tl.samples, 1)) }
	if got := share(tl.inside95); got < l.inside95 {
		v = append(v, fmt.Sprintf("share inside the 95%% region %.4f, below %.4f", got, l.inside95))
	}
	if got := tl.neesSum / float64(max(tl.samples, 1)); got > l.meanNEES {
		v = append(v, fmt.Sprintf("mean NEES %.2f, above %.2f", got, l.meanNEES))
	}
	if got := share(tl.trustedOut999); got > l.trustedOut999 {
		v = append(v, fmt.Sprintf("share trusted outside the 99.9%% region %.5f, above %.5f", got, l.trustedOut999))
	}
	if tl.longestS > l.longestS {
		v = append(v, fmt.Sprintf("trusted outside the 99.9%% region for %.2f s (%s), above %.2f s", tl.longestS, tl.longestAt, l.longestS))
	}
	if got := float64(tl.validGated) / float64(max(tl.fixes-tl.outliers, 1)); got > l.validGated {
		v = append(v, fmt.Sprintf("share of valid fixes gated %.4f, above %.4f", got, l.validGated))
	}
	if tl.outliersApplied > 0 {
		v = append(v, fmt.Sprintf("%d of %d outlying fixes applied", tl.outliersApplied, tl.outliers))
	}
	for _, r := range tl.refusals[:min(len(tl.refusals), 5)] {
		v = append(v, "valid input refused: "+r)
	}
	for _, f := range tl.faults[:min(len(tl.faults), 5)] {
		v = append(v, "fault: "+f)
	}
	return v
}

// dpHonest are the limits with every error process on: 8 runs of 300 s
// measured 98.84% of samples inside the 95% region, mean NEES 1.59,
// 0.106% trusted outside the 99.9% region (the README's floor is 0.1%),
// the longest 2.24 s, 4.1% of valid fixes gated (Student-t errors of 3
// degrees of freedom beside a gate at 0.99), none of 17 outliers applied,
// no refusal and no fault. The limits are about twice what was measured,
// regression guards rather than promises, and no refusal or fault at all.
var dpHonest = dpLimits{inside95: 0.95, meanNEES: 3, trustedOut999: 0.002, longestS: 5, validGated: 0.08}

// TestDepotTug drives the depot tug (depotsim_test.go: its survey grid 43
// and 87 km from the origin, 50 Hz odometry on 16-bit counters, a 25 Hz
// IMU, 3 Hz fixes 30 to 250 ms late with Student-t errors and 3%
// outliers, a camera that stalls and reboots, odometry dropouts, stamp
// jitter, AR(1) wheel slip, a gyro off in scale with a walking bias,
// spins across +-pi, reversing and a stand of minutes) through a Robot as
// the service does, 8 seeded runs of 300 s, and checks at every odometry
// sample after the first 5 s that the truth lies inside the published
// regions about as stated, that the estimate is not trusted where it does
// not (chi-square quantiles from gonum stat/distuv; Bar-Shalom, Li and
// Kirubarajan 2001, sec. 5.4.2), that no valid input is refused and that
// no numerical fault occurs (dpHonest).
func TestDepotTug(t *testing.T) {
	sum := dpRuns(t, 8, 300, dpFar, dpAllErrors(), nil)
	t.Log(&sum)
	for _, v := range dpHonest.violations(&sum) {
		t.Error(v)
	}
}

// TestDepotTugCanFail: the same limits catch a configuration that claims
// too much: the wheels' noise, the camera's covariance and the IMU
// offset's walk at a quarter of depotConfig's.
func TestDepotTugCanFail(t *testing.T) {
	sum := dpRuns(t, 8, 300, dpFar, dpAllErrors(), func(c *fusion.Config) {
		c.Noise.WheelVarM2PerM /= 4
		c.Noise.IMUOffsetVarRad2PerS /= 4
		for k := range c.Sensors[0].Cov {
			c.Sensors[0].Cov[k] /= 4
		}
	})
	v := dpHonest.violations(&sum)
	t.Logf("overconfident: %v; caught: %q", &sum, v)
	if len(v) == 0 {
		t.Error("the limits let an overconfident configuration pass")
	}
}

// TestDepotTugFieldFrame: the depot tug's runs with every error process,
// their survey grid turned and moved to another place 99 km from the
// origin and to the origin itself, give the same answers and, turned
// back, the same track and covariance (dpSame, 1e-6): the filter's models
// are covariant under rigid motions of the field frame (DEVELOPERS.md,
// "Design: Conventions"), and a float64 keeps 1.5e-11 m of 1e5 m.
func TestDepotTugFieldFrame(t *testing.T) {
	for _, seed := range []uint64{100, 101, 102} {
		run := dpSimulate(seed, 300, dpFar, dpAllErrors())
		a, _, err := dpFeed(&run, depotConfig(run.start))
		if err != nil {
			t.Fatal(err)
		}
		for _, m := range []struct {
			turn float64
			to   dpSite
		}{{-2.9, dpSite{1200.5, 99000.25}}, {1.1, dpSite{}}} {
			moved := dpMove(&run, run.start, m.turn, m.to)
			b, _, err := dpFeed(&moved, depotConfig(moved.start))
			if err != nil {
				t.Fatal(err)
			}
			if err := dpSame(a, b, run.start, moved.start, m.turn); err != nil {
				t.Errorf("seed %d, turned %g and moved to %+v: %v", seed, m.turn, m.to, err)
			}
		}
	}
}

// TestDepotTurnScaleQuietWheels: wheels quieter than configured (none of
// their own noise but the counts' quantisation, or half the configured
// variance) under the turn scale, with the IMU offset walking per radian
// (README: a gyro's scale error) and everything else exact: the estimate
// stays honest in spins. The turn scale's update takes out the pull the
// configured wheel noise would give it (DEVELOPERS.md, "Design: State");
// while its moments covered the pose alone, an IMU heading's update moved
// the turn scale through the offset's covariance with it, which the
// moments left out, and each spin pushed the scale 3% to 4% high (12 of
// its standard deviations): 0.959% of samples trusted outside the 99.9%
// region, for up to 13.6 s (mean NEES 960), with quiet wheels, 0.747%
// (13.7 s) with half the noise (measured on the code before the change, 8
// runs of 300 s). Limits: the README's floor of 0.1% and 1 s (measured
// after: none).
func TestDepotTurnScaleQuietWheels(t *testing.T) {
	for _, c := range []struct {
		name string
		e    dpErrors
	}{{"quantised", dpErrors{}}, {"half", dpErrors{wheelWhite: fusion.DefaultNoise().WheelVarM2PerM / 2}}} {
		t.Run(c.name, func(t *testing.T) {
			sum := dpRuns(t, 8, 300, dpFar, c.e, nil)
			t.Log(&sum)
			if got := float64(sum.trustedOut999) / float64(sum.samples); got > 0.001 || sum.longestS > 1 {
				t.Errorf("trusted outside the 99.9%% region on %.3f%% of samples, the longest %.2f s (%s)", 100*got, sum.longestS, sum.longestAt)
			}
		})
	}
}

// TestDepotTurnScaleWeakIMU: wheels quieter than configured (quantised
// counts alone, or half the configured variance), as configured and 1.5
// times louder, under a weak IMU heading (imu_offset_var_rad2_per_rad
// 6.3e-4, the 1% scale error squared times a whole turn, the gyro up to 1%
// off; everything else exact), where the turn scale stays unheld for long
// and the compensation of its errors-in-variables pull, computed from the
// configured wheel noise, is applied at every update: the estimate stays
// honest over that range of the true to the configured noise, which the
// compensation carries as a consider parameter (calibration.noise_ratio_std,
// DEVELOPERS.md "Design: State"). Taking the configured noise for the
// truth, the estimate was trusted outside its 99.9% region on 2.835% of
// samples, for up to 39.5 s (mean NEES 29.4), with quantised counts, and
// on 1.355% (21.7 s, mean NEES 16.0) with half the noise; as configured
// and 1.5 times louder on none (mean NEES 3.77 and 3.51); now on none in
// all four (mean NEES 0.62, 1.12, 1.78 and 2.79; 8 runs of 300 s each).
// Limits: the README's floor of 0.1% and 1 s.
func TestDepotTurnScaleWeakIMU(t *testing.T) {
	for _, c := range []struct {
		name string
		e    dpErrors
	}{{"quantised", dpErrors{gyroScale: 0.01}}, {"half", dpErrors{gyroScale: 0.01, wheelWhite: fusion.DefaultNoise().WheelVarM2PerM / 2}},
		{"configured", dpErrors{gyroScale: 0.01, wheelWhite: fusion.DefaultNoise().WheelVarM2PerM}},
		{"louder", dpErrors{gyroScale: 0.01, wheelWhite: 1.5 * fusion.DefaultNoise().WheelVarM2PerM}}} {
		t.Run(c.name, func(t *testing.T) {
			sum := dpRuns(t, 8, 300, dpFar, c.e, func(c *fusion.Config) { c.Noise.IMUOffsetVarRad2PerRad = 6.3e-4 })
			t.Log(&sum)
			if got := float64(sum.trustedOut999) / float64(sum.samples); got > 0.001 || sum.longestS > 1 {
				t.Errorf("trusted outside the 99.9%% region on %.3f%% of samples, the longest %.2f s (%s)", 100*got, sum.longestS, sum.longestAt)
			}
		})
	}
}

// TestRunStartKeepsEIVConsider: the turn scale compensation's consider
// column (estimator.State's EIVConsider, the covariance of each state with
// the unknown ratio of the true to the configured wheel noise, over its
// variance) goes with the covariance at a run start: a run started
// without a new pose keeps the pose's and the scales' (their covariance is
// kept) and zeroes the IMU offset's (it starts afresh); one started at a
// new pose zeroes the pose's too (the new pose's error is independent of
// the ratio). Dropped, the covariance would keep the ratio's spread while
// the next updates took none of its correlation into account. The depot
// tug's first minute under the weak IMU of TestDepotTurnScaleWeakIMU gives
// the column.
func TestRunStartKeepsEIVConsider(t *testing.T) {
	run := dpSimulate(100, 60, dpFar, dpErrors{gyroScale: 0.01})
	cfg := depotConfig(run.start)
	cfg.Noise.IMUOffsetVarRad2PerRad = 6.3e-4
	_, r, err := dpFeed(&run, cfg)
	if err != nil {
		t.Fatal(err)
	}
	l := r.Layout()
	before := r.Estimate()
	psi := before.EIVConsider()
	if psi[l.TurnScale()] == 0 || psi[estimator.IHead] == 0 || psi[l.Offset()] == 0 {
		t.Fatalf("consider column %v before the run start: the test says nothing", psi)
	}
	check := func(when string, pose bool) {
		t.Helper()
		st := r.Estimate()
		got := st.EIVConsider()
		for i := range got {
			want := psi[i]
			if i == l.Offset() || i < 3 && !pose || i >= st.Size() {
				want = 0
			}
			if got[i] != want {
				t.Errorf("consider column %d after %s: %v, want %v", i, when, got[i], want)
			}
		}
	}
	if res := r.StartRun(fusion.RunStart{BootID: "second"}); res.Verdict != fusion.VerdictApplied {
		t.Fatal(res.Err)
	}
	check("a run start without a pose", true)
	pose := estimator.Pose{X: dpFar.e, Y: dpFar.n, Heading: 0.3}
	if res := r.StartRun(fusion.RunStart{BootID: "third", Pose: &pose, Cov: []float64{0.01, 0, 0, 0, 0.01, 0, 0, 0, 0.01}}); res.Verdict != fusion.VerdictApplied {
		t.Fatal(res.Err)
	}
	check("a run start at a new pose", false)
}

// TestSnapshotKeepsEIVConsider: a snapshot carries the turn scale
// compensation's consider column (version 19): the depot tug under the
// weak IMU of TestDepotTurnScaleWeakIMU, restored from a snapshot taken
// when the column is not zero, gives bit for bit the same answers as the
// original to the end of the run. The same bytes labelled version 18,
// whose estimates have no such column, are refused with ErrSnapshot
// naming it (testdata/README.md; proto/reckon/v1/journal.proto).
func TestSnapshotKeepsEIVConsider(t *testing.T) {
	run := dpSimulate(101, 90, dpFar, dpErrors{gyroScale: 0.01})
	cfg := depotConfig(run.start)
	cfg.Noise.IMUOffsetVarRad2PerRad = 6.3e-4
	a, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	feed := dpFeedOne
	mid := len(run.ins) * 2 / 3
	for i := range run.ins[:mid] {
		feed(a, &run.ins[i])
	}
	st := a.Estimate()
	if psi := st.EIVConsider(); psi[a.Layout().TurnScale()] == 0 {
		t.Fatalf("consider column %v at the snapshot: the test says nothing", psi)
	}
	snap, b := snapshotRestored(t, a, cfg)
	for i := mid; i < len(run.ins); i++ {
		ra, rb := feed(a, &run.ins[i]), feed(b, &run.ins[i])
		if ra.Verdict != rb.Verdict || ra.NIS != rb.NIS || a.Pose() != b.Pose() {
			t.Fatalf("input %d: %v NIS %v pose %+v; restored %v NIS %v pose %+v", i, ra.Verdict, ra.NIS, a.Pose(), rb.Verdict, rb.NIS, b.Pose())
		}
	}
	// Field 1, the version, is the first: tag 0x08 and a one-byte varint.
	if snap[0] != 0x08 || snap[1] != fusion.SnapshotVersion {
		t.Fatalf("snapshot starts % x, not its version", snap[:2])
	}
	old := append([]byte{0x08, 18}, snap[2:]...)
	if _, err := fusion.RestoreSnapshot(cfg, old); !errors.Is(err, fusion.ErrSnapshot) || !strings.Contains(err.Error(), "consider column") {
		t.Errorf("relabelled version 18: %v, want ErrSnapshot naming the consider column", err)
	}
}
