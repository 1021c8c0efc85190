package fusion_test

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// This file is a second, independent simulator of a small robot, written
// apart from fusiontest so that the filter is judged on error processes it
// does not assume: a warehouse cart (a differential drive) with two
// free-rolling encoder wheels and a MEMS gyro, under a ceiling of pose
// markers. It shares only the sample types with the project. Its truth is
// integrated at 1 kHz; every sensor reads that truth through processes of
// its own:
//
//   - encoder wheels whose radii are off by up to 2% and whose track is
//     off by up to 2%, with cumulative quantised counts, a little white
//     travel noise (a rough floor) and bursts of skid on a wet floor (a
//     wheel reading 3% to 15% short for 0.3 to 1 s, with sideways creep);
//   - a gyro integrated at 1 kHz with a scale error of up to 1%, a rate
//     bias that random-walks, angle random walk, read at 100 Hz with a
//     reading jitter and quantised to 1 mrad;
//   - a camera that computes its pose from a ceiling marker within 1.3 m
//     (a 3 m grid), its error the marker's survey error (fixed per marker,
//     2 cm a side), an AR(1) part (correlation 0.85 from frame to frame)
//     and a Student-t part of 4 degrees of freedom, 1% of its frames taking
//     a neighbouring marker for the one it sees (3 m off), captured at
//     10 Hz and arriving 80 to 250 ms later (now and then 400 ms), its
//     stamp 5 ms off the capture at most (clock sync);
//   - odometry read at 100 Hz at jittered instants, 2% of samples lost
//     and now and then a blackout of 0.3 s; the IMU read the same way;
//   - faults: a push sideways by hand (the wheels do not roll, the gyro
//     sees the turn).
//
// The magnitudes are common practice for a small indoor cart with MEMS
// sensors (from memory: 1-2% wheel and track errors before calibration, a
// 1% gyro scale error, a bias of about a degree a minute).

// cartErrors are the error processes of one run; zero turns one off.
type cartErrors struct {
	wheelScaleMax, trackErrMax     float64 // up to, drawn uniformly
	gyroScaleMax                   float64
	gyroBiasStd                    float64 // rad/s, the initial bias's spread
	gyroBiasWalk                   float64 // rad/s per sqrt(s)
	gyroARW                        float64 // rad per sqrt(s)
	camCoreStd, camARStd, camARRho float64 // m (heading: a third of it, rad/m)
	camDOF                         float64
	mapStd                         float64 // m per axis
	outlierFrac                    float64
	slipPerS                       float64 // skid bursts per second
	dropFrac                       float64
	pushAtS                        float64 // 0: none
	pushDY, pushDRad               float64
}

// realCart is the full set of error processes.
func realCart() cartErrors {
	return cartErrors{
		wheelScaleMax: 0.02, trackErrMax: 0.02,
		gyroScaleMax: 0.01, gyroBiasStd: 3e-4, gyroBiasWalk: 2e-5, gyroARW: 1e-4,
		camCoreStd: 0.012, camARStd: 0.012, camARRho: 0.85, camDOF: 4,
		mapStd: 0.02, outlierFrac: 0.01, slipPerS: 0.05, dropFrac: 0.02,
	}
}

// The cart's nominal build, as its configuration states it.
const (
	cartTrackM      = 0.40
	cartCountsPerM  = 10000
	cartCamX        = 0.20
	cartMarkerGridM = 3.0
	cartSeeM        = 1.3
	cartIMUStd      = 0.002 // the IMU's heading reading jitter, rad
	cartIMUQuantum  = 0.001
)

// cartSample is one sample in arrival order, with the truth at an odometry
// sample's stamp.
type cartSample struct {
	arrival int64
	odo     *fusion.Odometry
	head    *fusion.Heading
	fix     *fusion.Fix
	truth   estimator.Pose
}

// cartRun is one simulated run: its samples in arrival order and its
// injected faults' intervals (ns).
type cartRun struct {
	samples          []cartSample
	pushFrom, pushTo int64
	slips            [][2]int64
}

// cartLeg is a stretch of target velocities.
type cartLeg struct {
	v, w float64
	durS float64
}

