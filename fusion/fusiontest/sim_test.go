package fusiontest

import (
	"math"
	"reflect"
	"testing"

	"reckon.example/estimator"
)

// TestDeterministic: a seed gives the same run.
func TestDeterministic(t *testing.T) {
	sc := Scenario{Layout: FreeWheelTurn, IMU: true, Seed: 5, DurationS: 10, OutlierFraction: 0.1, SlipPerS: 0.5}
	a, b := New(sc), New(sc)
	for n := 0; ; n++ {
		x, okx := a.Next()
		y, oky := b.Next()
		if okx != oky || !reflect.DeepEqual(x, y) {
			t.Fatalf("input %d differs", n)
		}
		if !okx {
			break
		}
	}
}

// TestArrivalOrderAndTruth: inputs come in arrival order, and noise-free
// wheel travels, solved and composed, reproduce the truth exactly (the
// simulator and the estimator share the arc model).
func TestArrivalOrderAndTruth(t *testing.T) {
	for _, l := range []Layout{FreeWheelTurn, GyroTurn, DriveWheelTurn} {
		s := New(Scenario{Layout: l, NoiseFree: true, DurationS: 60, IMU: true})
		cfg := s.Config()
		var last int64
		pose := estimator.Pose{}
		var prevIMU *float64
		for {
			in, ok := s.Next()
			if !ok {
				break
			}
			if in.ArrivalNs < last {
				t.Fatalf("%v: arrival %d after %d", l, in.ArrivalNs, last)
			}
			last = in.ArrivalNs
			if in.Odometry == nil {
				continue
			}
			var rows []estimator.Row
			for i, w := range cfg.Wheels {
				rows = append(rows, estimator.Row{Coef: estimator.WheelCoef(w.XM, w.YM, w.DirectionRad), Value: in.Odometry.TravelM[i]})
			}
			if cfg.NoSideSlip {
				rows = append(rows, estimator.Row{Coef: estimator.LeftCoef()})
			}
			if in.Odometry.IMUHeadingRad != nil {
				if prevIMU == nil {
					prevIMU = in.Odometry.IMUHeadingRad
					pose = in.Truth
					continue
				}
				rows = append(rows, estimator.Row{Coef: estimator.TurnCoef(), Value: estimator.Wrap(*in.Odometry.IMUHeadingRad - *prevIMU)})
				prevIMU = in.Odometry.IMUHeadingRad
			}
			var sol estimator.StepSolution
			if err := estimator.SolveStep(rows, 1e-12, &sol); err != nil {
				t.Fatal(err)
			}
			pose = estimator.Advance(pose, sol.Step)
			if d := math.Hypot(pose.X-in.Truth.X, pose.Y-in.Truth.Y); d > 1e-9 {
				t.Fatalf("%v: dead reckoning %+v, truth %+v", l, pose, in.Truth)
			}
		}
		if pose.X == 0 {
			t.Errorf("%v: the cart did not move", l)
		}
	}
}

