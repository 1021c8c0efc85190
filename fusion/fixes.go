package fusion

import (
	"fmt"

	"reckon.example/estimator"
)

// fixMeasurement validates a fix and turns it into a measurement of its
// sensor (DEVELOPERS.md, "Design: Sensors"); it returns the sensor's index.
func (r *Robot) fixMeasurement(f *Fix) (estimator.Measurement, int, error) {
	var m estimator.Measurement
	si := -1
	switch f.Kind {
	case FixPose:
		m.Kind = estimator.KindPose
		m.Z = [3]float64{f.XM, f.YM, estimator.Wrap(f.HeadingRad)}
		// Non-finite values keep the reason that journals already hold.
		if !finiteAll(f.XM, f.YM, f.HeadingRad) {
			return m, si, badf("pose fix x_m %v, y_m %v, heading_rad %v is not finite", f.XM, f.YM, f.HeadingRad)
		}
		if !lengthsOK(f.XM, f.YM) {
			return m, si, badf("pose fix x_m %v, y_m %v is not a field position (within %g m of the origin)", f.XM, f.YM, maxFieldM)
		}
		if !anglesOK(f.HeadingRad) {
			return m, si, badf("pose fix heading_rad %v is not an angle (finite, within %g rad of 0)", f.HeadingRad, maxAngleRad)
		}
	case FixPosition:
		m.Kind = estimator.KindPosition
		m.Z = [3]float64{f.XM, f.YM}
		if !finiteAll(f.XM, f.YM) {
			return m, si, badf("position fix x_m %v, y_m %v is not finite", f.XM, f.YM)
		}
		if !lengthsOK(f.XM, f.YM) {
			return m, si, badf("position fix x_m %v, y_m %v is not a field position (within %g m of the origin)", f.XM, f.YM, maxFieldM)
		}
	case FixHeading:
		m.Kind = estimator.KindHeading
		m.Z = [3]float64{estimator.Wrap(f.HeadingRad)}
		if !anglesOK(f.HeadingRad) {
			return m, si, badf("heading fix heading_rad %v is not an angle (finite, within %g rad of 0)", f.HeadingRad, maxAngleRad)
		}
	case FixLandmark:
		if err := r.landmarkMeasurement(f, &m); err != nil {
			return m, si, err
		}
	default:
		return m, si, badf("fix kind %d is not pose, position, heading or landmark", f.Kind)
	}
	if f.Marker != "" && f.Kind != FixPose {
		return m, si, &FieldError{Path: "marker", Err: fmt.Errorf("%w: a %s fix names marker %q; only pose fixes name their marker (a landmark fix names its landmark)", ErrBadSample, f.Kind, f.Marker)}
	}
	si, ok := r.sensorIndex[f.SensorID]
	if !ok {
		return m, -1, &FieldError{Path: "sensor_id", Err: fmt.Errorf("%w: sensor_id %q is not among the robot's configured sensors", ErrUnknownSensor, f.SensorID)}
	}
	if err := r.cfg.Sensors[si].sensorFix(f, r.sensorBias[si], r.sensorMount[si], &m); err != nil {
		return m, si, err
	}
	return m, si, nil
}

// Plausible variances: a standard deviation between 1 micrometre (or
// microradian) and 10 km for lengths or 10 rad for angles. Outside that a
// covariance is a unit mistake or garbage, and it would wreck the filter's
// numerics.
const (
	minVar      = 1e-12
	maxLenVar   = 1e8
	maxAngleVar = 100.0
)

// checkVariances checks the diagonal of a d x d covariance whose components
// are angles where angle(i) is true.
func checkVariances(cov []float64, d int, angle func(i int) bool) error {
	for i := 0; i < d; i++ {
		v, hi := cov[i*d+i], maxLenVar
		if angle(i) {
			hi = maxAngleVar
		}
		if v < minVar || v > hi {
			return fmt.Errorf("variance %d is %g, outside the plausible [%g, %g]", i, v, minVar, hi)
		}
	}
	return nil
}