// cartRoute draws a warehouse route: cruises along aisles, arcs into cross
// aisles, stops at shelves and turns in place.
func cartRoute(r *rand.Rand, durS float64) []cartLeg {
	var legs []cartLeg
	for t := 0.0; t < durS+10; {
		var l cartLeg
		switch k := r.IntN(10); {
		case k < 4:
			l = cartLeg{v: 0.5 + 0.4*r.Float64(), durS: 3 + 6*r.Float64()}
		case k < 6:
			s := float64(1 - 2*r.IntN(2))
			l = cartLeg{v: 0.4, w: s * 0.8, durS: math.Pi / 2 / 0.8}
		case k < 8:
			l = cartLeg{durS: 0.5 + 1.5*r.Float64()}
		default:
			s := float64(1 - 2*r.IntN(2))
			l = cartLeg{w: s * 1.0, durS: math.Pi / 2 * float64(1+r.IntN(2))}
		}
		legs = append(legs, l)
		t += l.durS
	}
	return legs
}

// approach moves cur toward target by at most step.
func approach(cur, target, step float64) float64 {
	switch {
	case target > cur+step:
		return cur + step
	case target < cur-step:
		return cur - step
	}
	return target
}

// markerOffset is marker (i, j)'s survey error: where it really is minus
// where the map says, fixed for the run.
func markerOffset(seed uint64, i, j int, std float64) (dx, dy, dh float64) {
	r := rand.New(rand.NewPCG(seed^0xc0ffee, uint64(int64(i)*100003+int64(j))))
	return std * r.NormFloat64(), std * r.NormFloat64(), std / 2 * r.NormFloat64()
}

