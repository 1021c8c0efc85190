package convert

import (
	"fmt"
	"math"

	"google.golang.org/protobuf/proto"

	"reckon.example/estimator"
	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
)

// ConfigFromProto converts a wire configuration and validates it. Errors
// wrap fusion.ErrConfig and name the field as the proto spells it.
func ConfigFromProto(c *pb.RobotConfig) (fusion.Config, error) {
	var cfg fusion.Config
	if c == nil {
		return cfg, fusion.FieldErrorf(fusion.ErrConfig, "config", "missing")
	}
	for _, w := range c.GetWheels() {
		cfg.Wheels = append(cfg.Wheels, fusion.Wheel{Name: w.GetName(), XM: w.GetXM(), YM: w.GetYM(), DirectionRad: w.GetDirectionRad(),
			CountsPerM: w.GetCountsPerM(), CounterBits: int(w.GetCounterBits())})
	}
	cfg.NoSideSlip = c.GetNoSideSlip()
	if c.GetImuMode() == pb.ImuMode_IMU_MODE_UNSPECIFIED {
		cfg.IMU = fusion.IMUNone
	} else if m, ok := fusion.ValueOfProto(imuModeLabels, int32(c.GetImuMode())); ok {
		cfg.IMU = m
	} else {
		return cfg, fusion.FieldErrorf(fusion.ErrConfig, "imu_mode", "%d is not a known mode", c.GetImuMode())
	}
	n := c.GetNoise()
	cfg.Noise = fusion.Noise{
		WheelVarM2PerM:         n.GetWheelVarM2PerM(),
		LateralSlipVarM2PerM:   n.GetLateralSlipVarM2PerM(),
		TurnVarRad2PerRad:      n.GetTurnVarRad2PerRad(),
		HeadingVarRad2PerS:     n.GetHeadingVarRad2PerS(),
		StepForwardVarM2PerM:   n.GetStepForwardVarM2PerM(),
		StepLeftVarM2PerM:      n.GetStepLeftVarM2PerM(),
		StepTurnVarRad2PerRad:  n.GetStepTurnVarRad2PerRad(),
		IMUHeadingVarRad2:      n.GetImuHeadingVarRad2(),
		IMUTurnVarRad2PerRad:   n.GetImuTurnVarRad2PerRad(),
		IMUOffsetVarRad2PerS:   n.GetImuOffsetVarRad2PerS(),
		StepForwardVarM2PerS:   n.GetStepForwardVarM2PerS(),
		StepLeftVarM2PerS:      n.GetStepLeftVarM2PerS(),
		StepTurnVarRad2PerS:    n.GetStepTurnVarRad2PerS(),
		IMUOffsetVarRad2PerRad: n.GetImuOffsetVarRad2PerRad(),
	}
	cfg.GateProbability = c.GetGateProbability()
	cfg.GateIMU = c.GetGateImu()
	cfg.WindowNs = c.GetWindowNs()
	cfg.MaxHeld = int(c.GetMaxHeld())
	cfg.MaxHoldAheadNs = c.GetMaxHoldAheadNs()
	cfg.MaxExtrapolationNs = c.GetMaxExtrapolationNs()
	cfg.MaxOdometryGapNs = c.GetMaxOdometryGapNs()
	cfg.IMULatencyNs = c.GetImuLatencyNs()
	cfg.LandmarkPositionStdM = c.GetLandmarkPositionStdM()
	cfg.MaxSpeedMPerS = c.GetMaxSpeedMPerS()
	cfg.MaxTurnRateRadPerS = c.GetMaxTurnRateRadPerS()
	cfg.Recovery = fusion.Recovery{Enabled: c.GetRecovery().GetEnabled(), Count: int(c.GetRecovery().GetCount()), AgreeProbability: c.GetRecovery().GetAgreeProbability(),
		DistinctMarkers: int(c.GetRecovery().GetDistinctMarkers())}
	t := c.GetTrust()
	cfg.Trust = fusion.TrustLimits{MaxPosition95M: t.GetMaxPosition95M(), MaxHeadingStdRad: t.GetMaxHeadingStdRad(), NISWindow: int(t.GetNisWindow()),
		ConsistencyProbability: t.GetConsistencyProbability(), RefusedInARow: int(t.GetRefusedInARow())}
	cfg.StartPose = poseFromProto(c.GetStartPose())
	if ic := c.GetStartCovariance(); ic != nil {
		v, err := covFromProto(ic, 3)
		if err != nil {
			return cfg, fusion.FieldErrorf(fusion.ErrConfig, "start_covariance", "%v", err)
		}
		cfg.StartCov = v
	}
	for _, l := range c.GetLandmarks() {
		cfg.Landmarks = append(cfg.Landmarks, fusion.Landmark{ID: l.GetId(), XM: l.GetXM(), YM: l.GetYM(), PositionStdM: l.GetPositionStdM()})
	}
	for i, s := range c.GetSensors() {
		fs, err := sensorFromProto(s, fmt.Sprintf("sensors[%d]", i))
		if err != nil {
			return cfg, err
		}
		cfg.Sensors = append(cfg.Sensors, fs)
	}
	k := c.GetCalibration()
	cfg.Calibration = fusion.Calibration{Scale: k.GetScale(), ScaleStd: k.GetScaleStd(), ForwardScaleVarPerM: k.GetForwardScaleVarPerM(),
		TurnScaleVarPerRad: k.GetTurnScaleVarPerRad(), RateBias: k.GetRateBias(), RateBiasStdRadPerS: k.GetRateBiasStdRadPerS(),
		RateBiasVarRad2PerS3: k.GetRateBiasVarRad2PerS3(), NoiseRatioStd: k.GetNoiseRatioStd(), GyroScaleStd: k.GetGyroScaleStd()}
	if err := cfg.Validate(); err != nil {
		return cfg, err
	}
	return cfg, nil
}

