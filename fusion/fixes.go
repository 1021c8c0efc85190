package fusion

import (
	"fmt"

	"reckon.example/estimator"
)

// imuSensor is the statistics name of the IMU.
const imuSensor = "imu"

// imuMeasurement returns the absolute IMU heading measurement.
func (r *Robot) imuMeasurement(z, v float64) (estimator.Measurement, error) {
	if v == 0 {
		v = r.cfg.Noise.IMUHeadingVarRad2
	}
	if !finiteAll(z) {
		return estimator.Measurement{}, badf("heading_rad is %v", z)
	}
	if !finiteAll(v) || v < minVar || v > maxAngleVar {
		return estimator.Measurement{}, badf("var_rad2 %v is outside the plausible [%g, %g]", v, minVar, maxAngleVar)
	}
	return estimator.Measurement{Kind: estimator.KindIMUHeading, Z: [3]float64{estimator.Wrap(z)}, R: [9]float64{v}}, nil
}

// fixMeasurement validates a fix and turns it into a measurement.
func (r *Robot) fixMeasurement(f *Fix) (estimator.Measurement, error) {
	m := estimator.Measurement{Mount: f.Mount}
	if !finiteAll(f.Mount.X, f.Mount.Y, f.Mount.Heading) {
		return m, badf("mount %+v is not finite", f.Mount)
	}
	switch f.Kind {
	case FixPose:
		m.Kind = estimator.KindPose
		m.Z = [3]float64{f.XM, f.YM, estimator.Wrap(f.HeadingRad)}
		if !finiteAll(f.XM, f.YM, f.HeadingRad) {
			return m, badf("pose fix x_m %v, y_m %v, heading_rad %v is not finite", f.XM, f.YM, f.HeadingRad)
		}
	case FixPosition:
		m.Kind = estimator.KindPosition
		m.Z = [3]float64{f.XM, f.YM}
		if !finiteAll(f.XM, f.YM) {
			return m, badf("position fix x_m %v, y_m %v is not finite", f.XM, f.YM)
		}
	case FixHeading:
		m.Kind = estimator.KindHeading
		m.Z = [3]float64{estimator.Wrap(f.HeadingRad)}
		if !finiteAll(f.HeadingRad) {
			return m, badf("heading fix heading_rad %v is not finite", f.HeadingRad)
		}
	case FixLandmark:
		l, ok := r.landmarks[f.LandmarkID]
		if !ok {
			return m, fmt.Errorf("%w: landmark_id %q is not in the robot's landmark map", ErrUnknownLandmark, f.LandmarkID)
		}
		m.LandmarkX, m.LandmarkY = l[0], l[1]
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
			return m, badf("landmark fix needs range_m, bearing_rad or both")
		}
		if f.RangeM != nil && (!finiteAll(*f.RangeM) || *f.RangeM <= 0) {
			return m, badf("range_m %v must be positive", *f.RangeM)
		}
		if f.BearingRad != nil && !finiteAll(*f.BearingRad) {
			return m, badf("bearing_rad %v is not finite", *f.BearingRad)
		}
	default:
		return m, badf("fix kind %d is not pose, position, heading or landmark", f.Kind)
	}
	d := m.Kind.Dim()
	if err := estimator.CheckCovariance(f.Cov, d); err != nil {
		return m, badf("cov for a %s fix (%dx%d): %v", f.Kind, d, d, err)
	}
	if err := checkVariances(f.Cov, d, func(i int) bool { return m.Kind.IsAngle(i) }); err != nil {
		return m, badf("cov for a %s fix: %v", f.Kind, err)
	}
	for i := 0; i < d; i++ {
		for j := 0; j < d; j++ {
			m.R[i*3+j] = f.Cov[i*d+j]
		}
	}
	return m, nil
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

// checkPose reports what is wrong with a reseed before it is taken.
func checkPose(pose estimator.Pose, cov []float64) error {
	if !finiteAll(pose.X, pose.Y, pose.Heading) {
		return fmt.Errorf("%w: pose is not finite", ErrBadSample)
	}
	if err := estimator.CheckCovariance(cov, 3); err != nil {
		return fmt.Errorf("%w: cov: %v", ErrBadSample, err)
	}
	if err := checkVariances(cov, 3, poseAngle); err != nil {
		return fmt.Errorf("%w: cov: %v", ErrBadSample, err)
	}
	return nil
}