// simulateCart runs one cart for durS seconds.
func simulateCart(seed uint64, durS float64, e cartErrors) cartRun {
	rng := rand.New(rand.NewPCG(seed, 0x5ca1ab1e))
	uni := func(a float64) float64 { return a * (2*rng.Float64() - 1) }
	var run cartRun
	// Systematic errors.
	scaleL, scaleR := 1+uni(e.wheelScaleMax), 1+uni(e.wheelScaleMax)
	track := cartTrackM * (1 + uni(e.trackErrMax))
	gyroScale := 1 + uni(e.gyroScaleMax)
	gyroBias := e.gyroBiasStd * rng.NormFloat64()
	legs := cartRoute(rng, durS)

	const dtNs = int64(1e6)
	dt := 1e-3
	endNs := int64(durS * 1e9)
	var truth estimator.Pose
	var v, w float64
	leg, legLeft := 0, legs[0].durS
	var cntL, cntR float64 // true cumulative counts (real-valued)
	gyroHead := 0.0        // the gyro's integrated heading before its zero
	const imuZero = -1.1   // the IMU's heading zero at power-on
	var ar [3]float64      // the camera's AR(1) error
	var slipUntil int64 = -1
	var slipL, slipR, creep float64
	nextOdo, nextIMU, nextCam := int64(10e6), int64(5e6), int64(60e6)
	jitterOdo := func(k int64) int64 { return k + int64(uni(1.5e6)) }
	odoAt, imuAt := jitterOdo(nextOdo), jitterOdo(nextIMU)
	blackoutUntil := int64(-1)
	run.pushFrom, run.pushTo = -1, -1
	if e.pushAtS > 0 {
		run.pushFrom = int64(e.pushAtS * 1e9)
		run.pushTo = run.pushFrom + 500e6
	}
	for t := dtNs; t <= endNs; t += dtNs {
		// Controller: velocities follow the leg's targets under
		// acceleration limits (1 m/s^2, 3 rad/s^2).
		legLeft -= dt
		if legLeft <= 0 {
			leg = (leg + 1) % len(legs)
			legLeft = legs[leg].durS
		}
		v = approach(v, legs[leg].v, 1.0*dt)
		w = approach(w, legs[leg].w, 3.0*dt)
		a, dth := v*dt, w*dt
		// Rotation the encoder wheels do not see (scrub), and the floor's
		// roughness on each wheel's reading.
		trueTurn := dth + math.Sqrt(5e-6*math.Abs(dth))*rng.NormFloat64()
		side := math.Sqrt(2e-5*math.Abs(a))*rng.NormFloat64() + creep*dt
		// Free-rolling wheels at y = +-track/2 roll a -+ track/2 dth.
		tl := a - track/2*dth
		tr := a + track/2*dth
		tl += math.Sqrt(1e-5*math.Abs(tl)) * rng.NormFloat64()
		tr += math.Sqrt(1e-5*math.Abs(tr)) * rng.NormFloat64()
		// Skid on a wet floor.
		if e.slipPerS > 0 && t > slipUntil && rng.Float64() < e.slipPerS*dt {
			d := int64((0.3 + 0.7*rng.Float64()) * 1e9)
			slipUntil = t + d
			slipL, slipR = 0, 0
			k := 0.03 + 0.12*rng.Float64()
			switch rng.IntN(3) {
			case 0:
				slipL = k
			case 1:
				slipR = k
			default:
				slipL, slipR = k, k
			}
			creep = uni(0.02)
			run.slips = append(run.slips, [2]int64{t, t + d})
		}
		if t > slipUntil {
			slipL, slipR, creep = 0, 0, 0
		}
		cntL += tl * (1 - slipL) * cartCountsPerM / scaleL
		cntR += tr * (1 - slipR) * cartCountsPerM / scaleR
		// The gyro reads the true turn.
		gyroHead += gyroScale*trueTurn + gyroBias*dt + e.gyroARW*math.Sqrt(dt)*rng.NormFloat64()
		gyroBias += e.gyroBiasWalk * math.Sqrt(dt) * rng.NormFloat64()
		truth = estimator.Advance(truth, estimator.Step{ForwardM: a, LeftM: side, TurnRad: trueTurn})
		// A push by hand: sideways over half a second, turning a little;
		// the wheels do not roll, the gyro turns with the cart.
		if run.pushFrom >= 0 && t > run.pushFrom && t <= run.pushTo {
			f := float64(dtNs) / float64(run.pushTo-run.pushFrom)
			dth := e.pushDRad * f
			truth = estimator.Advance(truth, estimator.Step{LeftM: e.pushDY * f, TurnRad: dth})
			gyroHead += gyroScale * dth
		}

		if t >= odoAt {
			if t >= blackoutUntil && rng.Float64() < 0.002 {
				blackoutUntil = t + 300e6
			}
			if t >= blackoutUntil && rng.Float64() >= e.dropFrac {
				o := &fusion.Odometry{StampNs: t, Counts: []int64{int64(math.Floor(cntL)), int64(math.Floor(cntR))}}
				run.samples = append(run.samples, cartSample{arrival: t + 1e6 + int64(rng.Float64()*2e6), odo: o, truth: truth})
			}
			nextOdo += 10e6
			odoAt = jitterOdo(nextOdo)
		}
		if t >= imuAt {
			if t >= blackoutUntil && rng.Float64() >= e.dropFrac {
				h := gyroHead + imuZero + cartIMUStd*rng.NormFloat64()
				h = estimator.Wrap(math.Round(h/cartIMUQuantum) * cartIMUQuantum)
				run.samples = append(run.samples, cartSample{arrival: t + 2e6 + int64(rng.Float64()*3e6), head: &fusion.Heading{StampNs: t, HeadingRad: h}})
			}
			nextIMU += 10e6
			imuAt = jitterOdo(nextIMU)
		}
		if t >= nextCam {
			nextCam += 100e6
			cam := estimator.Compose(truth, estimator.Pose{X: cartCamX})
			i := int(math.Round(cam.X / cartMarkerGridM))
			j := int(math.Round(cam.Y / cartMarkerGridM))
			mx, my := float64(i)*cartMarkerGridM, float64(j)*cartMarkerGridM
			// The marker really stands at its mapped place plus its survey
			// error; the camera measures itself against the marker and
			// reports the pose that puts the marker at its mapped place.
			ox, oy, oh := markerOffset(seed, i, j, e.mapStd)
			if math.Hypot(mx+ox-cam.X, my+oy-cam.Y) > cartSeeM {
				continue
			}
			var n [3]float64
			for k := range ar {
				sd := e.camARStd
				if k == 2 {
					sd /= 3
				}
				ar[k] = e.camARRho*ar[k] + math.Sqrt(1-e.camARRho*e.camARRho)*sd*rng.NormFloat64()
				core := e.camCoreStd
				if k == 2 {
					core /= 3
				}
				n[k] = ar[k] + core*studentT(rng, e.camDOF)
			}
			// Measured relative to the real marker, placed at the mapped one:
			// a map error shifts the fix by -offset and turns it by -oh.
			fx := cam.X - ox + n[0]
			fy := cam.Y - oy + n[1]
			fh := estimator.Wrap(cam.Heading - oh + n[2])
			if rng.Float64() < e.outlierFrac {
				if rng.IntN(2) == 0 {
					fx += cartMarkerGridM * float64(1-2*rng.IntN(2))
				} else {
					fy += cartMarkerGridM * float64(1-2*rng.IntN(2))
				}
			}
			lat := int64((0.08 + 0.17*rng.Float64()) * 1e9)
			if rng.Float64() < 0.03 {
				lat = 400e6
			}
			stamp := t + int64(uni(5e6))
			run.samples = append(run.samples, cartSample{arrival: t + lat, fix: &fusion.Fix{StampNs: stamp, SensorID: "ceiling", Kind: fusion.FixPose, XM: fx, YM: fy, HeadingRad: fh}})
		}
	}
	slices.SortStableFunc(run.samples, func(a, b cartSample) int {
		switch {
		case a.arrival < b.arrival:
			return -1
		case a.arrival > b.arrival:
			return 1
		}
		return 0
	})
	return run
}

