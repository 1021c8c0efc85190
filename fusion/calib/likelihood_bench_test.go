package calib

import (
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// tenMinutes is the benchmarks' run: ten simulated minutes of the
// greenhouse cart (free wheels and an absolute IMU at 200 and 100 Hz, a
// pose camera at 10 Hz; 186,000 inputs), with its configuration's levels
// three times off.
func tenMinutes() (off fusion.Config, inputs []RecordedInput, x []float64, p *replayer) {
	s, inputs := recorded(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 1, IMU: true, DurationS: 600})
	off, levels, _ := offBy3(s.Config())
	p = newReplayer(off, inputs, levels)
	x = make([]float64, len(levels))
	for i, l := range levels {
		x[i] = l.Value(&p.base)
	}
	return off, inputs, x, p
}

// BenchmarkLikelihoodReplay is one replay of a ten-minute run and its
// log-likelihood: the unit of a noise fit's cost (a fit takes some 130 to
// 200 of them).
func BenchmarkLikelihoodReplay(b *testing.B) {
	_, _, x, p := tenMinutes()
	b.ReportAllocs()
	for b.Loop() {
		if _, _, err := p.logLik(x); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkNoiseFit10Min is the whole noise fit of a ten-minute run whose
// levels start three times off (target: 60 s on one core).
func BenchmarkNoiseFit10Min(b *testing.B) {
	off, inputs, _, _ := tenMinutes()
	b.ReportAllocs()
	for b.Loop() {
		fit, err := FitNoise(off, inputs, NoiseFitOptions{})
		if err != nil {
			b.Fatal(err)
		}
		b.ReportMetric(float64(fit.Replays), "replays")
	}
}