// TestGyroNoisePerRadian: the gyro-turn layout's IMU heading errs by a
// random walk per radian turned, the filter's model of an IMU turn row
// ("Design: Process noise"): over every odometry interval the change of the
// heading error (reading less truth) has variance imu_turn_var_rad2_per_rad
// times the angle turned, plus the IMU offset's random walk over the
// interval (the heading's own random walk and scrub the IMU sees too).
// Summed over the intervals of 20 runs of 60 s (about 240,000),
// the squared changes over their modelled variances average 1 within 2%
// (the mean of N chi-square variates of 1 degree of freedom has standard
// deviation sqrt(2/N), common practice). A reading noise drawn afresh per
// sample, as the simulator had (1 mrad), gives 3,200.
func TestGyroNoisePerRadian(t *testing.T) {
	var sum float64
	var n int
	for seed := uint64(0); seed < 20; seed++ {
		s := New(Scenario{Layout: GyroTurn, Seed: seed, DurationS: 60})
		rate := s.Config().Noise.IMUTurnVarRad2PerRad
		var prevErr, prevHead float64
		var prevT int64
		first := true
		for in, ok := s.Next(); ok; in, ok = s.Next() {
			o := in.Odometry
			if o == nil || o.IMUHeadingRad == nil {
				continue
			}
			e := estimator.Wrap(*o.IMUHeadingRad - in.Truth.Heading)
			if !first {
				// The truth's heading also walks (2e-5 rad per interval);
				// below 1e-4 rad the cart is not turning and the gyro adds
				// nothing.
				turn := math.Abs(estimator.Wrap(in.Truth.Heading - prevHead))
				if turn < 1e-4 {
					turn = 0
				}
				v := rate*turn + imuOffsetVarRad2PerS*float64(o.StampNs-prevT)*1e-9
				d := estimator.Wrap(e - prevErr)
				sum += d * d / v
				n++
			}
			prevErr, prevHead, prevT, first = e, in.Truth.Heading, o.StampNs, false
		}
	}
	ratio := sum / float64(n)
	t.Logf("%d intervals: squared error changes over their modelled variance, mean %.3f", n, ratio)
	if math.Abs(ratio-1) > 0.02 {
		t.Errorf("mean ratio %.3f over %d intervals, want 1 within 0.02", ratio, n)
	}
}

// TestPoseFixesNameMarkers: with NamePoseMarkers, the demo's run (70 s
// up and down the aisles) names on each pose fix the nearest post in the
// camera's view, within 5 m and 1 rad of its axis at the fix's true pose,
// and none where no post is in view; every other value, and the run
// without it, is the same, draw for draw.
func TestPoseFixesNameMarkers(t *testing.T) {
	sc := Scenario{Layout: FreeWheelTurn, IMU: true, Counts: true, Seed: 1, DurationS: 70, OutlierFraction: 0.05, SlipPerS: 0.02}
	named := sc
	named.NamePoseMarkers = true
	a, b := New(sc), New(named)
	var withName, without int
	eachPair(t, a, b, func(n int, x, y Input) {
		if y.Fix == nil {
			if !reflect.DeepEqual(x, y) {
				t.Fatalf("input %d differs", n)
			}
			return
		}
		f := *y.Fix
		f.Marker = ""
		if x.Fix == nil || !reflect.DeepEqual(*x.Fix, f) {
			t.Fatalf("input %d: fix %+v, without names %+v", n, *y.Fix, x.Fix)
		}
		cam := estimator.Compose(y.Truth, CameraMount())
		nearest, nearestR := "", math.Inf(1)
		for _, m := range Markers() {
			r := math.Hypot(m.XM-cam.X, m.YM-cam.Y)
			if b := estimator.Wrap(math.Atan2(m.YM-cam.Y, m.XM-cam.X) - cam.Heading); r <= 5 && math.Abs(b) < 1 && r < nearestR {
				nearest, nearestR = m.ID, r
			}
		}
		if y.Fix.Marker != nearest {
			t.Errorf("fix at %d ns names %q, the nearest post in view is %q", y.Fix.StampNs, y.Fix.Marker, nearest)
		}
		if nearest != "" {
			withName++
		} else {
			without++
		}
	})
	t.Logf("%d pose fixes name a post, %d none", withName, without)
	if withName < 50 || without < 50 {
		t.Errorf("%d pose fixes name a post, %d none: the run shows too little", withName, without)
	}
}

// eachPair hands fn the inputs of a and b in step, and fails when one run
// ends before the other.
func eachPair(t *testing.T, a, b *Sim, fn func(n int, x, y Input)) {
	t.Helper()
	for n := 0; ; n++ {
		x, okx := a.Next()
		y, oky := b.Next()
		if okx != oky {
			t.Fatalf("input %d: one run ended", n)
		}
		if !okx {
			return
		}
		fn(n, x, y)
	}
}
