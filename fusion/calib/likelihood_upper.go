package calib

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/stat/distuv"
)

// This file sets the variances a run does not determine. DEVELOPERS.md,
// "Design: Noise by likelihood", has the argument.

// intervalDrop is how far the log-likelihood falls from its best at the
// ends of a 95% likelihood interval of one level: half the chi-square
// quantile of one degree of freedom at 0.95, 1.92 (the likelihood-ratio
// interval; S. S. Wilks, Annals of Mathematical Statistics 9(1), 1938).
var intervalDrop = distuv.ChiSquared{K: 1}.Quantile(0.95) / 2

// upperStepLog is the step of upperEnd's walk in the log of a level (a
// factor of 2), and upperMaxSteps how far it walks up (2^20) before it
// says the run bounds the level nowhere; upperMaxDown how far it first
// walks down to find the best value along the level (2^-6).
const (
	upperStepLog  = math.Ln2
	upperMaxSteps = 20
	upperMaxDown  = 6
)

// raisesWhenUndetermined says whether a level is a variance, set to the
// upper end of its interval when the run does not determine it: a process
// noise term, a sensor's covariance factor or the map's survey error. The filter's covariance
// does not decrease as any of them grows (the Riccati recursion is
// monotone in Q and R), so the upper end is the cautious side. A
// correlation time or degrees of freedom have no such side and are kept.
func (l NoiseLevel) raisesWhenUndetermined() bool {
	return l.kind == levelNoise || l.kind == levelCovScale || l.kind == levelSurvey
}

// raiseUndetermined sets each variance level of levels that the run does
// not determine (raisesWhenUndetermined, not Identifiable) to the upper
// end of its 95% likelihood interval along it (upperEnd), the other levels
// held at x; a level the run bounds nowhere keeps its value. It writes x
// and levels (Fitted, Hi, Raised, Note).
func (p *replayer) raiseUndetermined(obj func([]float64) float64, x []float64, levels []FittedLevel) {
	for i := range levels {
		l := &levels[i]
		if l.Identifiable || l.Raised || l.Matched || !l.raisesWhenUndetermined() {
			continue
		}
		hi, best, ok := p.upperEnd(obj, x, i)
		if !ok {
			l.Note += fmt.Sprintf("; the log-likelihood does not fall by %.2f up to %.0f times it: kept", intervalDrop, math.Exp(upperMaxSteps*upperStepLog))
			continue
		}
		l.Note += fmt.Sprintf("; set to the upper end of its 95%% likelihood interval, where the log-likelihood along it lies %.2f below its best (at %.4g): set low, a variance the run does not determine makes the covariance overconfident",
			intervalDrop, best)
		x[i], l.Fitted, l.Hi, l.Raised = hi, hi, hi, true
	}
}

// upperEnd walks along level i of x alone in steps of upperStepLog: down
// from x while minus the log-likelihood falls by more than intervalDrop/4
// a step (to find its best value along the level), then up until it lies
// intervalDrop above the best seen at two points in a row (the likelihood
// is rough on small scales: a slip test or gate flipping). The upper end
// is where it crosses best + intervalDrop between the last point within
// and the first beyond: three bisections in the log, then linear
// interpolation. It returns the upper end and the best value along the
// level, or false when the walk found no such point (or the likelihood
// does not change at all along the level up to 8 times its start).
func (p *replayer) upperEnd(obj func([]float64) float64, x []float64, i int) (hi, best float64, ok bool) {
	y := make([]float64, len(x))
	for j, v := range x {
		y[j] = math.Log(v)
	}
	y0 := y[i]
	at := func(u float64) float64 {
		y[i] = y0 + u
		f := obj(y)
		if math.IsNaN(f) {
			f = math.Inf(1) // an invalid configuration lies beyond
		}
		return f
	}
	grid := map[int]float64{} // minus the log-likelihood at y0 + k upperStepLog
	step := func(k int) float64 {
		if f, ok := grid[k]; ok {
			return f
		}
		grid[k] = at(float64(k) * upperStepLog)
		return grid[k]
	}
	k := 0
	for range upperMaxDown {
		if !(step(k-1) < step(k)-intervalDrop/4) {
			break
		}
		k--
	}
	kBest := k
	beyond := 0
	for top := k + upperMaxSteps; k < top && beyond < 2; {
		k++
		g := step(k)
		if k >= 3 && g == grid[0] && grid[1] == grid[0] && grid[2] == grid[0] {
			// Exactly the same at 8 times the start: the level changes
			// nothing in the run (a sensor without fixes).
			return 0, 0, false
		}
		if g < grid[kBest] {
			kBest = k
		}
		if g-grid[kBest] <= intervalDrop {
			beyond = 0
		} else {
			beyond++
		}
	}
	if beyond < 2 {
		return 0, 0, false
	}
	// The best along the level lies between grid points: the vertex of the
	// parabola through the best and points half a step either side (at
	// most intervalDrop below the best point, the likelihood being rough).
	fBest := grid[kBest]
	uBest := float64(kBest) * upperStepLog
	if fl, fu := at(uBest-upperStepLog/2), at(uBest+upperStepLog/2); !math.IsInf(fl, 1) && !math.IsInf(fu, 1) {
		a, b := (fu-2*fBest+fl)/2, (fu-fl)/2 // per half step
		if a > 0 {
			d := math.Max(-1, math.Min(1, -b/(2*a)))
			fBest = math.Max(fBest-intervalDrop, min(fBest, fl, fu, fBest-b*b/(4*a)))
			uBest += d * upperStepLog / 2
		}
	}
	// The first grid point above the best beyond the interval, and the
	// one below it.
	kOut := kBest + 1
	for grid[kOut]-fBest <= intervalDrop {
		kOut++
	}
	uIn, fIn := float64(kOut-1)*upperStepLog, grid[kOut-1]
	uOut, fOut := float64(kOut)*upperStepLog, grid[kOut]
	for range 3 {
		m := (uIn + uOut) / 2
		if g := at(m); g-fBest <= intervalDrop {
			uIn, fIn = m, g
		} else {
			uOut, fOut = m, g
		}
	}
	t := 1.0
	if !math.IsInf(fOut, 1) && fOut > fIn {
		t = math.Max(0, math.Min(1, (fBest+intervalDrop-fIn)/(fOut-fIn)))
	}
	return math.Exp(y0 + uIn + t*(uOut-uIn)), math.Exp(y0 + uBest), true
}