func poseAngle(i int) bool { return i == 2 }

// decideMeas turns the outcome of an inserted measurement into its verdict,
// taking it back if it failed.
func (r *Robot) decideMeas(res *Result, ins *insertion, sensor string) {
	e := &r.live()[ins.at]
	res.NIS, res.Dim = e.out.NIS, e.out.Dim
	switch {
	case e.failed:
		err := fmt.Errorf("%w: %w", ErrBadSample, r.errOf(e.seq))
		idx := e.sensor
		r.takeBack(ins)
		res.Verdict, res.Err = VerdictInvalid, err
		r.stats.count(VerdictInvalid, false)
		r.stats.sensorVerdict(idx, VerdictInvalid, 0, 0)
		r.trust.fault = true
	case e.out.Gated:
		res.Verdict = VerdictGated
		res.Events = append(res.Events, Event{Kind: EventFixRefused, StampNs: e.t1, SensorID: sensor, Value: e.out.NIS,
			Detail: fmt.Sprintf("NIS %.1f above the %d-dof gate %.1f", e.out.NIS, e.out.Dim, r.gates.For(e.out.Dim).Threshold())})
		r.stats.count(VerdictGated, false)
		r.stats.sensorVerdict(e.sensor, VerdictGated, e.out.NIS, 0)
		if !e.imu {
			r.trust.noteRefused(e.out, r.frameApplied(ins.at))
			r.considerRecovery(res, ins.at)
		}
	default:
		res.Verdict = VerdictApplied
		r.stats.count(VerdictApplied, false)
		if e.initialised {
			r.stats.sensorVerdict(e.sensor, VerdictApplied, 0, 0)
		} else {
			r.stats.sensorVerdict(e.sensor, VerdictApplied, e.out.NIS, e.out.Dim)
			if e.imu {
				r.trust.imu.add(e.out.NIS, e.out.Dim)
			} else {
				r.trust.fixes.add(e.out.NIS, e.out.Dim)
			}
		}
		if !e.imu {
			r.fixApplied(ins.at)
			held := !r.confirmsReseed(e.marker)
			r.clearCandidates()
			if held {
				r.holdReseed(e.marker)
			}
		} else {
			r.checkTurn(res, ins.at)
		}
	}
}

// applyMeas applies a measurement entry to the filter: the first IMU
// heading since the pose was set initialises the IMU offset, every other
// measurement updates through its gate.
func (r *Robot) applyMeas(e *entry) error {
	e.out = estimator.Outcome{Dim: e.meas.Kind.Dim()}
	e.initialised = e.imu && !r.ready
	if e.initialised {
		return r.initOffset(e)
	}
	e.meas.Hold = r.scaleHold()
	if err := r.landmarkBlock(e); err != nil {
		return err
	}
	var err error
	if extra, ok := r.repeatExtra(e); ok {
		e.out, err = r.f.UpdateRepeat(&e.meas, r.gateFor(e), &extra)
	} else {
		e.out, err = r.f.Update(&e.meas, r.gateFor(e))
	}
	if e.seeded && (err != nil || e.out.Gated) {
		r.unseed(e)
	}
	return err
}

// excitedAt is the least excitation, in the odometry's own standard
// deviations, at which an update may move an odometry scale.
const excitedAt = 3.0

