package fusion

import (
	"fmt"

	"reckon.example/estimator"
)

// IMUMode says how a robot uses its IMU's heading.
type IMUMode uint8

const (
	// IMUNone: no IMU; the state is (x, y, heading).
	IMUNone IMUMode = iota
	// IMUAbsolute: the IMU's heading updates the estimate through the
	// IMU offset state (x, y, heading, imu_offset). The default choice when
	// the wheels determine rotation.
	IMUAbsolute
	// IMURotation: the IMU's heading difference over each odometry interval
	// is the turn row of the body step (for layouts whose wheels cannot see
	// rotation). The IMU heading must come with each odometry sample.
	IMURotation
)

// imuSensor is the statistics name of the IMU.
const imuSensor = "imu"

// imuMeasurement returns the absolute IMU heading measurement.
func (r *Robot) imuMeasurement(z, v float64) (estimator.Measurement, error) {
	if v == 0 {
		v = r.cfg.Noise.IMUHeadingVarRad2
	}
	if !anglesOK(z) {
		return estimator.Measurement{}, badf("heading_rad %v is not an angle (finite, within %g rad of 0)", z, maxAngleRad)
	}
	if !finiteAll(v) || v < minVar || v > maxAngleVar {
		return estimator.Measurement{}, badf("var_rad2 %v is outside the plausible [%g, %g]", v, minVar, maxAngleVar)
	}
	// The counted heading the IMU is compared with is off the true one by
	// the latest counts' quantisation, which does not add up along the way
	// and so is no process noise (Config.countsTurnVar).
	return estimator.Measurement{Kind: estimator.KindIMUHeading, Z: [3]float64{estimator.Wrap(z)}, R: [9]float64{v + r.quantTurnVar}}, nil
}

// odometryHeading applies the absolute IMU heading z that came with the
// odometry sample of res, at the interval's end t.
func (r *Robot) odometryHeading(res *Result, t int64, z float64) {
	m, err := r.imuMeasurement(z, 0)
	if err != nil {
		return
	}
	// Read imu_latency_ns before the odometry's stamp; an odometry stamp
	// too near int64's least leaves it at the odometry's.
	if read, err := readAt(t, r.cfg.IMULatencyNs, "imu_latency_ns"); err == nil {
		t = read
	}
	e := entry{kind: entMeas, t0: t, t1: t, seq: res.Seq, meas: m, imu: true, sensor: r.statsSensor(imuSensor, r.imuGate())}
	var ins insertion
	r.insert(&e, &ins)
	r.decideMeas(res, &ins, imuSensor)
	if res.Verdict == VerdictInvalid {
		// The heading's update failed and was taken back (a numerical
		// fault, which trust now reports, and the IMU's statistics count);
		// the odometry it came with stays applied, so the sample is.
		res.Verdict, res.Err = VerdictApplied, nil
	}
}

// AddHeading takes one absolute IMU heading sample.
func (r *Robot) AddHeading(h Heading) Result {
	if r.cfg.IMU != IMUAbsolute {
		return refused(fmt.Errorf("%w: heading sample for imu_mode %s (send the IMU heading with odometry in rotation mode)", ErrNoIMU, r.cfg.IMU))
	}
	m, err := r.imuMeasurement(h.HeadingRad, h.VarRad2)
	if err != nil {
		return refused(err)
	}
	t, err := readAt(h.StampNs, r.cfg.IMULatencyNs, "imu_latency_ns")
	if err != nil {
		return refused(err)
	}
	res := r.next()
	e := entry{kind: entMeas, t0: t, t1: t, seq: res.Seq, meas: m, imu: true, sensor: r.statsSensor(imuSensor, r.imuGate())}
	return r.finish(r.addMeasurement(res, &e, imuSensor))
}

// imuGate is the gate probability IMU headings pass (1: not gated).
func (r *Robot) imuGate() float64 {
	if r.cfg.GateIMU {
		return r.cfg.GateProbability
	}
	return 1
}

// noteIMU notes the IMU heading of an accepted odometry sample o in
// rotation mode, the start of the next interval's IMU turn. A body step
// without one leaves the IMU's heading at its end unknown: the next wheel
// sample's interval then starts no IMU turn and is its reference
// (referenceIMU, a gap in odometry). Kept, the heading before the step
// started it, and the IMU's turn over the step entered the wheel sample's
// turn row too, counted twice (0.09 rad off after 0.1 s of body steps
// in a spin at 1 rad/s, and after 0.3 s every later wheel sample refused
// as turning past max_turn_rate_rad_per_s; TestRotationIMUAcrossBodySteps).
func (r *Robot) noteIMU(o *Odometry) {
	switch {
	case r.cfg.IMU != IMURotation:
	case o.IMUHeadingRad != nil:
		v := *o.IMUHeadingRad
		r.lastIMU = &v
	case o.Step != nil:
		r.lastIMU = nil
	}
}

// referenceIMU takes the first IMU heading in rotation mode as the
// reference for the next interval: this interval's motion cannot be
// resolved.
func (r *Robot) referenceIMU(o *Odometry, res *odoResult) {
	r.noteCounts(o)
	if !r.started {
		r.start(o.StampNs)
	} else {
		res.gapNs = o.StampNs - r.newest
		r.newest = o.StampNs
	}
	r.noteIMU(o)
}

// initOffset initialises the IMU offset from the first IMU heading since
// the pose was set (DEVELOPERS.md, "Design: State").
func (r *Robot) initOffset(e *entry) error {
	err := r.f.InitOffset(e.meas.Z[0], e.meas.R[0])
	r.ready = err == nil
	return err
}

// gateFor returns the gate of a measurement entry: IMU headings pass
// ungated unless gate_imu is set.
func (r *Robot) gateFor(e *entry) estimator.Gate {
	if e.imu && !r.cfg.GateIMU {
		return estimator.NoGate()
	}
	return r.gates.For(e.meas.Kind.Dim())
}