// ConfigToProto converts a configuration to the wire.
func ConfigToProto(cfg fusion.Config) *pb.RobotConfig {
	c := &pb.RobotConfig{
		NoSideSlip:           cfg.NoSideSlip,
		GateProbability:      cfg.GateProbability,
		GateImu:              cfg.GateIMU,
		WindowNs:             cfg.WindowNs,
		MaxHeld:              int32(cfg.MaxHeld),
		MaxHoldAheadNs:       cfg.MaxHoldAheadNs,
		MaxExtrapolationNs:   cfg.MaxExtrapolationNs,
		MaxOdometryGapNs:     cfg.MaxOdometryGapNs,
		ImuLatencyNs:         cfg.IMULatencyNs,
		LandmarkPositionStdM: cfg.LandmarkPositionStdM,
		MaxSpeedMPerS:        cfg.MaxSpeedMPerS,
		MaxTurnRateRadPerS:   cfg.MaxTurnRateRadPerS,
		Recovery: &pb.MoveRecovery{Enabled: cfg.Recovery.Enabled, Count: int32(cfg.Recovery.Count), AgreeProbability: cfg.Recovery.AgreeProbability,
			DistinctMarkers: int32(cfg.Recovery.DistinctMarkers)},
		Trust: &pb.TrustLimits{MaxPosition95M: cfg.Trust.MaxPosition95M, MaxHeadingStdRad: cfg.Trust.MaxHeadingStdRad, NisWindow: int32(cfg.Trust.NISWindow),
			ConsistencyProbability: cfg.Trust.ConsistencyProbability, RefusedInARow: int32(cfg.Trust.RefusedInARow)},
		StartPose: poseToProto(cfg.StartPose),
	}
	for _, w := range cfg.Wheels {
		c.Wheels = append(c.Wheels, &pb.EncoderWheel{Name: w.Name, XM: w.XM, YM: w.YM, DirectionRad: w.DirectionRad, CountsPerM: w.CountsPerM, CounterBits: int32(w.CounterBits)})
	}
	c.ImuMode = pb.ImuMode(fusion.ProtoOf(imuModeLabels, cfg.IMU))
	n := cfg.Noise
	c.Noise = &pb.NoiseModel{WheelVarM2PerM: n.WheelVarM2PerM, LateralSlipVarM2PerM: n.LateralSlipVarM2PerM, TurnVarRad2PerRad: n.TurnVarRad2PerRad,
		HeadingVarRad2PerS: n.HeadingVarRad2PerS, StepForwardVarM2PerM: n.StepForwardVarM2PerM, StepLeftVarM2PerM: n.StepLeftVarM2PerM,
		StepTurnVarRad2PerRad: n.StepTurnVarRad2PerRad, ImuHeadingVarRad2: n.IMUHeadingVarRad2, ImuTurnVarRad2PerRad: n.IMUTurnVarRad2PerRad,
		ImuOffsetVarRad2PerS: n.IMUOffsetVarRad2PerS, StepForwardVarM2PerS: n.StepForwardVarM2PerS, StepLeftVarM2PerS: n.StepLeftVarM2PerS,
		StepTurnVarRad2PerS: n.StepTurnVarRad2PerS, ImuOffsetVarRad2PerRad: n.IMUOffsetVarRad2PerRad}
	if cfg.StartCov != nil {
		c.StartCovariance = &pb.Covariance{Dimension: 3, Values: append([]float64(nil), cfg.StartCov...)}
	}
	for _, l := range cfg.Landmarks {
		c.Landmarks = append(c.Landmarks, &pb.Landmark{Id: l.ID, XM: l.XM, YM: l.YM, PositionStdM: l.PositionStdM})
	}
	for _, s := range cfg.Sensors {
		ps := &pb.FixSensor{Id: s.ID, Kind: pb.FixKind(fusion.ProtoOf(fixKindLabels, s.Kind)), Mount: poseToProto(s.Mount),
			LatencyNs: s.LatencyNs, CorrelationTimeS: s.CorrelationTimeS, CorrelatedFraction: s.CorrelatedFraction,
			Robust: pb.RobustLoss(fusion.ProtoOf(robustLabels, s.Robust)), RobustParameter: s.RobustParameter,
			CorrelatedPerLandmark: s.CorrelatedPerLandmark}
		if s.Cov != nil {
			d := int(math.Round(math.Sqrt(float64(len(s.Cov)))))
			ps.Covariance = &pb.Covariance{Dimension: uint32(d), Values: append([]float64(nil), s.Cov...)}
		}
		if m := s.MountStd; m != [3]float64{} {
			ps.MountStd = &pb.MountStd{XM: m[0], YM: m[1], HeadingRad: m[2]}
		}
		c.Sensors = append(c.Sensors, ps)
	}
	k := cfg.Calibration
	if k != (fusion.Calibration{}) {
		c.Calibration = &pb.OdometryCalibration{Scale: k.Scale, ScaleStd: k.ScaleStd, ForwardScaleVarPerM: k.ForwardScaleVarPerM,
			TurnScaleVarPerRad: k.TurnScaleVarPerRad, RateBias: k.RateBias, RateBiasStdRadPerS: k.RateBiasStdRadPerS,
			RateBiasVarRad2PerS3: k.RateBiasVarRad2PerS3, NoiseRatioStd: k.NoiseRatioStd, GyroScaleStd: k.GyroScaleStd}
	}
	return c
}

