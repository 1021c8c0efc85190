package fusion_test

import (
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
	// region, and trusted outside it.
	kindN, kindIn, kindTrustedOut [dpKinds]int
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
		in := &run.ins[i]
		var res fusion.Result
		switch {
		case in.odo != nil:
			res = r.AddOdometry(*in.odo)
		case in.head != nil:
			res = r.AddHeading(*in.head)
		default:
			res = r.AddFix(*in.fix)
		}
		out = append(out, dpAnswer{res, r.Pose()})
	}
	return out, r, nil
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
// TestDepotTurnScaleQuietWheels: wheels quieter than configured (none of
// their own noise but the counts' quantisation, or half the configured
// variance) under the turn scale, with the IMU offset walking per radian
// (README: a gyro's scale error) and everything else exact: the estimate
// stays honest in spins. The turn scale's update takes out the pull the
// configured wheel noise would give it (DEVELOPERS.md, "Design: State");
// while its moments covered the pose alone, an IMU heading's update moved
// the turn scale through the offset's covariance with it, which the
// moments left out, and each spin pushed the scale 3% to 4% high (12 of
// its standard deviations): 1.05% of samples trusted outside the 99.9%
// region, for up to 24.8 s, with quiet wheels, 1.01% with half the noise
// (0.097% with the noise as configured). Limits: the README's floor of
// 0.1% and 1 s (measured after: none).
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
