package calib

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat"

	"reckon.example/estimator"
)

// Slopes of the log-log Allan deviation plot of each noise term (IEEE Std
// 952-1997, Annex C).
const (
	slopeQ = -1.0
	slopeN = -0.5
	slopeB = 0.0
	slopeK = 0.5
)

// The constants of the terms' Allan deviations (IEEE Std 952-1997, Annex
// C): sigma(tau) = sqrt(3) Q / tau, N / sqrt(tau), about 0.664 B on the flat
// part (sqrt(2 ln 2 / pi)), K sqrt(tau / 3).
var (
	gainQ = math.Sqrt(3)
	gainB = math.Sqrt(2 * math.Ln2 / math.Pi)
	gainK = 1 / math.Sqrt(3)
)

const (
	// minSpan is the least ratio of a segment's last to first tau: half a
	// decade, so that a few noisy points do not make a term.
	minSpan = 3.0
	// maxRelErr bounds the relative error of a point used in the fit,
	// 1 / sqrt(2 (n/m - 1)) (IEEE Std 952-1997, Annex C, from memory): with
	// 0.25, clusters up to about a ninth of the record.
	maxRelErr = 0.25
)

// ErrTooShort marks a recording too short for an Allan deviation.
var ErrTooShort = errors.New("recording too short")

// ErrIrregular marks a recording whose samples are not at a fixed interval.
var ErrIrregular = errors.New("samples not at a fixed interval")

// Term is one noise term read from the Allan deviation.
type Term struct {
	// Coef is the coefficient: Q in rad, N in rad/sqrt(s), B in rad/s, K in
	// rad/s^1.5 (for a rate in rad/s).
	Coef float64
	// Found says that the plot has a segment of the term's slope (for B, a
	// flat minimum); B's Coef is the minimum over 0.664 even without it, an
	// upper bound then.
	Found bool
	// FromS and ToS bound the segment used, seconds of tau; Points counts
	// its points.
	FromS, ToS float64
	Points     int
	// Slope is the least-squares slope of log dev against log tau over the
	// segment, for comparison with the term's own.
	Slope float64
}

// Noise is what Fit reads from an Allan deviation.
type Noise struct {
	// Q is reading (quantization) noise, N angle random walk, B bias
	// instability, K rate random walk.
	Q, N, B, K Term
}

// Fit reads the noise terms from an Allan deviation computed from n
// samples (the points ascending in tau, from AllanDeviation), using the
// points whose relative error is at most 0.25.
//
// The terms add in variance (IEEE Std 952-1997, Annex C):
//
//	sigma^2(tau) = 3 Q^2 / tau^2 + N^2 / tau + (2 ln 2 / pi) B^2 + K^2 tau / 3
//
// A first non-negative least-squares fit of this sum, in relative error
// weighted by each point's inverse squared relative error, tells which term
// dominates where. A term's segment is the longest run of points where it
// dominates; it is found when that run spans half a decade of tau. Its
// coefficient is then fitted on its segment alone, with its slope fixed,
// after subtracting the other terms of the first fit: weighted least
// squares of log dev = log(c) + slope * log tau. B is the minimum deviation
// over 0.664, as the standard reads it; found when B dominates half a decade
// of tau, an upper bound otherwise.
func Fit(pts []Point, n int) Noise {
	var use []Point
	for _, p := range pts {
		if relErr(p, n) <= maxRelErr {
			use = append(use, p)
		}
	}
	var nz Noise
	if len(use) < 3 {
		return nz
	}
	coef := jointFit(use, n)
	// contrib is term j's variance at tau in the joint fit.
	contrib := func(j int, tau float64) float64 { return coef[j] * math.Pow(tau, varSlopes[j]) }
	dominant := make([]int, len(use))
	for i, p := range use {
		for j := range varSlopes {
			if contrib(j, p.TauS) > contrib(dominant[i], p.TauS) {
				dominant[i] = j
			}
		}
	}
	terms := []*Term{&nz.Q, &nz.N, &nz.B, &nz.K}
	for j, t := range terms {
		from, to := longestRun(use, dominant, j)
		if from < 0 {
			continue
		}
		seg := use[from:to]
		*t = Term{Found: true, FromS: seg[0].TauS, ToS: seg[len(seg)-1].TauS, Points: len(seg)}
		if j == iB {
			continue
		}
		t.Slope = freeSlope(seg, n)
		others := func(tau float64) float64 {
			var v float64
			for k := range varSlopes {
				if k != j {
					v += contrib(k, tau)
				}
			}
			return v
		}
		t.Coef = fixedSlope(seg, n, varSlopes[j]/2, others) / gains[j]
	}
	k := 0
	for i, p := range use {
		if p.Dev < use[k].Dev {
			k = i
		}
	}
	nz.B.Coef = use[k].Dev / gainB
	return nz
}

// The terms in the order of varSlopes and gains.
const (
	iQ = iota
	iN
	iB
	iK
)

