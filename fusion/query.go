package fusion

import (
	"fmt"
	"math"

	"reckon.example/estimator"
)

// BodyVelocity is a body-frame velocity.
type BodyVelocity struct {
	ForwardMPerS, LeftMPerS, TurnRadPerS float64
}

// FusedPose is the estimate at one stamp.
type FusedPose struct {
	StampNs int64
	Pose    estimator.Pose
	// Cov is the 3x3 row-major covariance of (x, y, heading): m^2, m*rad, rad^2.
	Cov [9]float64
	// IMUOffsetRad and IMUOffsetVarRad2 are the IMU's heading zero and its
	// variance, when the robot has the offset state and it is initialised.
	IMUOffsetRad, IMUOffsetVarRad2 float64
	IMUOffsetReady                 bool
	// Velocity is the mean body velocity over the last 50 ms of odometry.
	Velocity BodyVelocity
	// Position95M is the 95% position ellipse's major semi-axis, metres;
	// HeadingStdRad the heading standard deviation.
	Position95M, HeadingStdRad float64
	// Distrust is why the estimate should not be trusted (0: trusted).
	Distrust TrustReason
	// Extrapolated: the stamp is past the newest odometry.
	Extrapolated bool
}

// Trusted reports whether no reason to distrust the estimate is known.
func (p *FusedPose) Trusted() bool { return p.Distrust == 0 }

func (r *Robot) fused(stamp int64, st *estimator.State, ready bool) FusedPose {
	fp := FusedPose{StampNs: stamp, Pose: st.Pose(), Distrust: r.trust.reasons, IMUOffsetReady: ready && r.layout.Offset() >= 0}
	st.PoseCovarianceInto(&fp.Cov)
	if fp.IMUOffsetReady {
		fp.IMUOffsetRad, fp.IMUOffsetVarRad2 = st.MeanAt(estimator.IOffset), st.Var(estimator.IOffset)
	}
	fp.Position95M = st.Position95()
	fp.HeadingStdRad = math.Sqrt(st.Var(estimator.IHead))
	fp.Velocity = r.velocity()
	return fp
}

// Pose returns the estimate at the newest odometry.
func (r *Robot) Pose() FusedPose {
	st := r.f.State()
	return r.fused(r.newest, &st, r.ready)
}

// PoseAt returns the estimate at stampNs: inside the window it is the
// filtered estimate at that stamp (an interval is split by its twist
// fraction); past the newest odometry it is extrapolated at the recent
// velocity, at most max_extrapolation_ns, with the process noise of that
// motion. The robot is not changed.
func (r *Robot) PoseAt(stampNs int64) (FusedPose, error) {
	if !r.started {
		return FusedPose{}, fmt.Errorf("%w: no odometry yet", ErrTooOld)
	}
	if stampNs < r.baseT {
		return FusedPose{}, fmt.Errorf("%w: stamp_ns %d is before the window start %d", ErrTooOld, stampNs, r.baseT)
	}
	if stampNs > r.newest {
		ahead := nsAfter(stampNs, r.newest)
		if ahead > uint64(r.cfg.MaxExtrapolationNs) {
			return FusedPose{}, fmt.Errorf("%w: stamp_ns %d is %.3f s past the newest odometry (max_extrapolation_ns %d)", ErrTooFarAhead, stampNs, float64(ahead)*1e-9, r.cfg.MaxExtrapolationNs)
		}
		st := r.f.State()
		r.scratch.SetState(&st)
		v := r.velocity()
		dt := float64(ahead) * 1e-9
		step := estimator.Step{ForwardM: v.ForwardMPerS * dt, LeftM: v.LeftMPerS * dt, TurnRad: v.TurnRadPerS * dt}
		var cov [9]float64
		var q [estimator.MaxStates]float64
		r.cfg.Noise.stepNoise(&cov, step, dt)
		r.processNoise(&q, step, dt)
		r.scratch.Predict(step, &cov, dt, &q)
		out := r.scratch.State()
		fp := r.fused(stampNs, &out, r.ready)
		fp.Extrapolated = true
		return fp, nil
	}
	i := r.locate(stampNs)
	live := r.live()
	cp := r.before(i)
	if i < len(live) && live[i].kind == entOdo && live[i].t0 < stampNs {
		var a entry
		splitOdo(&live[i], stampNs, &a, nil)
		r.scratch.SetState(&cp.est)
		r.predict(r.scratch, &a)
		st := r.scratch.State()
		return r.fused(stampNs, &st, cp.offsetReady), nil
	}
	st := cp.est
	return r.fused(stampNs, &st, cp.offsetReady), nil
}

// velocity returns the mean body velocity over at least the last 50 ms of
// odometry in the window (or all of it).
func (r *Robot) velocity() BodyVelocity {
	live := r.live()
	var a, b, th float64
	var dt int64
	for i := len(live) - 1; i >= 0 && dt < 50e6; i-- {
		e := &live[i]
		if e.kind != entOdo {
			continue
		}
		a += e.step.ForwardM
		b += e.step.LeftM
		th += e.step.TurnRad
		dt += e.t1 - e.t0
	}
	if dt == 0 {
		return BodyVelocity{}
	}
	s := 1e9 / float64(dt)
	return BodyVelocity{a * s, b * s, th * s}
}
