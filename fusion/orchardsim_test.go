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

// This file is a fifth simulator, written apart from fusiontest,
// cartsim_test.go, greenhouse_test.go and depotsim_test.go (it shares only
// the sample types and the public API), for error processes those do not
// produce. A carrier, a differential drive, works the rows of an orchard
// planted across a hillside: rows 40 m long and 3.5 m apart, trellis posts
// between the rows every 5 m, each carrying a marker. The carrier drives a
// row at 0.2 to 0.6 m/s, stops at trees, turns on the headland on a half
// circle into the next row, and steers back onto the row's line from its
// true pose (its navigation is not the subject).
//
//   - Ground: the rows cross a slope of 8%: the carrier creeps downhill
//     (field -y) by 1% to 2% of its travel, sideways, and yaws towards the
//     valley by 2 to 5 mrad a metre that its wheels report as straight
//     (the downhill wheel scrubs). Along a row the ground rises and falls
//     (grade up to 8%, a 25 m wave), so the wheels roll further than the
//     field distance (1/cos of the grade). Soft soil changes the wheels'
//     effective radius together (AR(1) in distance, 0.5% standard
//     deviation, 5 m correlation length) around a run's radii 0.5% to 1.5%
//     off (sign drawn) and up to 0.3% apart.
//   - Bumps: about every 8 m of travel one wheel loses contact with the
//     ground for 0.1 to 0.4 s; a free-rolling encoder wheel in the air
//     stops, so its counts stand still while the carrier moves on.
//   - Encoders: 90 ticks a revolution on 80 mm wheels (179 counts a
//     metre, about one tick a sample at 0.3 m/s: quantisation that is not
//     white), 16-bit counters, latched at 50 Hz on the controller's clock.
//   - IMU: a gyro integrated at 200 Hz, scale 0.3% to 1% off, bias within
//     1e-4 rad/s walking 2e-5 rad/s per root second, angle random walk
//     1e-4 rad per root second, its heading read at 50 Hz with 1 mrad of
//     reading noise, quantised to 0.01 degree; stamped on the IMU's own
//     clock, which stands 10 to 40 ms off the controller's (sign drawn)
//     and drifts by 100 ppm against it: neither is in the configuration.
//   - Camera: looks forward from 0.25 m ahead of the axle, 5 Hz, a frame in
//     five lost, sees the markers 1 to 7 m away within 0.6 rad of its axis,
//     and reports each as a range and bearing fix naming the marker. Its
//     error per marker is half white and half an AR(1) bias that the same
//     marker keeps from frame to frame (correlation time 0.5 to 3 s, drawn
//     per run): 5 cm in range and 10 mrad in bearing in all. The map was
//     surveyed by tape: each post stands 3 cm (per axis) off its mapped
//     position. Now and then (one sighting in 200) the decoder reads a
//     marker as its neighbour along the post line and keeps doing so for 3
//     to 10 frames. Fixes are stamped at the exposure and arrive 60 to 200
//     ms later. Once a run the camera sees nothing for 60 s (low sun), and
//     its first fixes after that are as far off as the odometry drifted.
//   - Kidnap (ocErrors.kidnap): once a run someone lifts the carrier,
//     carries it for 6 to 12 s to another row and sets it down facing
//     along it; its wheels stand still in the air. Either the IMU runs on
//     and sees the turn, or (imuOff) it is switched off while carried and
//     its heading starts again from zero, on a new zero, when it is back.
//
// The magnitudes are common practice for a small field robot with MEMS
// sensors and printed markers (from memory). The configuration is the one
// the README tells a careful user to write for these errors (ocConfig).

