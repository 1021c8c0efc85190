package fusion_test

import (
	"math"
	"reflect"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// TestSensorDefaults: a fix placed by its sensor's latency, taking its
// sensor's mount and covariance, gives bit for bit what the same fix gives
// when it carries them itself at its capture stamp; and a robust sensor
// reports the raw NIS, the same as a sensor without a robust loss, while
// its update moves the estimate less.
func TestSensorDefaults(t *testing.T) {
	mount := estimator.Pose{X: 0.15, Y: -0.02, Heading: 0.1}
	cov := []float64{9e-4, 0, 0, 0, 9e-4, 0, 0, 0, 4e-4}
	mk := func(s fusion.Sensor) *fusion.Robot {
		r, err := fusion.New(fusion.Config{Sensors: []fusion.Sensor{s}})
		if err != nil {
			t.Fatal(err)
		}
		for k := int64(0); k < 100; k++ {
			step := estimator.Step{ForwardM: 0.002, TurnRad: 0.001}
			r.AddOdometry(fusion.Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, Step: &step})
		}
		return r
	}
	const capture = 300e6 + 2e6
	plain := mk(fusion.Sensor{ID: "camera", Kind: fusion.FixPose})
	at, err := plain.PoseAt(capture)
	if err != nil {
		t.Fatal(err)
	}
	cam := estimator.Compose(at.Pose, mount)
	fix := fusion.Fix{SensorID: "camera", Kind: fusion.FixPose, XM: cam.X + 0.01, YM: cam.Y - 0.02, HeadingRad: cam.Heading + 0.01}

	own := fix
	own.StampNs, own.Mount, own.Cov = capture, &mount, cov
	want := plain.AddFix(own)

	late := mk(fusion.Sensor{ID: "camera", Kind: fusion.FixPose, Mount: mount, Cov: cov, LatencyNs: 80e6})
	bare := fix
	bare.StampNs = capture + 80e6
	got := late.AddFix(bare)
	if !reflect.DeepEqual(got, want) || got.Verdict != fusion.VerdictApplied || late.Pose() != plain.Pose() {
		t.Errorf("fix with the sensor's latency, mount and covariance: %+v, pose %+v; with its own: %+v, pose %+v", got, late.Pose().Pose, want, plain.Pose().Pose)
	}

	robust := mk(fusion.Sensor{ID: "camera", Kind: fusion.FixPose, Mount: mount, Cov: cov, Robust: fusion.RobustHuber})
	far := own
	far.XM += 0.15 // NIS about 7: inside the gate, beyond Huber's k
	plain2 := mk(fusion.Sensor{ID: "camera", Kind: fusion.FixPose})
	a, b := robust.AddFix(far), plain2.AddFix(far)
	if a.Verdict != fusion.VerdictApplied || a.NIS != b.NIS {
		t.Errorf("robust sensor: verdict %v NIS %g; without a robust loss NIS %g", a.Verdict, a.NIS, b.NIS)
	}
	before := mk(fusion.Sensor{ID: "camera", Kind: fusion.FixPose}).Pose().Pose.X
	if da, db := robust.Pose().Pose.X-before, plain2.Pose().Pose.X-before; !(da > 0 && da < db) {
		t.Errorf("robust update moved x by %g, ordinary by %g", da, db)
	}
}

// TestCorrelatedFixesCountOnce: a robot standing still gets 50 position
// fixes at 10 Hz that all carry the same 10 cm error, the limit of an
// error correlated over much longer than the run. Configured as white
// noise, the filter believes the fixes average out: its x variance falls
// to about R/50 and the true error stands at several standard deviations.
// Configured with 90% of the covariance correlated over 100 s, the fixes
// count about once for their correlated part: the variance stays near
// 0.9 R and the error within two standard deviations.
func TestCorrelatedFixesCountOnce(t *testing.T) {
	const sigma, offset = 0.1, 0.1
	cov := []float64{sigma * sigma, 0, 0, sigma * sigma}
	run := func(s fusion.Sensor) (errStd float64) {
		r, err := fusion.New(fusion.Config{Sensors: []fusion.Sensor{s}, StartCov: []float64{1, 0, 0, 0, 1, 0, 0, 0, 0.01}})
		if err != nil {
			t.Fatal(err)
		}
		for k := int64(0); k < 500; k++ {
			var step estimator.Step
			r.AddOdometry(fusion.Odometry{StartNs: k * 10e6, StampNs: (k + 1) * 10e6, Step: &step})
			if k%10 == 9 {
				if res := r.AddFix(fusion.Fix{SensorID: "gnss", StampNs: (k + 1) * 10e6, Kind: fusion.FixPosition, XM: offset}); res.Verdict != fusion.VerdictApplied {
					t.Fatalf("fix %d: %v %v", k, res.Verdict, res.Err)
				}
			}
		}
		p := r.Pose()
		return math.Abs(p.Pose.X) / math.Sqrt(p.Cov[0])
	}
	white := run(fusion.Sensor{ID: "gnss", Kind: fusion.FixPosition, Cov: cov})
	corr := run(fusion.Sensor{ID: "gnss", Kind: fusion.FixPosition, Cov: cov, CorrelationTimeS: 100, CorrelatedFraction: 0.9})
	t.Logf("true x error in standard deviations: white model %.2f, correlated model %.2f", white, corr)
	if white < 4 || corr > 2 {
		t.Errorf("error/std: white model %.2f (want at least 4), correlated model %.2f (want at most 2)", white, corr)
	}
}