// studentT draws a Student-t variate of dof degrees of freedom (unit scale;
// 0: a standard normal), as a normal over the root of a scaled chi-square.
func studentT(r *rand.Rand, dof float64) float64 {
	z := r.NormFloat64()
	if dof <= 0 {
		return z
	}
	var c float64
	for range int(dof) {
		g := r.NormFloat64()
		c += g * g
	}
	return z / math.Sqrt(c/dof)
}

// cartConfig is the configuration a careful integrator writes for the cart
// from its drawings and datasheets, before any calibration run: nominal
// geometry, online scale states for the 1-2% wheel and track errors, the
// gyro's scale error as the offset's walk per radian, and the camera's
// error as its total spread with the part that repeats declared
// correlated.
func cartConfig(e cartErrors) fusion.Config {
	n := fusion.DefaultNoise()
	n.IMUHeadingVarRad2 = cartIMUStd*cartIMUStd + cartIMUQuantum*cartIMUQuantum/12
	n.IMUOffsetVarRad2PerRad = 1e-4 // (1% scale)^2
	// Total camera variance per axis: Student-t core (dof/(dof-2) times
	// its scale squared), AR(1) and the map.
	tv := e.camCoreStd * e.camCoreStd
	if e.camDOF > 2 {
		tv *= e.camDOF / (e.camDOF - 2)
	}
	corr := e.camARStd*e.camARStd + e.mapStd*e.mapStd
	pv := tv + corr
	hv := tv/9 + e.camARStd*e.camARStd/9 + e.mapStd*e.mapStd/4
	cam := fusion.Sensor{ID: "ceiling", Kind: fusion.FixPose, Mount: estimator.Pose{X: cartCamX},
		Cov: []float64{pv, 0, 0, 0, pv, 0, 0, 0, hv}}
	if pv > 0 {
		cam.CorrelatedFraction = corr / pv
		cam.CorrelationTimeS = 1.0
	}
	if e.camDOF > 0 {
		cam.Robust = fusion.RobustStudentT
		cam.RobustParameter = e.camDOF
	}
	return fusion.Config{
		Wheels: []fusion.Wheel{
			{Name: "left", YM: cartTrackM / 2, CountsPerM: cartCountsPerM},
			{Name: "right", YM: -cartTrackM / 2, CountsPerM: cartCountsPerM},
		},
		NoSideSlip:  true,
		IMU:         fusion.IMUAbsolute,
		Noise:       n,
		Recovery:    fusion.Recovery{Enabled: true},
		StartCov:    []float64{1e-4, 0, 0, 0, 1e-4, 0, 0, 0, 1e-4},
		Sensors:     []fusion.Sensor{cam},
		Calibration: fusion.Calibration{Scale: true, ScaleStd: 0.02},
	}
}