// scaleHold returns the odometry scales that the next update must leave
// where they are (estimator.Measurement.Hold): those the motion since the
// last updates has not excited beyond the odometry's own noise
// (DEVELOPERS.md, "Design: State"). A scale s enters the pose through the
// reported step, c = P[pose, s] / P[s, s] is the reported motion it has
// scaled (the accumulated turn for the turn scale, discounted by the
// updates since), and e = c^T P[pose]^-1 c compares that motion with the
// pose's uncertainty, which bounds the odometry noise it accumulated
// with. Below excitedAt^2 the motion is mostly that noise, and an update
// would regress the noise on itself and pull the scale towards 0 (errors
// in variables); the relative pull is at most 1/e.
func (r *Robot) scaleHold() uint16 {
	l := &r.layout
	fi := l.ForwardScale()
	if fi < 0 {
		return 0
	}
	st := r.f.State()
	var pose [9]float64
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			pose[a*3+b] = st.At(a, b)
		}
	}
	var hold uint16
	// The forward scale scales travel: its motion is in position.
	v := st.Var(fi)
	c := [3]float64{st.At(0, fi) / v, st.At(1, fi) / v}
	pos := [9]float64{st.At(0, 0), st.At(0, 1), 0, st.At(1, 0), st.At(1, 1), 0, 0, 0, 1}
	for a := 0; a < 2; a++ {
		for b := 0; b < 2; b++ {
			pos[a*3+b] -= c[a] * c[b] * v
		}
	}
	if e, ok := estimator.Mahalanobis(&c, &pos); !ok || e < excitedAt*excitedAt {
		hold |= 1 << fi
	}
	// The turn scale scales turns: its motion is in heading.
	ti := l.TurnScale()
	v = st.Var(ti)
	u := st.At(2, ti) / v
	if rest := st.Var(2) - u*u*v; !(u*u >= excitedAt*excitedAt*rest) {
		hold |= 1 << ti
	}
	return hold
}

// landmarkMeasurement fills m with a landmark fix's range and/or bearing.
func (r *Robot) landmarkMeasurement(f *Fix, m *estimator.Measurement) error {
	l, ok := r.landmarks[f.LandmarkID]
	if !ok {
		return fmt.Errorf("%w: landmark_id %q is not in the robot's landmark map", ErrUnknownLandmark, f.LandmarkID)
	}
	m.LandmarkX, m.LandmarkY = l.xy[0], l.xy[1]
	switch {
	case f.RangeM != nil && f.BearingRad != nil:
		m.Kind = estimator.KindRangeBearing
		m.Z = [3]float64{*f.RangeM, estimator.Wrap(*f.BearingRad)}
	case f.RangeM != nil:
		m.Kind = estimator.KindRange
		m.Z = [3]float64{*f.RangeM}
	case f.BearingRad != nil:
		m.Kind = estimator.KindBearing
		m.Z = [3]float64{estimator.Wrap(*f.BearingRad)}
	default:
		return badf("landmark fix needs range_m, bearing_rad or both")
	}
	if f.RangeM != nil && (!finiteAll(*f.RangeM) || *f.RangeM <= 0) {
		return badf("range_m %v must be positive", *f.RangeM)
	}
	if f.RangeM != nil && !lengthsOK(*f.RangeM) {
		return badf("range_m %v is more than %g m", *f.RangeM, maxFieldM)
	}
	if f.BearingRad != nil && !anglesOK(*f.BearingRad) {
		return badf("bearing_rad %v is not an angle (finite, within %g rad of 0)", *f.BearingRad, maxAngleRad)
	}
	return nil
}

// AddFix takes one absolute fix. It is placed at its capture time, its
// stamp less its sensor's latency.
func (r *Robot) AddFix(fx Fix) Result {
	m, si, err := r.fixMeasurement(&fx)
	if err != nil {
		return refused(err)
	}
	t, err := readAt(fx.StampNs, r.cfg.Sensors[si].LatencyNs, "the sensor's latency_ns")
	if err != nil {
		return refused(err)
	}
	res := r.next()
	id := fx.SensorID
	e := entry{kind: entMeas, t0: t, t1: t, seq: res.Seq, meas: m, sensor: r.statsSensor(id, r.cfg.GateProbability)}
	if fx.Kind == FixLandmark {
		e.lm = r.landmarks[fx.LandmarkID].id
	}
	e.marker = markerKey(fx.Marker)
	return r.finish(r.addMeasurement(res, &e, id))
}
