package fusion_test

import (
	"math"
	"math/rand/v2"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// scrubDrive drives a differential drive (wheels 0.4 m apart) straight at
// 0.5 m/s for durS seconds, its wheels' travel a Brownian path drawn at
// 5 kHz with wheelVar m^2 per metre, sampled at hz, and returns the
// heading variance at the end. The path is drawn once per seed, so every
// rate sees the same wheels.
func scrubDrive(t *testing.T, seed uint64, hz int64, durS, wheelVar, scrubVar float64) float64 {
	t.Helper()
	cfg := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn}.Config()
	cfg.Noise.WheelVarM2PerM, cfg.Noise.TurnVarRad2PerRad = wheelVar, scrubVar
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	const fineHz, v = 5000, 0.5
	rng := rand.New(rand.NewPCG(seed, 7))
	per := fineHz / hz
	travel := make([]float64, 2)
	var start int64
	for k := int64(1); k <= int64(durS*fineHz); k++ {
		for i := range travel {
			d := v / fineHz
			travel[i] += d + rng.NormFloat64()*math.Sqrt(wheelVar*d)
		}
		if k%per != 0 {
			continue
		}
		stamp := k * 1e9 / fineHz
		res := r.AddOdometry(fusion.Odometry{StartNs: start, StampNs: stamp, TravelM: travel})
		if res.Verdict != fusion.VerdictApplied {
			t.Fatal(res.Err)
		}
		start, travel = stamp, []float64{0, 0}
	}
	return r.Pose().Cov[8]
}

// TestScrubRateInvariant: on a straight drive the wheels' noise makes the
// reported turn of each interval nonzero; the scrub in turns must not turn
// that into heading variance that grows with the sampling rate ("Design:
// Process noise"). The scrub's share of the heading variance (the variance
// with scrub less the variance with almost none, on the same wheels) is
// compared at 50 and 500 Hz, and at 500 Hz against the closed form of
// what a block of 0.25 s charges on a straight: the peak of the absolute
// value of the turn noise's random walk over the block, whose mean for a
// Brownian motion of standard deviation s at time T is sqrt(pi/2) s
// sqrt(T) (from memory; a walk sampled n times lies below it by about
// 0.58 s sqrt(T/n), Siegmund's correction, from memory). When each
// interval charged the absolute value of its own turn, the share grew as
// the square root of the rate: 3.2 times from 50 to 500 Hz.
func TestScrubRateInvariant(t *testing.T) {
	const durS, wheelVar, scrubVar = 100, 1e-4, 1e-3
	// Turn noise per second: two wheels, each wheelVar per metre at 0.5 m/s,
	// over a track of 0.4 m.
	turnVarPerS := 2 * wheelVar * 0.5 / (0.4 * 0.4)
	blockS := 0.25
	want := math.Sqrt(math.Pi/2) * math.Sqrt(turnVarPerS*blockS) * durS / blockS // rad charged over the drive
	var at50, at500 float64
	for seed := uint64(1); seed <= 4; seed++ {
		for _, hz := range []int64{50, 500} {
			share := (scrubDrive(t, seed, hz, durS, wheelVar, scrubVar) - scrubDrive(t, seed, hz, durS, wheelVar, 1e-12)) / scrubVar
			if hz == 50 {
				at50 += share / 4
			} else {
				at500 += share / 4
			}
		}
	}
	t.Logf("scrub charged on a straight: %.3f rad at 50 Hz, %.3f rad at 500 Hz, %.3f for a continuous walk", at50, at500, want)
	if ratio := at500 / at50; ratio < 1 || ratio > 1.2 {
		t.Errorf("the scrub's heading variance at 500 Hz is %.3f times that at 50 Hz; want 1 to 1.2 (the walk's peak, sampled finer)", ratio)
	}
	// 125 samples a block at 500 Hz: Siegmund's correction puts the mean
	// 4% below the continuous walk's.
	if f := at500 / want; f < 0.9 || f > 1.02 {
		t.Errorf("at 500 Hz the scrub charged %.3f of the closed form's %.3f rad; want 0.9 to 1.02", f, want)
	}
}
