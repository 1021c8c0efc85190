package fusion_test

import (
	"math"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// benchRobot returns a robot with a full window at 200 Hz odometry and the
// travel of one 5 ms sample.
func benchRobot(b *testing.B) (*fusion.Robot, []float64) {
	cfg := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true}.Config()
	r, err := fusion.New(cfg)
	if err != nil {
		b.Fatal(err)
	}
	tr := []float64{0.002, 0.0021, 0.00005}
	return r, tr
}

// BenchmarkLateFix: at 200 Hz odometry (and 100 Hz IMU), one camera fix
// arriving 150 ms late, inserted and replayed. Each iteration also appends
// the 5 ms of odometry (and every other iteration the IMU sample) that keep
// the window moving; BenchmarkOdometry measures those alone.
func BenchmarkLateFix(b *testing.B) {
	r, tr := benchRobot(b)
	var k int64
	feed := func() {
		r.AddOdometry(fusion.Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: tr})
		if k%2 == 0 {
			r.AddHeading(fusion.Heading{StampNs: (k+1)*5e6 + 2e6, HeadingRad: 0.7})
		}
		k++
	}
	for k < 400 {
		feed()
	}
	b.ReportAllocs()
	for b.Loop() {
		feed()
		p, _ := r.PoseAt((k - 30) * 5e6)
		cam := estimator.Compose(p.Pose, fusiontest.CameraMount())
		r.AddFix(fusion.Fix{StampNs: (k-30)*5e6 + 1e6, SensorID: "camera", Kind: fusion.FixPose, XM: cam.X, YM: cam.Y, HeadingRad: cam.Heading,
			Cov: []float64{9e-4, 0, 0, 0, 9e-4, 0, 0, 0, 4e-4}})
	}
}

// BenchmarkOdometry: one 200 Hz odometry sample and half an IMU sample, the
// per-iteration overhead of BenchmarkLateFix.
func BenchmarkOdometry(b *testing.B) {
	r, tr := benchRobot(b)
	var k int64
	b.ReportAllocs()
	for b.Loop() {
		r.AddOdometry(fusion.Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: tr})
		if k%2 == 0 {
			r.AddHeading(fusion.Heading{StampNs: (k+1)*5e6 + 2e6, HeadingRad: 0.7})
		}
		k++
	}
}

// BenchmarkHour runs one hour of the greenhouse cart (200 Hz odometry,
// 100 Hz IMU, 10 Hz camera fixes 50 to 200 ms late, 5% outliers) through
// fusion; the samples are generated beforehand, outside the timing. Case
// "all-options" configures the robot with every option of the sensors
// section and the calibration on (allOptions: 10 states).
func BenchmarkHour(b *testing.B) {
	s := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 9, DurationS: 3600, OutlierFraction: 0.05})
	base := s.Config()
	var ins []fusiontest.Input
	for {
		in, ok := s.Next()
		if !ok {
			break
		}
		ins = append(ins, in)
	}
	benchRuns(b, ins, []benchCase{{"plain", base}, {"all-options", allOptions(base)}}, func(b *testing.B) {
		b.ReportMetric(float64(len(ins)), "samples/op")
	})
}

// benchCase is one configuration a benchmark runs the same inputs under.
type benchCase struct {
	name string
	cfg  fusion.Config
}

// benchRuns runs the inputs through a new robot of each case's
// configuration per iteration, as a sub-benchmark each, and reports with
// report at its end.
func benchRuns(b *testing.B, ins []fusiontest.Input, cases []benchCase, report func(*testing.B)) {
	for _, c := range cases {
		b.Run(c.name, func(b *testing.B) {
			b.ReportAllocs()
			for b.Loop() {
				r, _ := fusion.New(c.cfg)
				for i := range ins {
					fusiontest.Feed(r, &ins[i])
				}
				if p := r.Pose(); math.IsNaN(p.Pose.X) {
					b.Fatal("NaN")
				}
			}
			report(b)
		})
	}
}

// BenchmarkLandmarkTenMinutes runs ten minutes of the cart driving among 16
// aisle markers 3 cm off their map (200 Hz odometry, 100 Hz IMU, 10 Hz
// landmark fixes 50 to 200 ms late) through fusion: "exact-map" takes the
// map as exact (4 states), "survey" declares the survey error (three
// landmark blocks: 10 states), the cost of the blocks per sample.
func BenchmarkLandmarkTenMinutes(b *testing.B) {
	sc := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, MarkerCount: 16, Seed: 9, DurationS: 600,
		Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}}
	s := fusiontest.New(sc)
	exact := s.Config()
	survey := exact
	survey.LandmarkPositionStdM = 0.03
	var ins []fusiontest.Input
	for {
		in, ok := s.Next()
		if !ok {
			break
		}
		ins = append(ins, in)
	}
	benchRuns(b, ins, []benchCase{{"exact-map", exact}, {"survey", survey}}, func(b *testing.B) {
		b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*len(ins)), "ns/sample")
	})
}

// BenchmarkOrchardCarry: the orchard carrier (orchardsim_test.go) for 150
// s, once with every error process but the outage and a carry of 6 to 12
// s to another row (every range-and-bearing fix of the carry refused and
// tried for a relocation, fusion/relocate.go), and once without the carry.
// The difference is what a carry costs the robot.
func BenchmarkOrchardCarry(b *testing.B) {
	for _, kidnap := range []bool{false, true} {
		name := "working"
		if kidnap {
			name = "carried"
		}
		b.Run(name, func(b *testing.B) {
			e := ocAllErrors()
			e.kidnap, e.outage = kidnap, false
			run := ocSimulate(500, 150, e)
			cfg := ocConfig(&run)
			b.ReportAllocs()
			b.ResetTimer()
			for b.Loop() {
				if _, err := ocRunOne(500, &run, cfg); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