// cartTally is what runs measured at every odometry sample the robot
// took, from 2 s on (the IMU's offset and the first fixes settle): the
// pose NEES against the truth at the sample's stamp, the regions it falls
// outside of (3-dof chi-square quantiles at 0.95, 0.99 and 0.999: 7.815,
// 11.34, 16.27, from gonum stat/distuv) and the trust flag.
type cartTally struct {
	samples, trusted                       int
	out95, out99, out999                   int
	trustedOut95, trustedOut99, trusted999 int
	neesSum                                float64
	// Away from injected faults (a slip and 3 s after it; a push and all
	// after it): trustedAway999 samples trusted outside the 99.9% region,
	// of them seenAway999 with a fix captured within the last second (the
	// rest dead reckoning); longestS the longest such episode, seconds,
	// with its position error at its end and where it was.
	away, trustedAway999, seenAway999 int
	longestS, longestErrM             float64
	longestAt                         string
	// distrustInside: samples away from faults inside the 95% region yet
	// not trusted; longestFalseS the longest such stretch and where.
	distrustInside int
	longestFalseS  float64
	longestFalseAt string
	// Pushes by hand: lostAfterS, for each, seconds from the arrival of
	// the first fix captured after the push to the first sample not
	// trusted (-1: trusted throughout the 5 s after it); pushOutS the
	// longest stretch trusted outside the 99.9% region in those 5 s.
	lostAfterS []float64
	pushOutS   float64
	// slipTrusted999 counts the samples within a slip or 3 s after it
	// trusted outside the 99.9% region, slipLongestS their longest
	// episode, seconds.
	slipTrusted999 int
	slipLongestS   float64
	// slips counts slip_suspected.
	slips uint64
}

func (a *cartTally) add(b cartTally) {
	a.samples += b.samples
	a.trusted += b.trusted
	a.out95 += b.out95
	a.out99 += b.out99
	a.out999 += b.out999
	a.trustedOut95 += b.trustedOut95
	a.trustedOut99 += b.trustedOut99
	a.trusted999 += b.trusted999
	a.neesSum += b.neesSum
	a.away += b.away
	a.trustedAway999 += b.trustedAway999
	a.seenAway999 += b.seenAway999
	if b.longestS > a.longestS {
		a.longestS, a.longestErrM, a.longestAt = b.longestS, b.longestErrM, b.longestAt
	}
	a.distrustInside += b.distrustInside
	if b.longestFalseS > a.longestFalseS {
		a.longestFalseS, a.longestFalseAt = b.longestFalseS, b.longestFalseAt
	}
	a.lostAfterS = append(a.lostAfterS, b.lostAfterS...)
	a.pushOutS = max(a.pushOutS, b.pushOutS)
	a.slipTrusted999 += b.slipTrusted999
	a.slipLongestS = max(a.slipLongestS, b.slipLongestS)
	a.slips += b.slips
}

// frac returns k as a share of the samples.
func (a *cartTally) frac(k int) float64 { return float64(k) / float64(a.samples) }

