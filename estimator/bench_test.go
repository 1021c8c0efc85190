package estimator

import (
	"math/rand/v2"
	"testing"
)

// BenchmarkPredict runs Predict on 4 states and on 7 (IMU offset, odometry
// scales and heading-rate bias), as a step from the wheels (PredictReported,
// whose report carries the step's noise: with the turn scale it also moves
// the errors-in-variables moments).
func BenchmarkPredict(b *testing.B) {
	for _, n := range []int{4, 7} {
		b.Run(benchName(n), func(b *testing.B) {
			f := randomFilter(b, rand.New(rand.NewPCG(11, 11)), n)
			cu := [9]float64{1e-6, 0, 0, 0, 1e-6, 0, 0, 0, 1e-6}
			q := [MaxStates]float64{IHead: 1e-8, IOffset: 1e-8}
			u := Step{0.0025, 0, 0.001}
			b.ReportAllocs()
			for b.Loop() {
				f.PredictReported(u, &cu, &cu, 0.005, &q)
			}
		})
	}
}

// BenchmarkUpdate runs every measurement kind on 4 states and on 7 (with
// the turn scale's errors-in-variables moments, as wheel odometry leaves
// them).
func BenchmarkUpdate(b *testing.B) {
	for _, n := range []int{4, 7} {
		for _, m := range measurementCases(rand.New(rand.NewPCG(12, 12))) {
			b.Run(benchName(n)+"/"+m.Kind.String(), func(b *testing.B) {
				f := randomFilter(b, rand.New(rand.NewPCG(13, 13)), n)
				start := f.State()
				if f.Layout().TurnScale() >= 0 {
					// The errors-in-variables moments of wheel odometry.
					start.SetEIV(EIVMoments{-1e-9, 2e-10, -3e-9, 0, 2e-10, -1e-9, 1e-9, 0, -3e-9, 1e-9, -4e-8})
				}
				b.ReportAllocs()
				for b.Loop() {
					f.SetState(&start)
					_, _ = f.Update(&m, NoGate())
				}
			})
		}
	}
}

func benchName(n int) string {
	if n == 4 {
		return "states=4"
	}
	return "states=7"
}

func BenchmarkSolveStep(b *testing.B) {
	rows := []Row{
		{Coef: WheelCoef(0, 0.15, 0), Value: 0.0024, Var: 2.4e-7},
		{Coef: WheelCoef(0, -0.15, 0), Value: 0.0026, Var: 2.6e-7},
		{Coef: WheelCoef(-0.1, 0, 1.5707963267948966), Value: -0.0001, Var: 1e-8},
	}
	var sol StepSolution
	b.ReportAllocs()
	for b.Loop() {
		_ = SolveStep(rows, 1e-12, &sol)
	}
}