// The carrier's nominal build and the orchard's layout, as its
// configuration and map state them.
const (
	ocRadiusM     = 0.08
	ocTrackM      = 0.45
	ocTicksPerRev = 90
	ocCounterBits = 16
	ocCamAheadM   = 0.25
	ocRowLenM     = 40.0
	ocRowGapM     = 3.5
	ocRows        = 6
	ocPostGapM    = 5.0
	ocRangeStdM   = 0.05
	ocBearStdRad  = 0.010
	ocMapStdM     = 0.03
	ocIMUNoiseRad = 1e-3
	ocIMUQuantum  = 0.01 * math.Pi / 180
	ocStepUs      = 5000
	ocOdoPeriodUs = 20000
	ocIMUPeriodUs = 20000
	ocCamPeriodUs = 200000
	ocSettleUs    = 5_000_000
)

// ocCountsPerM is the configured counts per metre (nominal radius).
var ocCountsPerM = ocTicksPerRev / (2 * math.Pi * ocRadiusM)

// ocErrors switches the simulator's error processes; a zero field turns
// one off.
type ocErrors struct {
	creep, pull       float64 // largest sideways creep (fraction), yaw pull (rad/m)
	grade             float64 // largest grade along the rows
	radiusErr, soil   float64 // largest common radius error; soil AR(1) std
	bumpsPerM         float64 // contact losses per metre
	gyroScale         float64 // largest gyro scale error
	gyroBias          float64 // initial bias bound, rad/s
	clockOffUs        float64 // largest IMU clock offset, us (at least a quarter of it)
	clockPPM          float64 // IMU clock drift, parts per million
	camBias           bool    // the correlated half of the camera's error
	mapErr            bool    // posts off their mapped positions
	misreadShare      float64 // sightings that start a misread
	outage            bool    // the 60 s outage
	kidnap, imuOff    bool    // the carry; with the IMU off while carried
	lossShare         float64 // camera frames lost
	corrTimeS         float64 // 0: drawn from 0.5 to 3 s
	noCamera, noStops bool
}

// ocAllErrors turns every error process on (the kidnap apart).
func ocAllErrors() ocErrors {
	return ocErrors{creep: 0.02, pull: 0.005, grade: 0.08, radiusErr: 0.015, soil: 0.005, bumpsPerM: 1.0 / 8,
		gyroScale: 0.01, gyroBias: 1e-4, clockOffUs: 40000, clockPPM: 100, camBias: true, mapErr: true,
		misreadShare: 0.005, outage: true, lossShare: 0.2}
}

// ocPost is a trellis post's marker: its mapped and its true position.
type ocPost struct {
	id                       string
	mapX, mapY, trueX, trueY float64
}

// ocPostName names the post i along the line j (lines between rows j-1
// and j, from -0 to ocRows).
func ocPostName(i, j int) string { return fmt.Sprintf("post-%d-%d", i, j) }

// ocInput is one input in arrival order. An odometry sample carries the
// truth at its stamp and the phase of the run; a fix says whether it names
// the wrong marker.
type ocInput struct {
	arrivalUs int64
	odo       *fusion.Odometry
	head      *fusion.Heading
	fix       *fusion.Fix
	misread   bool
	truth     estimator.Pose
	phase     ocPhase
}

// ocPhase is what the carrier is going through at an odometry sample.
type ocPhase uint8

const (
	ocWorking ocPhase = iota
	ocCarried
	ocAfterSetDown // the 30 s after the carrier is set down
	ocAfterOutage  // the 10 s after the camera's outage
	ocPhases
)

func (p ocPhase) String() string {
	return [...]string{"working", "carried", "after set-down", "after outage"}[p]
}

// ocRun is one simulated run: its inputs, the map and the start pose.
type ocRun struct {
	ins       []ocInput
	posts     []ocPost
	start     estimator.Pose
	setDownUs int64 // -1: no kidnap
	liftUs    int64 // the carry's start; -1: no kidnap
}

// ocGrade is the ground's grade along row j at x.
func ocGrade(e ocErrors, j int, x float64) float64 {
	return e.grade * math.Sin(2*math.Pi*x/25+1.3*float64(j))
}

