package fusion_test

import (
	"fmt"
	"math"
	"math/bits"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// ocTally is what runs of the orchard carrier (orchardsim_test.go)
// measured at every applied odometry sample from ocSettleUs on.
type ocTally struct {
	// By phase: samples, inside the 95% region, trusted, trusted outside
	// the 99.9% region, and the NEES summed.
	n, in95, trusted, trustedOut999 [ocPhases]int
	nees                            [ocPhases]float64
	// longestS is the longest stretch trusted outside the 99.9% region
	// outside the carry, seconds, and where.
	longestS  float64
	longestAt string
	// setDownS is the longest such stretch in the 30 s after a set-down,
	// and where.
	setDownS  float64
	setDownAt string
	// Fixes sent, misread among them and applied, valid fixes gated.
	fixes, misread, misreadApplied, validGated int
	// After a set-down: runs, those reseeded, and the time from set-down
	// to the first reseed and to the first sample inside the 99.9% region
	// (the worst of the runs), seconds.
	kidnaps, reseeded        int
	worstReseedS, worstBackS float64
	// reasons counts, per distrust reason (bit), the samples outside the
	// carry that it stood at.
	reasons [16]int
	// refusals lists every valid input refused, faults every numerical
	// fault.
	refusals, faults []string
}

func (a *ocTally) add(b *ocTally) {
	for p := range ocPhases {
		a.n[p] += b.n[p]
		a.in95[p] += b.in95[p]
		a.trusted[p] += b.trusted[p]
		a.trustedOut999[p] += b.trustedOut999[p]
		a.nees[p] += b.nees[p]
	}
	if b.longestS > a.longestS {
		a.longestS, a.longestAt = b.longestS, b.longestAt
	}
	if b.setDownS > a.setDownS {
		a.setDownS, a.setDownAt = b.setDownS, b.setDownAt
	}
	a.fixes += b.fixes
	a.misread += b.misread
	a.misreadApplied += b.misreadApplied
	a.validGated += b.validGated
	a.kidnaps += b.kidnaps
	a.reseeded += b.reseeded
	a.worstReseedS = max(a.worstReseedS, b.worstReseedS)
	a.worstBackS = max(a.worstBackS, b.worstBackS)
	for k := range a.reasons {
		a.reasons[k] += b.reasons[k]
	}
	a.refusals = append(a.refusals, b.refusals...)
	a.faults = append(a.faults, b.faults...)
}

// all returns the sums over the phases but the carry.
func (a *ocTally) all() (n, in95, trusted, trustedOut999 int, nees float64) {
	for p := range ocPhases {
		if p != ocCarried {
			n += a.n[p]
			in95 += a.in95[p]
			trusted += a.trusted[p]
			trustedOut999 += a.trustedOut999[p]
			nees += a.nees[p]
		}
	}
	return
}

func (a *ocTally) String() string {
	pct := func(k, n int) float64 { return 100 * float64(k) / float64(max(n, 1)) }
	var b strings.Builder
	n, in95, trusted, out, nees := a.all()
	fmt.Fprintf(&b, "%d samples (carry apart): inside the 95%% region %.2f%%, mean NEES %.2f, trusted %.2f%%, trusted outside 99.9%% %.3f%%, longest %.2f s (%s)",
		n, pct(in95, n), nees/float64(max(n, 1)), pct(trusted, n), pct(out, n), a.longestS, a.longestAt)
	for p := range ocPhases {
		fmt.Fprintf(&b, "; %s %d: inside %.1f%%, NEES %.2f, trusted %.1f%%, trusted outside 99.9%% %.2f%%", p, a.n[p], pct(a.in95[p], a.n[p]),
			a.nees[p]/float64(max(a.n[p], 1)), pct(a.trusted[p], a.n[p]), pct(a.trustedOut999[p], a.n[p]))
	}
	fmt.Fprintf(&b, "; fixes %d, misread %d of them applied %d, valid gated %.2f%%", a.fixes, a.misread, a.misreadApplied, pct(a.validGated, a.fixes-a.misread))
	if a.kidnaps > 0 {
		fmt.Fprintf(&b, "; kidnaps %d, reseeded %d, worst reseed %.1f s, worst first inside 99.9%% %.1f s, longest trusted outside 99.9%% after the set-down %.2f s (%s)",
			a.kidnaps, a.reseeded, a.worstReseedS, a.worstBackS, a.setDownS, a.setDownAt)
	}
	for k, c := range a.reasons {
		if c > 0 {
			fmt.Fprintf(&b, "; %v %.2f%%", fusion.TrustReason(1<<k), pct(c, n))
		}
	}
	fmt.Fprintf(&b, "; refusals %d, faults %d", len(a.refusals), len(a.faults))
	return b.String()
}

// ocCheckPose returns an error when the pose or its covariance is not
// finite, not symmetric or not positive definite (Cholesky, gonum mat).
func ocCheckPose(p *fusion.FusedPose) error {
	for _, x := range append([]float64{p.Pose.X, p.Pose.Y, p.Pose.Heading}, p.Cov[:]...) {
		if math.IsNaN(x) || math.IsInf(x, 0) {
			return fmt.Errorf("pose or covariance not finite: %+v %v", p.Pose, p.Cov)
		}
	}
	var c mat.Cholesky
	if !c.Factorize(mat.NewSymDense(3, append([]float64(nil), p.Cov[:]...))) {
		return fmt.Errorf("covariance not positive definite: %v", p.Cov)
	}
	return nil
}

// ocRunOne feeds a run to a robot of configuration cfg in arrival order,
// as the service does, and measures every answer against the truth.
func ocRunOne(seed uint64, run *ocRun, cfg fusion.Config) (ocTally, error) {
	var tl ocTally
	rb, err := fusion.New(cfg)
	if err != nil {
		return tl, err
	}
	// 3-dof chi-square quantiles of the pose NEES (gonum stat/distuv).
	q95 := distuv.ChiSquared{K: 3}.Quantile(0.95)
	q999 := distuv.ChiSquared{K: 3}.Quantile(0.999)
	// The history starts at the first odometry sample: a heading stamped
	// before it is too old by design.
	first := int64(math.MaxInt64)
	for i := range run.ins {
		if o := run.ins[i].odo; o != nil {
			first = o.StampNs
			break
		}
	}
	type sent struct {
		stamp int64
		at    float64
	}
	bySeq := map[uint64]sent{}
	refused := func(s sent, v fusion.Verdict, err error) {
		if (v == fusion.VerdictInvalid || v == fusion.VerdictTooOld) && !(v == fusion.VerdictTooOld && s.stamp < first) {
			tl.refusals = append(tl.refusals, fmt.Sprintf("seed %d, input at %.3f s: %v %v", seed, s.at, v, err))
		}
	}
	outFrom := int64(-1)
	reseedAt, backAt := int64(-1), int64(-1)
	carryReseed := false // reseeded while still carried
	for i := range run.ins {
		in := &run.ins[i]
		var res fusion.Result
		var stamp int64
		switch {
		case in.odo != nil:
			res, stamp = rb.AddOdometry(*in.odo), in.odo.StampNs
		case in.head != nil:
			res, stamp = rb.AddHeading(*in.head), in.head.StampNs
		default:
			res, stamp = rb.AddFix(*in.fix), in.fix.StampNs
		}
		s := sent{stamp, float64(in.arrivalUs) * 1e-6}
		bySeq[res.Seq] = s
		refused(s, res.Verdict, res.Err)
		for _, rs := range res.Resolved {
			refused(bySeq[rs.Seq], rs.Verdict, rs.Err)
		}
		for _, ev := range res.Events {
			if ev.Kind != fusion.EventMoveRecovered && ev.Kind != fusion.EventReseeded || run.setDownUs < 0 {
				continue
			}
			switch {
			case ev.StampNs >= run.setDownUs*1000 && reseedAt < 0:
				reseedAt = ev.StampNs
			case ev.StampNs >= run.liftUs*1000:
				// Two markers seen in one frame place the carried
				// carrier where it is then; the carry goes on, and
				// how far it takes it shows in backAt.
				carryReseed = true
			}
		}
		pose := rb.Pose()
		if err := ocCheckPose(&pose); err != nil {
			tl.faults = append(tl.faults, fmt.Sprintf("seed %d, input at %.3f s: %v", seed, s.at, err))
			continue
		}
		if in.fix != nil {
			tl.fixes++
			if in.misread {
				tl.misread++
				if res.Verdict == fusion.VerdictApplied {
					tl.misreadApplied++
				}
			} else if res.Verdict == fusion.VerdictGated {
				tl.validGated++
			}
			continue
		}
		if in.odo == nil || res.Verdict != fusion.VerdictApplied || stamp < ocSettleUs*1000 {
			continue
		}
		nees, err := estimator.PoseNEES(pose.Pose, &pose.Cov, in.truth)
		if err != nil {
			tl.faults = append(tl.faults, fmt.Sprintf("seed %d: %v", seed, err))
			continue
		}
		p, trusted := in.phase, pose.Distrust == 0
		tl.n[p]++
		tl.nees[p] += nees
		if nees <= q95 {
			tl.in95[p]++
		}
		if trusted {
			tl.trusted[p]++
		}
		for k := range tl.reasons {
			if p != ocCarried && pose.Distrust&(1<<k) != 0 {
				tl.reasons[k]++
			}
		}
		if run.setDownUs >= 0 && stamp >= run.setDownUs*1000 && nees <= q999 && backAt < 0 {
			backAt = stamp
		}
		if trusted && nees > q999 {
			tl.trustedOut999[p]++
			if p == ocCarried {
				continue
			}
			if outFrom < 0 {
				outFrom = stamp
			}
			d := float64(stamp-outFrom) * 1e-9
			if d > tl.longestS {
				tl.longestS, tl.longestAt = d, fmt.Sprintf("seed %d at %.1f s, %s", seed, float64(outFrom)*1e-9, p)
			}
			if p == ocAfterSetDown && d > tl.setDownS {
				tl.setDownS, tl.setDownAt = d, fmt.Sprintf("seed %d at %.1f s", seed, float64(outFrom)*1e-9)
			}
		} else {
			outFrom = -1
		}
	}
	if run.setDownUs >= 0 {
		tl.kidnaps++
		end := run.ins[len(run.ins)-1].arrivalUs * 1000
		switch {
		case reseedAt >= 0:
			tl.reseeded++
			tl.worstReseedS = float64(reseedAt-run.setDownUs*1000) * 1e-9
		case carryReseed:
			tl.reseeded++
		default:
			tl.worstReseedS = float64(end-run.setDownUs*1000) * 1e-9
		}
		if backAt < 0 {
			backAt = end
		}
		tl.worstBackS = float64(backAt-run.setDownUs*1000) * 1e-9
	}
	return tl, nil
}

// ocRuns runs n seeded runs of durS seconds under ocConfig, edited by edit
// if set.
func ocRuns(t *testing.T, n int, durS float64, e ocErrors, edit func(*fusion.Config)) ocTally {
	t.Helper()
	var sum ocTally
	for k := range n {
		seed := uint64(500 + k)
		run := ocSimulate(seed, durS, e)
		cfg := ocConfig(&run)
		if edit != nil {
			edit(&cfg)
		}
		tl, err := ocRunOne(seed, &run, cfg)
		if err != nil {
			t.Fatal(err)
		}
		sum.add(&tl)
	}
	return sum
}

// ocLimits are honesty limits on the phases but the carry.
type ocLimits struct {
	inside95, meanNEES, trustedOut999, longestS, validGated float64
}

// violations returns what of tl breaks the limits, and every refusal of a
// valid input, applied misread and fault.
func (l ocLimits) violations(tl *ocTally) []string {
	var v []string
	n, in95, _, out, nees := tl.all()
	share := func(k int) float64 { return float64(k) / float64(max(n, 1)) }
	if got := share(in95); got < l.inside95 {
		v = append(v, fmt.Sprintf("share inside the 95%% region %.4f, below %.4f", got, l.inside95))
	}
	if got := nees / float64(max(n, 1)); got > l.meanNEES {
		v = append(v, fmt.Sprintf("mean NEES %.2f, above %.2f", got, l.meanNEES))
	}
	if got := share(out); got > l.trustedOut999 {
		v = append(v, fmt.Sprintf("share trusted outside the 99.9%% region %.5f, above %.5f", got, l.trustedOut999))
	}
	if tl.longestS > l.longestS {
		v = append(v, fmt.Sprintf("trusted outside the 99.9%% region for %.2f s (%s), above %.2f s", tl.longestS, tl.longestAt, l.longestS))
	}
	if got := float64(tl.validGated) / float64(max(tl.fixes-tl.misread, 1)); got > l.validGated {
		v = append(v, fmt.Sprintf("share of valid fixes gated %.4f, above %.4f", got, l.validGated))
	}
	if tl.misreadApplied > 0 {
		v = append(v, fmt.Sprintf("%d of %d misread fixes applied", tl.misreadApplied, tl.misread))
	}
	for _, r := range tl.refusals[:min(len(tl.refusals), 5)] {
		v = append(v, "valid input refused: "+r)
	}
	for _, f := range tl.faults[:min(len(tl.faults), 5)] {
		v = append(v, "fault: "+f)
	}
	return v
}

// ocHonest are the limits with every error process on but the kidnap:
// 6 runs of 240 s measured 95.57% of samples inside the 95% region, mean
// NEES 2.73, 0.079% trusted outside the 99.9% region (the README's floor
// is 0.1%), the longest 0.24 s, 2.07% of valid fixes gated, none of 176
// misread fixes applied, no refusal and no fault, with the camera's
// correlated error taken as shared; declared per landmark (session 29),
// 99.00%, 1.89, 0.045%, 0.04 s and 0.15%. The limits are about twice the
// first figures (the longest stretch at the README's figure of
// about a second or more), regression guards rather than promises, and no
// refusal, applied misread or fault at all.
var ocHonest = ocLimits{inside95: 0.93, meanNEES: 4, trustedOut999: 0.002, longestS: 2, validGated: 0.05}

// TestOrchardCarrier drives the orchard carrier (orchardsim_test.go: 90
// count encoders, a slope that makes it creep and yaw unseen by the
// wheels, bumps that lift a wheel, soft soil, an IMU on its own clock 10
// to 40 ms off and drifting 100 ppm, landmark fixes with per-marker
// correlated errors, a tape-surveyed map, misread markers and a 60 s
// outage) through a Robot as the service does, 6 seeded runs of 240 s,
// and checks at every odometry sample after the first 5 s that the truth
// lies inside the published regions about as stated and that the
// estimate is not trusted where it does not (chi-square quantiles from
// gonum stat/distuv; Bar-Shalom, Li and Kirubarajan 2001, sec. 5.4.2),
// that no valid input is refused, no misread fix applied and no numerical
// fault occurs (ocHonest).
func TestOrchardCarrier(t *testing.T) {
	sum := ocRuns(t, 6, 240, ocAllErrors(), nil)
	t.Log(&sum)
	for _, v := range ocHonest.violations(&sum) {
		t.Error(v)
	}
}

// TestOrchardCarrierCanFail: the same limits catch the configuration of
// a user who leaves the slope out, the lateral slip at its default (1e-4
// m^2/m, for a level floor) and the forward scale constant: the carrier
// creeps downhill by 1% to 2% of its travel, which the no-side-slip row
// then calls impossible.
func TestOrchardCarrierCanFail(t *testing.T) {
	sum := ocRuns(t, 6, 240, ocAllErrors(), func(c *fusion.Config) {
		c.Noise.LateralSlipVarM2PerM = fusion.DefaultNoise().LateralSlipVarM2PerM
		c.Calibration.ForwardScaleVarPerM = 0
	})
	v := ocHonest.violations(&sum)
	t.Logf("level-floor configuration: %v; caught: %q", &sum, v)
	if len(v) == 0 {
		t.Error("the limits let the level-floor configuration pass")
	}
}

// ocKidnapRuns is TestOrchardKidnap's runs a case (a carry's relocations
// cost about 0.2 s of CPU, BenchmarkOrchardCarry).
const ocKidnapRuns = 12

// TestOrchardKidnap: once a run the carrier is carried 6 to 12 s to
// another row and set down facing along it, with its IMU running (it sees
// the turn) or switched off while carried (it comes back on a new zero).
// Every run is reseeded from the refused landmark fixes of two markers
// within 10 s of the set-down, the estimate is inside its 99.9% region
// within 10 s of it, and no valid input is refused and no numerical fault
// occurs. Over the 30 s after the set-down the estimate is trusted outside
// its 99.9% region on at most 5% of the samples (measured over 12 runs:
// 0.16% with the IMU on, 0.60% with it off; 0.15% and 1.08% with the
// camera's correlated error taken as shared), and for at most 1 s at a
// stretch with the IMU on (0.04 s measured), 2 s with it off (1.36 s,
// right after a reseed whose pose was 4 of its standard deviations off:
// DEVELOPERS.md, the orchard carrier, left open). Before candidates were
// kept from being carried across a turn by hand (turnedByHand), one run
// with the IMU on was reseeded while still carried, 0.3 m off, and trusted
// outside the region for 4.08 s after the set-down (1.47% of the samples).
func TestOrchardKidnap(t *testing.T) {
	for _, c := range []struct {
		name     string
		imuOff   bool
		longestS float64
	}{{"imu-on", false, 1}, {"imu-off", true, 2}} {
		t.Run(c.name, func(t *testing.T) {
			// Without the outage, which would hide the set-down from the
			// camera in runs this short.
			e := ocAllErrors()
			e.kidnap, e.imuOff, e.outage = true, c.imuOff, false
			sum := ocRuns(t, ocKidnapRuns, 150, e, nil)
			t.Log(&sum)
			if sum.reseeded < sum.kidnaps || sum.worstReseedS > 10 || sum.worstBackS > 10 {
				t.Errorf("%d of %d runs reseeded, the worst %.1f s after the set-down; first inside the 99.9%% region after %.1f s at worst",
					sum.reseeded, sum.kidnaps, sum.worstReseedS, sum.worstBackS)
			}
			if sum.setDownS > c.longestS {
				t.Errorf("trusted outside the 99.9%% region after the set-down for %.2f s (%s), above %.2f s", sum.setDownS, sum.setDownAt, c.longestS)
			}
			if got := float64(sum.trustedOut999[ocAfterSetDown]) / float64(max(sum.n[ocAfterSetDown], 1)); got > 0.05 {
				t.Errorf("trusted outside the 99.9%% region on %.3f%% of the 30 s after the set-down", 100*got)
			}
			for _, r := range append(sum.refusals, sum.faults...)[:min(len(sum.refusals)+len(sum.faults), 5)] {
				t.Error(r)
			}
		})
	}
}

// TestOrchardCoarseEncoders: the carrier's 90-tick encoders (one count is
// 5.6 mm of a wheel's travel, 12 mrad of turn over its 0.45 m track) with
// an IMU good to 1 mrad, every other error process off and the camera
// configured white as it then is: the estimate is trusted, and the IMU's
// headings are not called inconsistent. The latest counts' quantisation
// puts the counted heading off the true one by a triangular error of 5
// mrad standard deviation, which does not add up (counts are cumulative)
// and which the IMU's heading, compared with it, sees at every reading;
// taken as the IMU's 1 mrad alone, its NIS window called the estimate
// inconsistent on 85% of the samples, and it was trusted on 14% (measured
// on the code before Config.countsTurnVar, 6 runs of 240 s; after: 0% and
// 100%). Limits: the trust floor the other simulators hold, 95%.
func TestOrchardCoarseEncoders(t *testing.T) {
	sum := ocRuns(t, 6, 240, ocErrors{}, func(c *fusion.Config) {
		c.Sensors[0].CorrelatedFraction, c.Sensors[0].CorrelationTimeS = 0, 0
	})
	t.Log(&sum)
	n, in95, trusted, _, _ := sum.all()
	inconsistent := sum.reasons[bits.TrailingZeros16(uint16(fusion.TrustInconsistent))]
	if float64(trusted) < 0.95*float64(n) || float64(inconsistent) > 0.05*float64(n) || float64(in95) < 0.95*float64(n) {
		t.Errorf("trusted on %d, inconsistent on %d, inside the 95%% region on %d of %d samples", trusted, inconsistent, in95, n)
	}
}

// TestOrchardMarkerPairs: the carrier sees its posts in pairs, one each
// side of the row, and its camera's correlated error is each marker's own
// (orchardsim_test.go). Run 509 of TestOrchardKidnap's draws, from about
// 67 s, has the left post's bearing error persistently positive and the
// right one's negative: the pair reads 2 to 7 cm ahead, frame after frame.
// Taken as one error both share (a bias block per sensor), their
// difference is white news at every frame, and the estimate ran ahead
// along the row, trusted outside its 99.9% region for 6.58 s while
// working (DEVELOPERS.md, the orchard carrier); with the error declared
// per landmark (sensors[].correlated_per_landmark) the limits of
// ocHonest hold: the longest such stretch 0.02 s, 97.3% of the working
// samples inside the 95% region (75.4% shared). Both configurations run,
// so the test shows it can fail.
func TestOrchardMarkerPairs(t *testing.T) {
	e := ocAllErrors()
	e.kidnap, e.outage = true, false
	const seed = 509
	run := ocSimulate(seed, 150, e)
	for _, perLandmark := range []bool{true, false} {
		cfg := ocConfig(&run)
		cfg.Sensors[0].CorrelatedPerLandmark = perLandmark
		tl, err := ocRunOne(seed, &run, cfg)
		if err != nil {
			t.Fatal(err)
		}
		n, in := tl.n[ocWorking], tl.in95[ocWorking]
		share := float64(in) / float64(max(n, 1))
		t.Logf("per landmark %v: working %d samples, inside the 95%% region %.1f%%, longest trusted outside the 99.9%% region %.2f s (%s)",
			perLandmark, n, 100*share, tl.longestS, tl.longestAt)
		caught := tl.longestS > ocHonest.longestS || share < ocHonest.inside95
		if caught == perLandmark {
			t.Errorf("per landmark %v: inside the 95%% region on %.1f%% of the working samples (limit %.0f%%), trusted outside the 99.9%% region for %.2f s (limit %.0f s)",
				perLandmark, 100*share, 100*ocHonest.inside95, tl.longestS, ocHonest.longestS)
		}
	}
}