func (a *cartTally) String() string {
	pct := func(k int) float64 { return 100 * a.frac(k) }
	s := fmt.Sprintf("%d samples, trusted %.2f%%, mean NEES %.2f; outside the 95/99/99.9%% regions %.2f/%.2f/%.3f%%, and trusted %.2f/%.2f/%.3f%% of all samples; "+
		"away from faults trusted outside 99.9%% %.3f%% (with a fix in the last second %.3f%%, dead reckoning %.3f%%), longest %.2f s (%.3f m, %s); "+
		"not trusted though inside 95%% %.2f%%, longest %.2f s (%s); during slips trusted outside 99.9%% %.3f%%, longest %.2f s; %d slip events",
		a.samples, pct(a.trusted), a.neesSum/float64(a.samples), pct(a.out95), pct(a.out99), pct(a.out999),
		pct(a.trustedOut95), pct(a.trustedOut99), pct(a.trusted999),
		pct(a.trustedAway999), pct(a.seenAway999), pct(a.trustedAway999-a.seenAway999), a.longestS, a.longestErrM, a.longestAt,
		pct(a.distrustInside), a.longestFalseS, a.longestFalseAt, pct(a.slipTrusted999), a.slipLongestS, a.slips)
	if len(a.lostAfterS) > 0 {
		s += fmt.Sprintf("; pushes: trust lost %v s after the first fix that could show them (-1: kept), trusted outside 99.9%% at most %.2f s after it", a.lostAfterS, a.pushOutS)
	}
	return s
}

// runCart feeds one run to a robot of configuration cfg as a client would,
// every sample in arrival order, and measures it.
func runCart(seed uint64, durS float64, e cartErrors, cfg fusion.Config) (cartTally, error) {
	run := simulateCart(seed, durS, e)
	r, err := fusion.New(cfg)
	if err != nil {
		return cartTally{}, err
	}
	const q95, q99, q999 = 7.8147, 11.3449, 16.2662 // 3-dof chi-square (gonum stat/distuv)
	var tl cartTally
	var outFrom, falseFrom, pushOutFrom int64 = -1, -1, -1
	// lastFixNs is the newest capture of a fix that has arrived; pushFixNs
	// the arrival of the first captured after the push's end, before which
	// nothing shows it (the wheels do not roll).
	var lastFixNs, pushFixNs int64 = -1, -1
	pushLost := -1.0
	var slipOutFrom int64 = -1
	inSlip := func(t int64) bool {
		for _, s := range run.slips {
			if t >= s[0] && t < s[1]+3e9 {
				return true
			}
		}
		return false
	}
	for _, s := range run.samples {
		switch {
		case s.head != nil:
			r.AddHeading(*s.head)
			continue
		case s.fix != nil:
			r.AddFix(*s.fix)
			lastFixNs = max(lastFixNs, s.fix.StampNs)
			if run.pushFrom >= 0 && s.fix.StampNs >= run.pushTo && pushFixNs < 0 {
				pushFixNs = s.arrival
			}
			continue
		}
		if res := r.AddOdometry(*s.odo); res.Seq == 0 || res.Verdict != fusion.VerdictApplied {
			continue
		}
		t := s.odo.StampNs
		if t < 2e9 {
			continue
		}
		p := r.Pose()
		nees, err := estimator.PoseNEES(p.Pose, &p.Cov, s.truth)
		if err != nil {
			return tl, fmt.Errorf("seed %d at %.2f s: %v", seed, float64(t)*1e-9, err)
		}
		trusted := p.Distrust == 0
		tl.samples++
		tl.neesSum += nees
		if trusted {
			tl.trusted++
		}
		for _, c := range []struct {
			q        float64
			out, tro *int
		}{{q95, &tl.out95, &tl.trustedOut95}, {q99, &tl.out99, &tl.trustedOut99}, {q999, &tl.out999, &tl.trusted999}} {
			if nees > c.q {
				*c.out++
				if trusted {
					*c.tro++
				}
			}
		}
		slipping := inSlip(t)
		away := !slipping && (run.pushFrom < 0 || t < run.pushFrom)
		if slipping && trusted && nees > q999 {
			tl.slipTrusted999++
			if slipOutFrom < 0 {
				slipOutFrom = t
			}
			tl.slipLongestS = max(tl.slipLongestS, float64(t-slipOutFrom)*1e-9)
		} else {
			slipOutFrom = -1
		}
		if away {
			tl.away++
		}
		if away && trusted && nees > q999 {
			tl.trustedAway999++
			if t-lastFixNs <= 1e9 {
				tl.seenAway999++
			}
			if outFrom < 0 {
				outFrom = t
			}
			if d := float64(t-outFrom) * 1e-9; d > tl.longestS {
				tl.longestS, tl.longestErrM = d, math.Hypot(p.Pose.X-s.truth.X, p.Pose.Y-s.truth.Y)
				tl.longestAt = fmt.Sprintf("seed %d at %.1f s", seed, float64(outFrom)*1e-9)
			}
		} else {
			outFrom = -1
		}
		if away && !trusted && nees <= q95 {
			tl.distrustInside++
			if falseFrom < 0 {
				falseFrom = t
			}
			if d := float64(t-falseFrom) * 1e-9; d > tl.longestFalseS {
				tl.longestFalseS = d
				tl.longestFalseAt = fmt.Sprintf("seed %d at %.1f s, %s", seed, float64(falseFrom)*1e-9, p.Distrust)
			}
		} else {
			falseFrom = -1
		}
		if pushFixNs >= 0 && t >= pushFixNs && t < pushFixNs+5e9 {
			if !trusted && pushLost < 0 {
				pushLost = math.Round(float64(t-pushFixNs)*1e-6) * 1e-3
			}
			if trusted && nees > q999 {
				if pushOutFrom < 0 {
					pushOutFrom = t
				}
				tl.pushOutS = max(tl.pushOutS, float64(t-pushOutFrom)*1e-9)
			} else {
				pushOutFrom = -1
			}
		}
	}
	if run.pushFrom >= 0 {
		tl.lostAfterS = append(tl.lostAfterS, pushLost)
	}
	tl.slips = r.Stats().Slips
	return tl, nil
}

