package estimator

import (
	"math/rand/v2"
	"testing"
)

func BenchmarkPredict(b *testing.B) {
	f := randomFilter(b, rand.New(rand.NewPCG(11, 11)), 4)
	cu := [9]float64{1e-6, 0, 0, 0, 1e-6, 0, 0, 0, 1e-6}
	q := [4]float64{0, 0, 1e-8, 1e-8}
	u := Step{0.0025, 0, 0.001}
	b.ReportAllocs()
	for b.Loop() {
		f.Predict(u, &cu, &q)
	}
}

func BenchmarkUpdate(b *testing.B) {
	for _, m := range measurementCases(rand.New(rand.NewPCG(12, 12))) {
		b.Run(m.Kind.String(), func(b *testing.B) {
			f := randomFilter(b, rand.New(rand.NewPCG(13, 13)), 4)
			start := f.State()
			b.ReportAllocs()
			for b.Loop() {
				f.SetState(&start)
				_, _ = f.Update(&m, NoGate())
			}
		})
	}
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
