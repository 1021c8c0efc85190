package calib

import (
	"errors"
	"fmt"
	"math"

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
	// slopeTol is how far a point's local slope may be from a term's slope
	// for the point to belong to that term's segment.
	slopeTol = 0.15
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
// samples (the points ascending in tau, from AllanDeviation). Each term
// with a slope has a segment: the longest run of points whose local slope
// is within 0.15 of the term's and which spans half a decade. Its
// coefficient is the weighted least-squares fit of log dev = log(c) + slope
// * log tau with the slope fixed, weights the inverse squared relative
// error of each point; then once more with the other terms' variances
// subtracted (the terms add in variance, IEEE Std 952-1997, Annex C). B is
// the minimum over 0.664, found when a flat run around the minimum spans
// half a decade.
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
	slopes := localSlopes(use)
	terms := []*Term{&nz.Q, &nz.N, &nz.K}
	targets := []float64{slopeQ, slopeN, slopeK}
	gains := []float64{gainQ, 1, gainK}
	for i, t := range terms {
		from, to := longestRun(use, slopes, targets[i])
		if from < 0 {
			continue
		}
		seg := use[from:to]
		*t = Term{Found: true, FromS: seg[0].TauS, ToS: seg[len(seg)-1].TauS, Points: len(seg), Slope: freeSlope(seg, n)}
		t.Coef = fixedSlope(seg, n, targets[i], nil) / gains[i]
	}
	nz.B = flatMinimum(use, slopes)
	// Refit each term with the others subtracted.
	for i, t := range terms {
		if !t.Found {
			continue
		}
		others := func(tau float64) float64 {
			v := nz.variance(tau)
			c := gains[i] * t.Coef * math.Pow(tau, targets[i])
			return v - c*c
		}
		seg := pointsIn(use, t.FromS, t.ToS)
		if c := fixedSlope(seg, n, targets[i], others); c > 0 {
			t.Coef = c / gains[i]
		}
	}
	return nz
}

// variance is the Allan variance of the terms found, at tau seconds.
func (nz Noise) variance(tau float64) float64 {
	var v float64
	add := func(t Term, gain, slope float64) {
		if t.Found {
			c := gain * t.Coef * math.Pow(tau, slope)
			v += c * c
		}
	}
	add(nz.Q, gainQ, slopeQ)
	add(nz.N, 1, slopeN)
	add(nz.B, gainB, slopeB)
	add(nz.K, gainK, slopeK)
	return v
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

// localSlopes is the slope of log dev against log tau at each point,
// central between its neighbours and one-sided at the ends.
func localSlopes(pts []Point) []float64 {
	s := make([]float64, len(pts))
	for i := range pts {
		a, b := max(i-1, 0), min(i+1, len(pts)-1)
		s[i] = math.Log(pts[b].Dev/pts[a].Dev) / math.Log(pts[b].TauS/pts[a].TauS)
	}
	return s
}

// longestRun returns the longest run [from, to) of points whose local
// slope is within slopeTol of target and which spans minSpan, or -1.
func longestRun(pts []Point, slopes []float64, target float64) (from, to int) {
	from, to = -1, -1
	best := 0.0
	for i := 0; i < len(pts); {
		if math.Abs(slopes[i]-target) > slopeTol {
			i++
			continue
		}
		j := i
		for j < len(pts) && math.Abs(slopes[j]-target) <= slopeTol {
			j++
		}
		if span := pts[j-1].TauS / pts[i].TauS; span >= minSpan && span > best {
			from, to, best = i, j, span
		}
		i = j
	}
	return from, to
}

// flatMinimum reads B from the smallest deviation.
func flatMinimum(pts []Point, slopes []float64) Term {
	k := 0
	for i, p := range pts {
		if p.Dev < pts[k].Dev {
			k = i
		}
	}
	a, b := k, k
	for a > 0 && math.Abs(slopes[a-1]) <= slopeTol {
		a--
	}
	for b < len(pts)-1 && math.Abs(slopes[b+1]) <= slopeTol {
		b++
	}
	return Term{
		Coef:   pts[k].Dev / gainB,
		Found:  pts[b].TauS/pts[a].TauS >= minSpan,
		FromS:  pts[a].TauS,
		ToS:    pts[b].TauS,
		Points: b - a + 1,
	}
}

// pointsIn returns the points with tau in [from, to].
func pointsIn(pts []Point, from, to float64) []Point {
	var seg []Point
	for _, p := range pts {
		if p.TauS >= from && p.TauS <= to {
			seg = append(seg, p)
		}
	}
	return seg
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
