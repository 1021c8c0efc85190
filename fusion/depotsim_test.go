package fusion_test

import (
	"cmp"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// This file is a fourth simulator, written apart from fusiontest,
// cartsim_test.go and greenhouse_test.go (it shares only the sample types
// and the public API), for the conditions those do not produce. A tug
// tows trolleys round a parcel depot whose site grid is a survey grid far
// from its origin (eastings and northings of tens of kilometres). The
// simulator keeps its own conventions inside and converts only at its
// output: positions as (easting, northing), the tug's direction as a
// bearing clockwise from grid north, time in microseconds, the gyro
// integrating the clockwise rate.
//
//   - Drive: a differential drive on wheels of 100 mm nominal radius with
//     a 0.52 m track, 4096 ticks a revolution, 16-bit counters that wrap
//     every 10 m; the wheels' true radii 0.5% to 2% off together (sign
//     drawn) and up to 0.3% apart, the true track up to 3% off. Each
//     wheel's contact slips by an AR(1) fraction (0.4% standard
//     deviation, 1.5 s correlation time), a process no white noise
//     describes.
//   - Route: long aisles (15 to 50 m at 1.2 to 1.6 m/s), tight quarter
//     turns on a 0.6 to 1 m radius, spins on the spot by a half or a whole
//     turn (so the heading crosses +-pi again and again, and an aisle
//     driven west holds it there), reversing into a dock (5 to 15 s at
//     0.4 m/s), short stops, and once a run a stand of two to three
//     minutes.
//   - Odometry: counts latched at 50 Hz, stamped with 0.7 ms of timer
//     jitter; now and then (one in 20 s) a dropout of 100 to 500 ms on the
//     shared bus, which takes the IMU's samples too.
//   - IMU: a gyro (z up) integrated at 500 Hz, its scale 0.3% to 1% off, a
//     bias that starts within 2e-4 rad/s and random-walks (3e-5 rad/s per
//     root second), angle random walk 1.5e-4 rad per root second; its
//     heading read at 25 Hz on its own clock, quantised to 0.005 degree,
//     with 1.5 mrad of reading noise, sent as heading samples.
//   - Camera: looks down at floor fiducials on a 6 m grid (a quarter of
//     them missing), sees one within 1.2 m of its point 0.35 m ahead of
//     the axle, at 3 Hz; the pose it reports errs by Student-t of 3
//     degrees of freedom in each component on its own (scale 15 mm and
//     10 mrad); 3% of its fixes are outliers 0.5 to 3 m and up to 0.5 rad
//     off; stamped at the exposure with 2 ms of jitter, it arrives 30 to
//     250 ms later; its driver stalls now and then (one in 50 s) for 0.3
//     to 0.8 s and then sends the frames it held at once; once a run the
//     camera reboots, 20 to 40 s without a fix, and its first frames come
//     in a burst.
//
// dpErrors turns each error process on or off. The magnitudes are common
// practice for a depot tug with MEMS sensors and floor fiducials (from
// memory). The configuration is the one the
// README tells a careful user to write (depotConfig).

// The tug's nominal build, as its drawings state it.
const (
	dpRadiusM      = 0.10
	dpTrackM       = 0.52
	dpTicksPerRev  = 4096
	dpCounterBits  = 16
	dpCamAheadM    = 0.35
	dpGridM        = 6.0
	dpSeeM         = 1.2
	dpCamScaleM    = 0.015
	dpCamScaleRad  = 0.010
	dpIMUNoiseRad  = 1.5e-3
	dpIMUQuantum   = 0.005 * math.Pi / 180
	dpStepUs       = 2000 // the truth's integration step
	dpOdoPeriodUs  = 20000
	dpIMUPeriodUs  = 40000
	dpCamPeriodUs  = 333333
	dpSettleUs     = 5_000_000
	dpOutlierShare = 0.03
)

// dpErrors switches the simulator's error processes; dpAllErrors has
// every one on, and a zero field turns one off (a zero wheelScale leaves
// the radii exact).
type dpErrors struct {
	wheelScale, trackErr float64 // largest error, fraction
	wheelDiff            float64 // largest difference of the radii, fraction
	slipStd              float64 // the AR(1) slip's standard deviation
	wheelWhite           float64 // white travel noise, m^2 per metre rolled
	gyroScale, gyroBias  float64 // largest scale error; initial bias, rad/s
	gyroWalk             float64 // bias random walk, rad/s per root second
	studentT             bool    // Student-t camera errors (else normal)
	outliers             float64
	jitter               bool // stamp jitter on every source
	dropouts, stalls     bool // odometry dropouts; camera stalls and reboot
	stand                bool // the long stand
}

// dpAllErrors turns every error process on.
func dpAllErrors() dpErrors {
	return dpErrors{wheelScale: 0.02, wheelDiff: 0.003, trackErr: 0.03, slipStd: 0.004, gyroScale: 0.01, gyroBias: 2e-4, gyroWalk: 3e-5,
		studentT: true, outliers: dpOutlierShare, jitter: true, dropouts: true, stalls: true, stand: true}
}

// dpTicksPerM is the configured ticks per metre (nominal radius).
var dpTicksPerM = dpTicksPerRev / (2 * math.Pi * dpRadiusM)

// dpSite is the depot's survey grid origin as the tug's frame starts it:
// the easting and northing of its start dock.
type dpSite struct{ e, n float64 }

// dpPose is a pose in the simulator's own convention: easting, northing,
// bearing clockwise from grid north.
type dpPose struct{ e, n, bearing float64 }

// field converts a simulator pose to the project's field frame: x east,
// y north, heading counter-clockwise from +x (DEVELOPERS.md, "Design:
// Conventions").
func (p dpPose) field() estimator.Pose {
	return estimator.Pose{X: p.e, Y: p.n, Heading: estimator.Wrap(math.Pi/2 - p.bearing)}
}

// dpManoeuvre is one commanded motion: forward speed, clockwise yaw rate,
// for a duration; kind labels it for the figures.
type dpManoeuvre struct {
	v, cw, durS float64
	kind        dpKind
}

// dpKind labels what the tug is doing.
type dpKind uint8

const (
	dpAisle dpKind = iota
	dpTurn
	dpSpin
	dpReverse
	dpStop
	dpStand
	dpKinds
)

func (k dpKind) String() string {
	return [...]string{"aisle", "turn", "spin", "reverse", "stop", "stand"}[k]
}

// dpPlan draws the tug's work for durS seconds: aisles joined by tight
// turns, spins, docking in reverse and stops, with one long stand.
func dpPlan(r *rand.Rand, durS float64, stand bool) []dpManoeuvre {
	sign := func() float64 { return float64(1 - 2*r.IntN(2)) }
	standAt := durS * (0.2 + 0.4*r.Float64())
	stood := !stand
	var plan []dpManoeuvre
	for t := 0.0; t < durS+30; {
		var m dpManoeuvre
		switch k := r.IntN(20); {
		case !stood && t >= standAt:
			m, stood = dpManoeuvre{durS: 120 + 60*r.Float64(), kind: dpStand}, true
		case k < 7:
			v := 1.2 + 0.4*r.Float64()
			m = dpManoeuvre{v: v, durS: (15 + 35*r.Float64()) / v, kind: dpAisle}
		case k < 12:
			v, rad := 0.5, 0.6+0.4*r.Float64()
			m = dpManoeuvre{v: v, cw: sign() * v / rad, durS: math.Pi / 2 * rad / v, kind: dpTurn}
		case k < 14:
			m = dpManoeuvre{cw: sign() * 1.2, durS: math.Pi * float64(1+r.IntN(2)) / 1.2, kind: dpSpin}
		case k < 16:
			m = dpManoeuvre{v: -0.4, durS: 5 + 10*r.Float64(), kind: dpReverse}
		default:
			m = dpManoeuvre{durS: 2 + 6*r.Float64(), kind: dpStop}
		}
		plan = append(plan, m)
		t += m.durS
	}
	return plan
}

// dpInput is one input in arrival order. An odometry sample carries the
// truth at its stamp, what the tug was doing and how long since the
// camera's reboot ended; a fix says whether it is an outlier.
type dpInput struct {
	arrivalUs int64
	odo       *fusion.Odometry
	head      *fusion.Heading
	fix       *fusion.Fix
	outlier   bool
	truth     estimator.Pose
	kind      dpKind
	// sinceCamUs is, at an odometry sample, how long since the camera's
	// reboot ended (-1: not yet, or more than 10 s).
	sinceCamUs int64
}

// dpRun is one simulated run: its inputs and the start pose as the
// configuration states it.
type dpRun struct {
	ins   []dpInput
	start estimator.Pose
}

// dpApproach moves cur toward target by at most step.
func dpApproach(cur, target, step float64) float64 {
	return math.Max(cur-step, math.Min(cur+step, target))
}

// dpFiducial reports whether the grid point (i, j) carries a fiducial
// (a quarter are missing), by a hash of the point, the same in every run.
func dpFiducial(i, j int64) bool {
	h := uint64(i)*0x9e3779b97f4a7c15 ^ uint64(j)*0xc2b2ae3d27d4eb4f
	h ^= h >> 31
	h *= 0xbf58476d1ce4e5b9
	h ^= h >> 29
	return h%4 != 0
}

// dpStudentT draws Student-t of 3 degrees of freedom: a normal over the
// root of a chi-square of 3 over 3.
func dpStudentT(r *rand.Rand) float64 {
	var c float64
	for range 3 {
		g := r.NormFloat64()
		c += g * g
	}
	return r.NormFloat64() / math.Sqrt(c/3)
}

// dpSimulate runs the tug for durS seconds from a dock at site.
func dpSimulate(seed uint64, durS float64, site dpSite, e dpErrors) dpRun {
	r := rand.New(rand.NewPCG(seed, 0xd0c4))
	sign := func() float64 { return float64(1 - 2*r.IntN(2)) }
	// Build errors, fixed for the run.
	common := sign() * e.wheelScale * (0.25 + 0.75*r.Float64())
	diff := e.wheelDiff * (2*r.Float64() - 1)
	radL := dpRadiusM * (1 + common + diff/2)
	radR := dpRadiusM * (1 + common - diff/2)
	track := dpTrackM * (1 + e.trackErr*(2*r.Float64()-1))
	gyroScale := 1 + sign()*e.gyroScale*(0.3+0.7*r.Float64())
	gyroBias := e.gyroBias * (2*r.Float64() - 1)
	imuZero := 2 * math.Pi * r.Float64()
	plan := dpPlan(r, durS, e.stand)
	jitter := func(us float64) int64 {
		if !e.jitter {
			return 0
		}
		return int64(us * r.NormFloat64())
	}
	rebootAtUs := int64((0.3 + 0.5*r.Float64()) * durS * 1e6)
	rebootEndUs := rebootAtUs + int64((20+20*r.Float64())*1e6)

	// The tug stands at its dock, a little off where the configuration
	// says: the dock's bearing is drawn, so the aisles run any way.
	dock := dpPose{e: site.e, n: site.n, bearing: 2 * math.Pi * r.Float64()}
	p := dock
	p.e += 0.03 * r.NormFloat64()
	p.n += 0.03 * r.NormFloat64()
	p.bearing += 0.02 * r.NormFloat64()

	const h = dpStepUs * 1e-6
	var run dpRun
	run.start = dock.field()
	var v, cw float64      // actual speed and clockwise yaw rate
	var rotL, rotR float64 // wheel rotations, radians
	var slipL, slipR float64
	rho := math.Exp(-h / 1.5)
	gyro := 0.0 // the gyro's integrated counter-clockwise heading
	m, left := 0, plan[0].durS
	nextOdo, nextIMU := int64(dpOdoPeriodUs), int64(7000)
	nextCam := int64(200000)
	var dropUntil int64 = -1
	var stallFrom, stallUntil int64 = -1, -1
	var stalled []dpInput
	endUs := int64(durS * 1e6)
	for t := int64(dpStepUs); t <= endUs; t += dpStepUs {
		left -= h
		for left <= 0 {
			m++
			left += plan[m].durS
		}
		c := plan[m]
		v = dpApproach(v, c.v, 0.8*h)
		cw = dpApproach(cw, c.cw, 2.5*h)
		// The contacts roll the body's motion; each wheel turns by its
		// contact's travel, stretched by its slip, over its true radius.
		ccw := -cw
		gl, gr := (v-ccw*track/2)*h, (v+ccw*track/2)*h
		slipL = rho*slipL + math.Sqrt(1-rho*rho)*e.slipStd*r.NormFloat64()
		slipR = rho*slipR + math.Sqrt(1-rho*rho)*e.slipStd*r.NormFloat64()
		if e.wheelWhite > 0 {
			gl += math.Sqrt(e.wheelWhite*math.Abs(gl)) * r.NormFloat64()
			gr += math.Sqrt(e.wheelWhite*math.Abs(gr)) * r.NormFloat64()
		}
		rotL += gl * (1 + slipL) / radL
		rotR += gr * (1 + slipR) / radR
		mid := p.bearing + cw*h/2
		p.e += v * h * math.Sin(mid)
		p.n += v * h * math.Cos(mid)
		p.bearing += cw * h
		gyro += gyroScale*ccw*h + gyroBias*h + 1.5e-4*math.Sqrt(h)*r.NormFloat64()
		gyroBias += e.gyroWalk * math.Sqrt(h) * r.NormFloat64()

		if t >= nextOdo {
			nextOdo += dpOdoPeriodUs
			if e.dropouts && dropUntil < t && r.Float64() < float64(dpOdoPeriodUs)/20e6 {
				dropUntil = t + int64(100000+400000*r.Float64())
			}
			if t > dropUntil {
				wrap := func(rot float64) int64 {
					return int64(math.Floor(rot/(2*math.Pi)*dpTicksPerRev)) & (1<<dpCounterBits - 1)
				}
				stampUs := t + jitter(700)
				in := dpInput{arrivalUs: t + 1000 + r.Int64N(2000), kind: c.kind, sinceCamUs: -1,
					odo: &fusion.Odometry{StampNs: stampUs * 1000, Counts: []int64{wrap(rotL), wrap(rotR)}}}
				// The truth at the stamp: the pose now, moved back or on by
				// the jitter at the current rates.
				d := float64(stampUs-t) * 1e-6
				tp := p
				tp.e += v * d * math.Sin(p.bearing)
				tp.n += v * d * math.Cos(p.bearing)
				tp.bearing += cw * d
				in.truth = tp.field()
				if t >= rebootEndUs && t < rebootEndUs+10e6 {
					in.sinceCamUs = t - rebootEndUs
				}
				run.ins = append(run.ins, in)
			}
		}
		if t >= nextIMU {
			nextIMU += dpIMUPeriodUs
			if t > dropUntil {
				z := gyro + imuZero + dpIMUNoiseRad*r.NormFloat64()
				z = estimator.Wrap(math.Round(z/dpIMUQuantum) * dpIMUQuantum)
				stampUs := t + jitter(700)
				run.ins = append(run.ins, dpInput{arrivalUs: t + 2000 + r.Int64N(2000),
					head: &fusion.Heading{StampNs: stampUs * 1000, HeadingRad: z}})
			}
		}
		if t >= nextCam {
			nextCam += dpCamPeriodUs
			if e.stalls && stallUntil < t && r.Float64() < dpCamPeriodUs/50e6 {
				stallFrom, stallUntil = t, t+int64(300000+500000*r.Float64())
			}
			in, ok := dpCamera(r, t, p, e)
			switch {
			case e.stalls && t >= rebootAtUs && t < rebootEndUs:
				// Rebooting: nothing.
			case e.stalls && t >= rebootEndUs && t < rebootEndUs+700000:
				// The first frames after the reboot wait in the driver and
				// come at once.
				if ok {
					in.arrivalUs = rebootEndUs + 730000
					run.ins = append(run.ins, in)
				}
			case t >= stallFrom && t < stallUntil:
				if ok {
					stalled = append(stalled, in)
				}
			case ok:
				run.ins = append(run.ins, in)
			}
		}
		if len(stalled) > 0 && t >= stallUntil {
			for _, in := range stalled {
				in.arrivalUs = t + 30000
				run.ins = append(run.ins, in)
			}
			stalled = stalled[:0]
		}
	}
	slices.SortStableFunc(run.ins, func(a, b dpInput) int { return cmp.Compare(a.arrivalUs, b.arrivalUs) })
	return run
}

// dpCamera returns the camera's fix from an exposure at t with the tug
// at p, if a fiducial lies within dpSeeM of the camera's point.
func dpCamera(r *rand.Rand, t int64, p dpPose, e dpErrors) (dpInput, bool) {
	ce := p.e + dpCamAheadM*math.Sin(p.bearing)
	cn := p.n + dpCamAheadM*math.Cos(p.bearing)
	i, j := int64(math.Round(ce/dpGridM)), int64(math.Round(cn/dpGridM))
	if !dpFiducial(i, j) || math.Hypot(float64(i)*dpGridM-ce, float64(j)*dpGridM-cn) > dpSeeM {
		return dpInput{}, false
	}
	// The camera reports its own pose (easting, northing, bearing).
	draw := r.NormFloat64
	if e.studentT {
		draw = func() float64 { return dpStudentT(r) }
	}
	me := ce + dpCamScaleM*draw()
	mn := cn + dpCamScaleM*draw()
	mb := p.bearing + dpCamScaleRad*draw()
	out := r.Float64() < e.outliers
	if out {
		d, a := 0.5+2.5*r.Float64(), 2*math.Pi*r.Float64()
		me += d * math.Sin(a)
		mn += d * math.Cos(a)
		mb += 0.5 * (2*r.Float64() - 1)
	}
	f := dpPose{e: me, n: mn, bearing: mb}.field()
	stampUs := t
	if e.jitter {
		stampUs += int64(2000 * r.NormFloat64())
	}
	return dpInput{arrivalUs: t + 30000 + r.Int64N(220000), outlier: out, fix: &fusion.Fix{
		StampNs: stampUs * 1000, SensorID: "floorcam", Kind: fusion.FixPose, XM: f.X, YM: f.Y, HeadingRad: f.Heading,
		Marker: fmt.Sprintf("fid-%d-%d", i, j)}}, true
}

// depotConfig is the careful user's configuration for the tug: nominal
// geometry and counters from the drawings, no_side_slip for a
// differential drive, imu_mode absolute with the offset's walk per radian
// at the datasheet's 1% scale error squared and its walk per second ten
// times the default (fixes come seconds to tens of seconds apart, over
// which the gyro's bias, walking 3e-5 rad/s per root second, moves the
// IMU's zero further than the default allows: with it, 8 runs of the gyro
// errors alone had 1.2% of samples trusted outside the 99.9% region, the
// longest 11.9 s), online scale states for the
// wheels' and the track's errors, the camera's Student-t weighting with
// the default 4 degrees of freedom, its scale matrix 1.5 times the
// datasheet's spread a side, the start pose at the dock and move
// recovery on.
func depotConfig(start estimator.Pose) fusion.Config {
	n := fusion.DefaultNoise()
	n.IMUOffsetVarRad2PerRad = 1e-4
	n.IMUOffsetVarRad2PerS = 1e-5
	n.IMUHeadingVarRad2 = dpIMUNoiseRad*dpIMUNoiseRad + dpIMUQuantum*dpIMUQuantum/12
	pv, hv := math.Pow(1.5*dpCamScaleM, 2), math.Pow(1.5*dpCamScaleRad, 2)
	return fusion.Config{
		Wheels: []fusion.Wheel{
			{Name: "left", YM: dpTrackM / 2, CountsPerM: dpTicksPerM, CounterBits: dpCounterBits},
			{Name: "right", YM: -dpTrackM / 2, CountsPerM: dpTicksPerM, CounterBits: dpCounterBits},
		},
		NoSideSlip: true,
		IMU:        fusion.IMUAbsolute,
		Noise:      n,
		Recovery:   fusion.Recovery{Enabled: true},
		StartPose:  start,
		StartCov:   []float64{0.0025, 0, 0, 0, 0.0025, 0, 0, 0, 0.0009},
		Sensors: []fusion.Sensor{{ID: "floorcam", Kind: fusion.FixPose, Mount: estimator.Pose{X: dpCamAheadM},
			Cov: []float64{pv, 0, 0, 0, pv, 0, 0, 0, hv}, Robust: fusion.RobustStudentT}},
		Calibration: fusion.Calibration{Scale: true},
	}
}