// sensorFromProto converts one wire sensor; field is its path.
func sensorFromProto(s *pb.FixSensor, field string) (fusion.Sensor, error) {
	out := fusion.Sensor{ID: s.GetId(), Mount: poseFromProto(s.GetMount()), LatencyNs: s.GetLatencyNs(),
		CorrelationTimeS: s.GetCorrelationTimeS(), CorrelatedFraction: s.GetCorrelatedFraction(), CorrelatedPerLandmark: s.GetCorrelatedPerLandmark(),
		RobustParameter: s.GetRobustParameter(),
		MountStd:        [3]float64{s.GetMountStd().GetXM(), s.GetMountStd().GetYM(), s.GetMountStd().GetHeadingRad()}}
	k, ok := fusion.ValueOfProto(fixKindLabels, int32(s.GetKind()))
	if !ok {
		return out, fusion.FieldErrorf(fusion.ErrConfig, field+".kind", "%d is not pose, position, heading or landmark", s.GetKind())
	}
	out.Kind = k
	if s.GetRobust() != pb.RobustLoss_ROBUST_LOSS_UNSPECIFIED {
		r, ok := fusion.ValueOfProto(robustLabels, int32(s.GetRobust()))
		if !ok {
			return out, fusion.FieldErrorf(fusion.ErrConfig, field+".robust", "%d is not none, huber or student_t", s.GetRobust())
		}
		out.Robust = r
	}
	if s.GetCovariance() != nil {
		d := map[fusion.FixKind]int{fusion.FixPose: 3, fusion.FixPosition: 2, fusion.FixHeading: 1, fusion.FixLandmark: 2}[k]
		v, err := covFromProto(s.GetCovariance(), d)
		if err != nil {
			return out, fusion.FieldErrorf(fusion.ErrConfig, field+".covariance", "%v", err)
		}
		out.Cov = v
	}
	return out, nil
}

func poseFromProto(p *pb.FloorPose) estimator.Pose {
	return estimator.Pose{X: p.GetXM(), Y: p.GetYM(), Heading: p.GetHeadingRad()}
}

func poseToProto(p estimator.Pose) *pb.FloorPose {
	return &pb.FloorPose{XM: p.X, YM: p.Y, HeadingRad: p.Heading}
}

// covFromProto checks a covariance's stated dimension and size.
func covFromProto(c *pb.Covariance, want int) ([]float64, error) {
	if c == nil {
		return nil, fmt.Errorf("missing (want %dx%d)", want, want)
	}
	if int(c.GetDimension()) != want {
		return nil, fmt.Errorf("dimension %d, want %d", c.GetDimension(), want)
	}
	if len(c.GetValues()) != want*want {
		return nil, fmt.Errorf("%d values for dimension %d, want %d", len(c.GetValues()), want, want*want)
	}
	if err := estimator.CheckCovariance(c.GetValues(), want); err != nil {
		return nil, err
	}
	return c.GetValues(), nil
}

// DifferingFields names the top-level fields in which a and b, two
// messages of one type, differ.
func DifferingFields(a, b proto.Message) []string {
	ma, mb := a.ProtoReflect(), b.ProtoReflect()
	fields := ma.Descriptor().Fields()
	var out []string
	for i := range fields.Len() {
		fd := fields.Get(i)
		if ma.Has(fd) != mb.Has(fd) || !ma.Get(fd).Equal(mb.Get(fd)) {
			out = append(out, string(fd.Name()))
		}
	}
	return out
}
