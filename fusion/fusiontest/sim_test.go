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