// varSlopes are the terms' slopes in the log-log plot of the Allan
// variance; gains the factors of their Allan deviations (IEEE Std 952-1997,
// Annex C): sigma = sqrt(3) Q / tau, N / sqrt(tau), 0.664 B, K sqrt(tau / 3).
var (
	varSlopes = [4]float64{2 * slopeQ, 2 * slopeN, 2 * slopeB, 2 * slopeK}
	gains     = [4]float64{gainQ, 1, gainB, gainK}
)

// jointFit fits the Allan variance of pts by the sum of the four terms with
// non-negative coefficients (each term's variance at tau = 1 s), minimising
// the weighted squared relative error; a term fitted negative is dropped and
// the rest fitted again (an active set, Lawson and Hanson, Solving Least
// Squares Problems, 1974, ch. 23, in its simplest form).
func jointFit(pts []Point, n int) [4]float64 {
	active := []int{iQ, iN, iB, iK}
	for len(active) > 0 {
		a := mat.NewDense(len(pts), len(active), nil)
		b := mat.NewVecDense(len(pts), nil)
		norms := make([]float64, len(active))
		for i, p := range pts {
			w := 1 / relErr(p, n)
			s2 := p.Dev * p.Dev
			for c, j := range active {
				v := w * math.Pow(p.TauS, varSlopes[j]) / s2
				a.Set(i, c, v)
				norms[c] += v * v
			}
			b.SetVec(i, w)
		}
		// Columns scaled to unit norm: the terms differ by orders of
		// magnitude over a few decades of tau.
		for c := range active {
			norms[c] = math.Sqrt(norms[c])
			for i := range pts {
				a.Set(i, c, a.At(i, c)/norms[c])
			}
		}
		var x mat.VecDense
		if err := x.SolveVec(a, b); err != nil {
			return [4]float64{}
		}
		worst := -1
		for c := range active {
			if x.AtVec(c) < 0 && (worst < 0 || x.AtVec(c) < x.AtVec(worst)) {
				worst = c
			}
		}
		if worst < 0 {
			var coef [4]float64
			for c, j := range active {
				coef[j] = x.AtVec(c) / norms[c]
			}
			return coef
		}
		active = append(active[:worst], active[worst+1:]...)
	}
	return [4]float64{}
}

// relErr is the relative error of a point's deviation, 1 / sqrt(2 (n/m -
// 1)) (IEEE Std 952-1997, Annex C, from memory).
func relErr(p Point, n int) float64 {
	r := float64(n)/float64(p.M) - 1
	if r <= 0 {
		return math.Inf(1)
	}
	return 1 / math.Sqrt(2*r)
}

// longestRun returns the longest run [from, to) of points where term j
// dominates, if it spans minSpan, or -1.
func longestRun(pts []Point, dominant []int, j int) (from, to int) {
	from, to = -1, -1
	best := 0.0
	for i := 0; i < len(pts); {
		if dominant[i] != j {
			i++
			continue
		}
		k := i
		for k < len(pts) && dominant[k] == j {
			k++
		}
		if span := pts[k-1].TauS / pts[i].TauS; span >= minSpan && span > best {
			from, to, best = i, k, span
		}
		i = k
	}
	return from, to
}

// fixedSlope fits dev = c * tau^slope over pts by weighted least squares in
// logs and returns c; others, if not nil, is a variance subtracted first
// (points left without a positive variance are skipped).
func fixedSlope(pts []Point, n int, slope float64, others func(tau float64) float64) float64 {
	var sum, wsum float64
	for _, p := range pts {
		v := p.Dev * p.Dev
		if others != nil {
			v -= others(p.TauS)
		}
		if v <= 0 {
			continue
		}
		e := relErr(p, n)
		w := 1 / (e * e)
		sum += w * (0.5*math.Log(v) - slope*math.Log(p.TauS))
		wsum += w
	}
	if wsum == 0 {
		return 0
	}
	return math.Exp(sum / wsum)
}

// freeSlope is the weighted least-squares slope of log dev against log tau.
func freeSlope(pts []Point, n int) float64 {
	x := make([]float64, len(pts))
	y := make([]float64, len(pts))
	w := make([]float64, len(pts))
	for i, p := range pts {
		x[i], y[i] = math.Log(p.TauS), math.Log(p.Dev)
		e := relErr(p, n)
		w[i] = 1 / (e * e)
	}
	_, beta := stat.LinearRegression(x, y, w, false)
	return beta
}

// IMUTerms are the robot configuration's IMU noise terms (fusion.Noise;
// DEVELOPERS.md, "Design: Process noise"); zero is "not determined".
type IMUTerms struct {
	// HeadingVarRad2 is noise.imu_heading_var_rad2, rad^2.
	HeadingVarRad2 float64
	// OffsetVarRad2PerS is noise.imu_offset_var_rad2_per_s, rad^2/s.
	OffsetVarRad2PerS float64
	// TurnVarRad2PerRad is noise.imu_turn_var_rad2_per_rad, rad^2/rad.
	TurnVarRad2PerRad float64
}