// cartLimits are a scenario's tolerances, as shares of all samples or in
// seconds; zero leaves one unchecked.
type cartLimits struct {
	trustedAway999, seenAway999, distrustInside, slipTrusted999 float64
	meanNEES, longestS, slipLongestS, pushOutS                  float64
}

// violations returns what of tl breaks the limits.
func (l cartLimits) violations(tl *cartTally) []string {
	var v []string
	check := func(what string, got, most float64) {
		if most > 0 && got > most {
			v = append(v, fmt.Sprintf("%s %.4g, limit %.4g", what, got, most))
		}
	}
	check("share trusted outside the 99.9% region away from faults", tl.frac(tl.trustedAway999), l.trustedAway999)
	check("of it with a fix in the last second", tl.frac(tl.seenAway999), l.seenAway999)
	check("share not trusted though inside the 95% region", tl.frac(tl.distrustInside), l.distrustInside)
	check("share trusted outside the 99.9% region during slips", tl.frac(tl.slipTrusted999), l.slipTrusted999)
	check("mean NEES", tl.neesSum/float64(tl.samples), l.meanNEES)
	check("longest trusted outside the 99.9% region away from faults, s", tl.longestS, l.longestS)
	check("longest trusted outside the 99.9% region during a slip, s", tl.slipLongestS, l.slipLongestS)
	check("longest trusted outside the 99.9% region after a push was seen, s", tl.pushOutS, l.pushOutS)
	return v
}

// cartScenario is one scenario of TestWarehouseCartTrust.
type cartScenario struct {
	name   string
	e      cartErrors
	limits cartLimits
}