// ocSimulate runs the carrier for durS seconds.
func ocSimulate(seed uint64, durS float64, e ocErrors) ocRun {
	r := rand.New(rand.NewPCG(seed, 0x0c4a))
	sign := func() float64 { return float64(1 - 2*r.IntN(2)) }
	common := sign() * e.radiusErr * (0.33 + 0.67*r.Float64())
	diff := 0.003 * (2*r.Float64() - 1)
	if e.radiusErr == 0 {
		diff = 0
	}
	radL, radR := ocRadiusM*(1+common+diff/2), ocRadiusM*(1+common-diff/2)
	creep := e.creep * (0.5 + 0.5*r.Float64())
	pull := e.pull * (0.4 + 0.6*r.Float64())
	gyroScale := 1 + sign()*e.gyroScale*(0.3+0.7*r.Float64())
	gyroBias := e.gyroBias * (2*r.Float64() - 1)
	clockOff := sign() * e.clockOffUs * (0.25 + 0.75*r.Float64())
	clockDrift := sign() * e.clockPPM * 1e-6
	corrS := e.corrTimeS
	if corrS == 0 {
		corrS = 0.5 + 2.5*r.Float64()
	}
	imuZero := 2 * math.Pi * r.Float64()

	var run ocRun
	run.setDownUs, run.liftUs = -1, -1
	for j := 0; j <= ocRows; j++ {
		for i := 0; i <= int(ocRowLenM/ocPostGapM); i++ {
			p := ocPost{id: ocPostName(i, j), mapX: float64(i) * ocPostGapM, mapY: (float64(j) - 0.5) * ocRowGapM}
			p.trueX, p.trueY = p.mapX, p.mapY
			if e.mapErr {
				p.trueX += ocMapStdM * r.NormFloat64()
				p.trueY += ocMapStdM * r.NormFloat64()
			}
			run.posts = append(run.posts, p)
		}
	}
	postAt := func(i, j int) *ocPost {
		if i < 0 || i > int(ocRowLenM/ocPostGapM) || j < 0 || j > ocRows {
			return nil
		}
		return &run.posts[j*(int(ocRowLenM/ocPostGapM)+1)+i]
	}
	// Per marker: the correlated bias (range, bearing) and a misread's
	// remaining frames and the post it reads as.
	type markerState struct {
		br, bb   float64
		misreadN int
		as       *ocPost
	}
	ms := make([]markerState, len(run.posts))
	if e.camBias {
		for k := range ms {
			ms[k].br = ocRangeStdM / math.Sqrt2 * r.NormFloat64()
			ms[k].bb = ocBearStdRad / math.Sqrt2 * r.NormFloat64()
		}
	}

	// The carrier starts at the west end of row 0 facing east, a little
	// off where the configuration says.
	run.start = estimator.Pose{X: -0.5}
	x, y, th := run.start.X+0.03*r.NormFloat64(), 0.03*r.NormFloat64(), 0.02*r.NormFloat64()
	row, dir := 0, 1.0 // the row driven and its direction (+1 east)
	rowStep := 1       // the next row's offset
	speed := 0.2 + 0.4*r.Float64()
	var uturnLeftS, stopLeftS float64
	nextStopX := 3 + 10*r.Float64()

	endUs := int64(durS * 1e6)
	outFrom := int64(-1)
	if e.outage {
		outFrom = int64((0.15 + 0.25*r.Float64()) * durS * 1e6)
	}
	liftUs, carryUs := int64(-1), int64(0)
	var carryFrom, carryTo estimator.Pose
	if e.kidnap {
		liftUs = int64((0.5 + 0.2*r.Float64()) * durS * 1e6)
		carryUs = int64((6 + 6*r.Float64()) * 1e6)
		run.setDownUs, run.liftUs = liftUs+carryUs, liftUs
	}

	const h = ocStepUs * 1e-6
	var v, w float64 // actual speed and the wheels' yaw rate
	var carryRate float64
	var rotL, rotR float64
	var soil float64
	var bumpLeftS float64
	bumpWheel := 0
	gyro := 0.0
	imuOn, imuBase := true, 0.0
	nextOdo, nextIMU, nextCam := int64(ocOdoPeriodUs), int64(3000), int64(100000)
	for t := int64(ocStepUs); t <= endUs; t += ocStepUs {
		carried := liftUs >= 0 && t >= liftUs && t < liftUs+carryUs
		var vc, wc float64 // commanded
		switch {
		case carried:
			if carryFrom == (estimator.Pose{}) {
				carryFrom = estimator.Pose{X: x, Y: y, Heading: th}
				to := (row + 2 + r.IntN(ocRows-3)) % ocRows
				dir = sign()
				hd := 0.0
				if dir < 0 {
					hd = math.Pi
				}
				carryTo = estimator.Pose{X: 8 + 24*r.Float64(), Y: float64(to) * ocRowGapM, Heading: hd}
				row, rowStep = to, 1
				if to == ocRows-1 {
					rowStep = -1
				}
				if e.imuOff {
					imuOn = false
				}
			}
			// Carried along a straight line, turned at a steady rate.
			f := float64(t-liftUs) / float64(carryUs)
			x = carryFrom.X + f*(carryTo.X-carryFrom.X)
			y = carryFrom.Y + f*(carryTo.Y-carryFrom.Y)
			th = estimator.Wrap(carryFrom.Heading + f*estimator.Wrap(carryTo.Heading-carryFrom.Heading))
			v, w = 0, 0
			carryRate = estimator.Wrap(carryTo.Heading-carryFrom.Heading) / (float64(carryUs) * 1e-6)
		case uturnLeftS > 0:
			uturnLeftS -= h
			vc, wc = 0.3, dir*float64(rowStep)*0.3/(ocRowGapM/2)
			if uturnLeftS <= 0 {
				row += rowStep
				dir = -dir
				if row+rowStep < 0 || row+rowStep >= ocRows {
					rowStep = -rowStep
				}
				speed = 0.2 + 0.4*r.Float64()
				nextStopX = x + dir*(3+10*r.Float64())
			}
		case stopLeftS > 0:
			stopLeftS -= h
		default:
			if dir*(x-ocRowLenM/2) >= ocRowLenM/2 {
				uturnLeftS = math.Pi * (ocRowGapM / 2) / 0.3
				break
			}
			if !e.noStops && dir*(x-nextStopX) >= 0 {
				stopLeftS = 2 + 4*r.Float64()
				nextStopX = x + dir*(3+10*r.Float64())
				break
			}
			hd := 0.0
			if dir < 0 {
				hd = math.Pi
			}
			vc = speed
			wc = math.Max(-0.4, math.Min(0.4, -dir*0.6*(y-float64(row)*ocRowGapM)+1.5*estimator.Wrap(hd-th)))
		}
		if !carried {
			v = math.Max(v-0.5*h, math.Min(v+0.5*h, vc))
			w = math.Max(w-1.5*h, math.Min(w+1.5*h, wc))
			// The wheels roll the commanded turn; the body yaws on by the
			// valley's pull and creeps downhill, which they do not see.
			g := ocGrade(e, row, x)
			ground := v * h / math.Cos(math.Atan(g)) // rolled along the slope
			soil = math.Exp(-math.Abs(ground)/5)*soil + math.Sqrt(1-math.Exp(-2*math.Abs(ground)/5))*e.soil*r.NormFloat64()
			gl, gr := ground-w*h*ocTrackM/2, ground+w*h*ocTrackM/2
			if bumpLeftS > 0 {
				bumpLeftS -= h
				if bumpWheel == 0 {
					gl = 0
				} else {
					gr = 0
				}
			} else if r.Float64() < e.bumpsPerM*math.Abs(v*h) {
				bumpLeftS, bumpWheel = 0.1+0.3*r.Float64(), r.IntN(2)
			}
			rotL += gl / (radL * (1 + soil))
			rotR += gr / (radR * (1 + soil))
			// Downhill is field -y: the pull turns the heading towards it.
			wt := w - pull*math.Abs(v)*math.Cos(th)
			mid := th + wt*h/2
			x += v * h * math.Cos(mid)
			y += v*h*math.Sin(mid) - creep*math.Abs(v)*h
			th = estimator.Wrap(th + wt*h)
			gyro += gyroScale*wt*h + gyroBias*h + 1e-4*math.Sqrt(h)*r.NormFloat64()
		} else {
			gyro += gyroScale*carryRate*h + gyroBias*h + 1e-4*math.Sqrt(h)*r.NormFloat64()
		}
		gyroBias += 2e-5 * math.Sqrt(h) * r.NormFloat64()
		if !imuOn && !carried {
			// Back on after the carry: a new zero, reading zero now.
			imuOn, imuBase, imuZero = true, gyro, 0
		}

		phase := ocWorking
		switch {
		case carried:
			phase = ocCarried
		case run.setDownUs >= 0 && t >= run.setDownUs && t < run.setDownUs+30e6:
			phase = ocAfterSetDown
		case outFrom >= 0 && t >= outFrom+60e6 && t < outFrom+70e6:
			phase = ocAfterOutage
		}
		if t >= nextOdo {
			nextOdo += ocOdoPeriodUs
			wrap := func(rot float64) int64 {
				return int64(math.Floor(rot/(2*math.Pi)*ocTicksPerRev)) & (1<<ocCounterBits - 1)
			}
			run.ins = append(run.ins, ocInput{arrivalUs: t + 500 + r.Int64N(1500), phase: phase,
				truth: estimator.Pose{X: x, Y: y, Heading: th},
				odo:   &fusion.Odometry{StampNs: t * 1000, Counts: []int64{wrap(rotL), wrap(rotR)}}})
		}
		if t >= nextIMU {
			nextIMU += ocIMUPeriodUs
			if imuOn {
				z := gyro - imuBase + imuZero + ocIMUNoiseRad*r.NormFloat64()
				z = estimator.Wrap(math.Round(z/ocIMUQuantum) * ocIMUQuantum)
				stampUs := t + int64(clockOff+clockDrift*float64(t))
				run.ins = append(run.ins, ocInput{arrivalUs: t + 2000 + r.Int64N(1000),
					head: &fusion.Heading{StampNs: stampUs * 1000, HeadingRad: z}})
			}
		}
		if t >= nextCam {
			nextCam += ocCamPeriodUs
			rho := math.Exp(-ocCamPeriodUs * 1e-6 / corrS)
			for k := range ms {
				if e.camBias {
					ms[k].br = rho*ms[k].br + math.Sqrt(1-rho*rho)*ocRangeStdM/math.Sqrt2*r.NormFloat64()
					ms[k].bb = rho*ms[k].bb + math.Sqrt(1-rho*rho)*ocBearStdRad/math.Sqrt2*r.NormFloat64()
				}
			}
			if e.noCamera || (outFrom >= 0 && t >= outFrom && t < outFrom+60e6) || r.Float64() < e.lossShare {
				continue
			}
			cx, cy := x+ocCamAheadM*math.Cos(th), y+ocCamAheadM*math.Sin(th)
			arrival := t + 60000 + r.Int64N(140000)
			white := 1.0
			if e.camBias {
				white = 1 / math.Sqrt2
			}
			for k := range run.posts {
				p := &run.posts[k]
				rng := math.Hypot(p.trueX-cx, p.trueY-cy)
				bear := estimator.Wrap(math.Atan2(p.trueY-cy, p.trueX-cx) - th)
				if rng < 1 || rng > 7 || math.Abs(bear) > 0.6 {
					continue
				}
				m := &ms[k]
				if m.misreadN == 0 && r.Float64() < e.misreadShare {
					i, j := k%(int(ocRowLenM/ocPostGapM)+1), k/(int(ocRowLenM/ocPostGapM)+1)
					if as := postAt(i+1-2*r.IntN(2), j); as != nil {
						m.misreadN, m.as = 3+r.IntN(8), as
					}
				}
				name, wrong := p.id, false
				if m.misreadN > 0 {
					m.misreadN--
					name, wrong = m.as.id, true
				}
				zr := rng + m.br + white*ocRangeStdM*r.NormFloat64()
				zb := estimator.Wrap(bear + m.bb + white*ocBearStdRad*r.NormFloat64())
				run.ins = append(run.ins, ocInput{arrivalUs: arrival, misread: wrong, fix: &fusion.Fix{
					StampNs: t * 1000, SensorID: "rowcam", Kind: fusion.FixLandmark, LandmarkID: name,
					RangeM: &zr, BearingRad: &zb}})
			}
		}
	}
	slices.SortStableFunc(run.ins, func(a, b ocInput) int { return cmp.Compare(a.arrivalUs, b.arrivalUs) })
	return run
}