// IMUTerms maps the noise terms of a heading's rate (rad/s) to the
// configuration's IMU terms, with horizonS the time over which bias
// instability and rate random walk are spread into the offset's random
// walk, seconds, and turnRate a typical turn rate, rad/s (the package
// comment has the mapping and its assumptions). It panics unless both are
// positive.
func (nz Noise) IMUTerms(horizonS, turnRate float64) IMUTerms {
	if !(horizonS > 0) || !(turnRate > 0) {
		panic(fmt.Sprintf("calib: horizon %v s and turn rate %v rad/s must be positive", horizonS, turnRate))
	}
	var t IMUTerms
	if nz.Q.Found {
		t.HeadingVarRad2 = nz.Q.Coef * nz.Q.Coef
	}
	var n2 float64
	if nz.N.Found {
		n2 = nz.N.Coef * nz.N.Coef
	}
	t.OffsetVarRad2PerS = n2
	if nz.B.Found {
		t.OffsetVarRad2PerS += nz.B.Coef * nz.B.Coef * horizonS
	}
	if nz.K.Found {
		t.OffsetVarRad2PerS += nz.K.Coef * nz.K.Coef * horizonS * horizonS / 3
	}
	t.TurnVarRad2PerRad = n2 / turnRate
	return t
}

// OffsetHorizon returns the horizon T for IMUTerms of a robot whose fixes
// correct the IMU's offset with a heading of variance fixVarRad2 (rad^2)
// every intervalS seconds: the time constant of the filter's estimate of
// the offset. A random walk of q per second observed through white noise of
// density R = fixVarRad2 * intervalS is estimated with variance sqrt(q R)
// and time constant sqrt(R / q) (the steady-state Kalman-Bucy filter of a
// random walk; Gelb, Applied Optimal Estimation, 1974, ch. 4, from memory).
// A drift held over that time constant moves the offset by about its
// standard deviation, which the random walk then covers: T solves
// T = sqrt(R / q(T)) with q(T) = N^2 + B^2 T + K^2 T^2 / 3, IMUTerms' walk.
// For bias instability alone q = B^(4/3) R^(1/3). The time between fixes is
// far shorter than T when fixes are noisy (0.3 s against 11 s for a camera
// heading of 0.02 rad at 3.3 Hz and B = 3e-4 rad/s), and a walk spread over
// it leaves the filter overconfident (the honesty case gyro-bias). ok is
// false when the noise has none of N, B and K, or the arguments are not
// positive and finite.
func (nz Noise) OffsetHorizon(fixVarRad2, intervalS float64) (horizonS float64, ok bool) {
	r := fixVarRad2 * intervalS
	if !(r > 0) || math.IsInf(r, 0) || !(intervalS > 0) || !(nz.N.Found || nz.B.Found || nz.K.Found) {
		return 0, false
	}
	walk := func(t float64) float64 { return nz.IMUTerms(t, 1).OffsetVarRad2PerS }
	// t^2 q(t) - R rises with t: bisect its root on a logarithmic scale.
	lo, hi := 1e-6, 1e9
	if hi*hi*walk(hi) < r {
		return 0, false // no drift worth a horizon
	}
	for range 200 {
		mid := math.Sqrt(lo * hi)
		if mid*mid*walk(mid) < r {
			lo = mid
		} else {
			hi = mid
		}
	}
	return math.Sqrt(lo * hi), true
}

// RatesFromHeadings turns headings (rad) read at stamps (ns, increasing)
// into rates (rad/s) at a fixed interval dt (s, the mean interval): each
// rate is the wrapped difference of successive headings over dt. It
// refuses fewer than 8 samples (ErrTooShort) and an interval that is not
// positive or differs from the mean by more than half of it (ErrIrregular,
// naming the sample).
func RatesFromHeadings(stamps []int64, headings []float64) (rates []float64, dt float64, err error) {
	if len(stamps) != len(headings) {
		panic("calib: stamps and headings differ in length")
	}
	n := len(stamps)
	if n < 8 {
		return nil, 0, fmt.Errorf("%w: %d headings, need 8", ErrTooShort, n)
	}
	mean := float64(stamps[n-1]-stamps[0]) / float64(n-1)
	rates = make([]float64, n-1)
	for k := 1; k < n; k++ {
		d := float64(stamps[k] - stamps[k-1])
		if !(d > 0) || math.Abs(d-mean) > mean/2 {
			return nil, 0, fmt.Errorf("%w: interval %v ns before heading %d, mean %.0f ns", ErrIrregular, d, k, mean)
		}
		rates[k-1] = estimator.Wrap(headings[k]-headings[k-1]) / (mean * 1e-9)
	}
	return rates, mean * 1e-9, nil
}