// cartScenarios are the scenarios of TestWarehouseCartTrust with their
// tolerances. The white scenario's floor is the README's ("Safety"): away
// from faults, trusted outside the 99.9% region at most 0.1% of the time,
// what a consistent estimate shows anyway. The others' limits are about
// twice to three times what the filter measured (12 runs of 120 s, after
// the slip comparison's long interval), regression guards rather than
// promises: with every error process on, the estimate is trusted outside
// its 99.9% region 0.71% of the time away from faults, seven times the
// floor (the causes are in the scenarios' comments).
func cartScenarios() []cartScenario {
	push := realCart()
	push.pushAtS, push.pushDY, push.pushDRad = 60, 0.25, 0.1
	return []cartScenario{
		// Exact wheels and gyro, a white camera: within the filter's model
		// (its noise rates at or above the simulator's). Measured: 0.005%
		// trusted outside, mean NEES 1.62, 0.54% not trusted though inside.
		{"white", cartErrors{camCoreStd: 0.012}, cartLimits{trustedAway999: 0.001, meanNEES: 3, distrustInside: 0.03}},
		// Skids of 3% to 15% on a wet floor, one wheel or both (which the
		// gyro cannot see). Measured: 0.84% of samples trusted outside
		// during slips, the longest 1.48 s, nearly all of it skids of both
		// wheels, which only the camera shows (before the long comparison
		// 0.91%, 1.48 s).
		{"wet-floor", cartErrors{camCoreStd: 0.012, slipPerS: 0.05}, cartLimits{trustedAway999: 0.001, slipTrusted999: 0.02, slipLongestS: 3}},
		// Measured: 0.71% trusted outside away from faults (0.41% with a
		// fix in the last second), the longest 3.84 s (a marker 2 cm off
		// its mapped place, learnt as truth while the cart passed it);
		// mean NEES 4.18; 1.93% not trusted though inside. The rest is
		// dead reckoning between markers: a gyro scale error over turns of
		// several radians (the offset's walk per radian describes it over
		// about one), and wheel radii that differ, which curve every
		// straight (no calibration state describes a turn per metre).
		{"all-errors", realCart(), cartLimits{trustedAway999: 0.02, seenAway999: 0.01, longestS: 8, distrustInside: 0.05}},
		// A push of 25 cm sideways and 0.1 rad at 60 s. Measured: trusted
		// outside the 99.9% region at most 0.13 s once a fix could show it
		// (trust lost in 4 of 12 runs, within 0.63 s; in the rest the
		// gyro's turn without the wheels' had widened the covariance, and
		// the first fix was taken).
		{"push", push, cartLimits{pushOutS: 0.5}},
	}
}

// cartRuns runs n seeded runs of durS seconds of a scenario under the
// configuration cartConfig gives it, edited by edit if set.
func cartRuns(t *testing.T, e cartErrors, n int, durS float64, edit func(*fusion.Config)) cartTally {
	t.Helper()
	var sum cartTally
	for k := range n {
		cfg := cartConfig(e)
		if edit != nil {
			edit(&cfg)
		}
		tl, err := runCart(uint64(1+k), durS, e, cfg)
		if err != nil {
			t.Fatal(err)
		}
		sum.add(tl)
	}
	return sum
}

// TestWarehouseCartTrust drives the independent simulator's warehouse
// cart (this file) through a Robot as a client would, 12 seeded runs of
// 120 s per scenario, and measures at every odometry sample how often the
// true error lies outside the published 95%, 99% and 99.9% regions while
// the estimate is trusted, how long such stretches last, what a fault
// (a skid, a push) leaves trusted, and how often a sound estimate is not
// trusted; each scenario's limits are in cartScenarios.
func TestWarehouseCartTrust(t *testing.T) {
	for _, c := range cartScenarios() {
		t.Run(c.name, func(t *testing.T) {
			sum := cartRuns(t, c.e, 12, 120, nil)
			t.Log(&sum)
			for _, v := range c.limits.violations(&sum) {
				t.Error(v)
			}
		})
	}
}

// TestWarehouseCartTrustCanFail shows that the limits catch an
// overconfident configuration: the wheels' noise and the camera's
// covariance configured at a quarter of cartConfig's (standard deviations
// halved). Measured: in the white scenario mean NEES 6.4 and 72% not
// trusted though inside the 95% region (the estimate is rarely trusted at
// all, so rarely trusted outside: 0.07%); with every error process on,
// 4.9% trusted outside the 99.9% region away from faults.
func TestWarehouseCartTrustCanFail(t *testing.T) {
	for _, c := range cartScenarios() {
		if c.name != "white" && c.name != "all-errors" {
			continue
		}
		sum := cartRuns(t, c.e, 12, 120, func(cfg *fusion.Config) {
			cfg.Noise.WheelVarM2PerM /= 4
			for k := range cfg.Sensors[0].Cov {
				cfg.Sensors[0].Cov[k] /= 4
			}
		})
		v := c.limits.violations(&sum)
		t.Logf("%s, overconfident: %v; caught: %q", c.name, &sum, v)
		if len(v) == 0 {
			t.Errorf("%s: the limits let an overconfident configuration pass", c.name)
		}
	}
}