// ocConfig is the careful user's configuration for the carrier, from the
// README: nominal geometry and counters from the drawings, no_side_slip
// for a differential drive with lateral_slip_var_m2_per_m 2e-3 for a robot
// that creeps across a slope (20 times the default, the README's figure
// for 1% to 2% of creep), imu_mode absolute with
// imu_offset_var_rad2_per_rad at the datasheet's 1% gyro scale error
// squared and the default walk, the IMU's reading noise and quantisation,
// online scale states (an uncalibrated carrier on soft soil) with the
// forward scale walking 1e-5 a metre (soil whose rolling radius changes
// by 0.5% over some metres: 2 sigma^2 / L), the map's tape survey as
// landmark_position_std_m, the camera's spread from a static test as its
// covariance with the half that a marker keeps from frame to frame as
// correlated_fraction 0.5 over the README's 1.5 s, each marker's own
// (correlated_per_landmark, as the README tells a user of fiducial
// markers), and move recovery on.
// The IMU's clock offset is not known to the user and not configured.
func ocConfig(run *ocRun) fusion.Config {
	n := fusion.DefaultNoise()
	n.IMUOffsetVarRad2PerRad = 1e-4
	n.IMUHeadingVarRad2 = ocIMUNoiseRad*ocIMUNoiseRad + ocIMUQuantum*ocIMUQuantum/12
	n.LateralSlipVarM2PerM = 2e-3
	lms := make([]fusion.Landmark, len(run.posts))
	for k, p := range run.posts {
		lms[k] = fusion.Landmark{ID: p.id, XM: p.mapX, YM: p.mapY}
	}
	return fusion.Config{
		Wheels: []fusion.Wheel{
			{Name: "left", YM: ocTrackM / 2, CountsPerM: ocCountsPerM, CounterBits: ocCounterBits},
			{Name: "right", YM: -ocTrackM / 2, CountsPerM: ocCountsPerM, CounterBits: ocCounterBits},
		},
		NoSideSlip:           true,
		IMU:                  fusion.IMUAbsolute,
		Noise:                n,
		Recovery:             fusion.Recovery{Enabled: true},
		StartPose:            run.start,
		StartCov:             []float64{0.0025, 0, 0, 0, 0.0025, 0, 0, 0, 0.0009},
		Landmarks:            lms,
		LandmarkPositionStdM: ocMapStdM,
		Sensors: []fusion.Sensor{{ID: "rowcam", Kind: fusion.FixLandmark, Mount: estimator.Pose{X: ocCamAheadM},
			Cov:              []float64{ocRangeStdM * ocRangeStdM, 0, 0, ocBearStdRad * ocBearStdRad},
			CorrelationTimeS: 1.5, CorrelatedFraction: 0.5, CorrelatedPerLandmark: true}},
		Calibration: fusion.Calibration{Scale: true, ForwardScaleVarPerM: 1e-5},
	}
}
