package fusion_test

import (
	"fmt"
	"math"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// arcPose is the pose after t seconds on a constant-curvature arc from the
// origin at v m/s and w rad/s: (v/w) (sin(wt), 1 - cos(wt)), heading wt
// (textbook closed form of circular motion).
func arcPose(v, w, t float64) estimator.Pose {
	return estimator.Pose{X: v / w * math.Sin(w*t), Y: v / w * (1 - math.Cos(w*t)), Heading: estimator.Wrap(w * t)}
}

// TestCountsAcrossBodySteps: a differential drive (wheels 0.4 m apart,
// 10^7 counts a metre, so that their rounding is below a micrometre)
// drives an arc, sending encoder counts at 100 Hz for 1 s, then 0.3 s of
// body steps (or of wheel travels) its controller computed (the encoder
// bus down), then counts again for 1 s, each exact; with no IMU, an
// absolute one or one in rotation mode (read with the counts, the body
// steps without it), slow (0.1 m/s, 0.2 rad/s) and fast (0.5 m/s,
// 0.3 rad/s). No sample is refused; the steps start where the counts
// ended (no gap there: they do not overlap the last counts interval); the
// first counts sample after them is the counts' new reference and reports
// a gap in odometry of its 10 ms; and the final pose lies within one
// interval's motion of the closed form (the reference's interval is the
// only travel lost; without an absolute IMU the pose is the closed form's
// 10 ms short, to 1e-6) and inside the pose's 99.9% region (chi-square of
// 3 degrees of freedom, gonum stat/distuv). Before, that sample took the
// counts' travel since the last counts sample, the steps' 0.3 s included,
// over its own 10 ms: slow, the steps' travel counted twice (0.03 m and
// 0.06 rad off without an IMU, 0.027 m with one; NEES 3.2 and 0.25, inside
// the region under the default noise, so the closed form is the sharp
// check); fast, refused as past max_speed_m_per_s (with a wrong hint of a
// 16-bit counter), the sample after it taken from the refused one's counts.
// In rotation mode body steps without the IMU's heading were spared
// (TestRotationIMUAcrossBodySteps), travels with it were not. A robot
// restored from a snapshot taken after the steps ends where the live one
// does, bit for bit. With an absolute IMU every heading but the run's
// first is applied, the new reference's too (before, it was dropped).
func TestCountsAcrossBodySteps(t *testing.T) {
	limit := distuv.ChiSquared{K: 3}.Quantile(0.999)
	const base, dtNs = int64(1e9), int64(10e6)
	const dt = float64(dtNs) * 1e-9
	for _, imu := range []fusion.IMUMode{fusion.IMUNone, fusion.IMUAbsolute, fusion.IMURotation} {
		for _, travel := range []bool{false, true} {
			for _, sp := range []struct{ v, w float64 }{{0.1, 0.2}, {0.5, 0.3}} {
				name := fmt.Sprintf("imu %s, %.1f m/s, travels %v", imu, sp.v, travel)
				wheels := []fusion.Wheel{{YM: 0.2, CountsPerM: 1e7}, {YM: -0.2, CountsPerM: 1e7}}
				r, err := fusion.New(fusion.Config{Wheels: wheels, IMU: imu, NoSideSlip: true, Noise: fusion.DefaultNoise()})
				if err != nil {
					t.Fatal(err)
				}
				// A wheel at (0, py) rolling forward reads a - py dth
				// (DEVELOPERS.md, "Design: Motion prediction").
				wheelAt := func(i int, s float64) float64 { return (sp.v - wheels[i].YM*sp.w) * s }
				var gaps []int
				var twin *fusion.Robot
				for k := int64(0); k <= 230; k++ {
					s := float64(k) * dt
					o := fusion.Odometry{StartNs: base + (k-1)*dtNs, StampNs: base + k*dtNs}
					switch {
					case k <= 100 || k > 130:
						o.Counts = make([]int64, 2)
						for i := range wheels {
							o.Counts[i] = int64(math.Round(wheelAt(i, s) * wheels[i].CountsPerM))
						}
						if imu != fusion.IMUNone {
							z := estimator.Wrap(sp.w*s + 0.4)
							o.IMUHeadingRad = &z
						}
					case travel:
						o.TravelM = []float64{wheelAt(0, dt), wheelAt(1, dt)}
						if imu == fusion.IMURotation {
							z := estimator.Wrap(sp.w*s + 0.4)
							o.IMUHeadingRad = &z
						}
					default:
						o.Step = &estimator.Step{ForwardM: sp.v * dt, TurnRad: sp.w * dt}
					}
					if twin != nil {
						twin.AddOdometry(o)
					}
					res := r.AddOdometry(o)
					if k == 130 {
						// A snapshot after the steps restores a robot that
						// goes on the same way (the reference's end kept).
						b, err := r.Snapshot()
						if err != nil {
							t.Fatal(err)
						}
						if twin, err = fusion.RestoreSnapshot(r.Config(), b); err != nil {
							t.Fatal(err)
						}
					}
					if res.Verdict != fusion.VerdictApplied {
						t.Errorf("%s: sample %d: %v %v", name, k, res.Verdict, res.Err)
						continue
					}
					for _, e := range res.Events {
						if e.Kind == fusion.EventOdometryGap {
							gaps = append(gaps, int(k))
							if math.Abs(e.Value-dt) > 1e-12 {
								t.Errorf("%s: sample %d: a gap of %v s, want %v", name, k, e.Value, dt)
							}
						}
					}
				}
				if len(gaps) != 1 || gaps[0] != 131 {
					t.Errorf("%s: gaps in odometry at samples %v, want at 131 alone", name, gaps)
				}
				if imu == fusion.IMUAbsolute {
					// Every heading sent but the run's first (whose stamp
					// starts the history) is applied, the new
					// reference's too.
					for _, ss := range r.Stats().Sensors {
						if ss.ID == "imu" && ss.Applied != 200 {
							t.Errorf("%s: %d IMU headings applied of the 200 after the run's first", name, ss.Applied)
						}
					}
				}
				p := r.Pose()
				if q := twin.Pose(); q.Pose != p.Pose || q.Cov != p.Cov {
					t.Errorf("%s: restored after the steps: %+v, want %+v", name, q.Pose, p.Pose)
				}
				truth := arcPose(sp.v, sp.w, 2.3)
				// One interval's motion: its chord is below v dt, its turn w dt.
				dpos := math.Hypot(p.Pose.X-truth.X, p.Pose.Y-truth.Y)
				dth := estimator.Wrap(p.Pose.Heading - truth.Heading)
				if dpos > sp.v*dt+1e-6 || math.Abs(dth) > sp.w*dt+1e-6 {
					t.Errorf("%s: final pose %.4f m and %.4f rad off the closed form; want at most one interval's %.4f m and %.4f rad",
						name, dpos, dth, sp.v*dt, sp.w*dt)
				}
				if imu != fusion.IMUAbsolute {
					// Without a heading reference the estimate is the
					// path's closed form short of that interval: on an arc
					// any 10 ms left out leaves the pose of 10 ms before.
					short := arcPose(sp.v, sp.w, 2.3-dt)
					if d := math.Hypot(p.Pose.X-short.X, p.Pose.Y-short.Y) + math.Abs(estimator.Wrap(p.Pose.Heading-short.Heading)); d > 1e-6 {
						t.Errorf("%s: final pose %.3g off the closed form 10 ms short", name, d)
					}
				}
				q := poseNEES(t, p, truth)
				t.Logf("%s: final pose %.2g m and %.2g rad off the closed form, NEES %.3g", name, dpos, dth, q)
				if q > limit {
					t.Errorf("%s: final pose NEES %.1f, past the 99.9%% point %.2f", name, q, limit)
				}
			}
		}
	}
}
