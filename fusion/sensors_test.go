package fusion_test

import (
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
