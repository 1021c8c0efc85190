package estimator

import (
	"fmt"
	"math"
)

// MaxStates is the largest state the filter holds: the pose (3), the IMU
// offset (1), the odometry calibration (up to 3), the gyro scale (1) and the bias blocks of
// correlated sensors in what is left. Every matrix of the filter is a
// fixed-size array of this order, so that nothing allocates.
const MaxStates = 12

// stride is the row stride of state-sized matrices.
const stride = MaxStates

// maxBlocks bounds the bias blocks: each takes at least one state after
// the pose and the IMU offset.
const maxBlocks = MaxStates - 4

// BiasSpec describes the bias block of one sensor whose error is partly
// exponentially correlated (first-order Gauss-Markov): Dim states in the
// sensor's measurement space (its components, in the order of the
// measurement), which decay over dt seconds by phi = exp(-dt/TauS) and gain
// the variance (1 - phi^2) Cov, so that Cov is their stationary covariance
// (DEVELOPERS.md, "Design: Sensors").
//
// A mount block (Mount set) is instead the error of a sensor's configured
// mount: three states (x, y and heading of the mount, metres and radians)
// that stay constant (TauS is ignored), with prior covariance Cov; a
// measurement names it in Measurement.MountError.
type BiasSpec struct {
	// Dim is the block's size, 1 to 3 (3 for a mount block, 2 for a
	// landmark block).
	Dim int
	// TauS is the correlation time in seconds (> 0).
	TauS float64
	// Mount makes the block a mount block.
	Mount bool
	// Landmark makes the block a landmark block.
	Landmark bool
	// Cov is the stationary covariance, Dim x Dim row-major with stride 3,
	// in the units of the measurement's components (m^2, rad^2).
	Cov [9]float64
}

// LayoutSpec says which optional states a filter has. The state is
// [x, y, heading], then imu_offset, then forward_scale and turn_scale, then
// the heading-rate bias, then the gyro scale, then one bias block per
// entry of Biases, each present only when asked for.
type LayoutSpec struct {
	// IMUOffset adds the absolute IMU's heading zero (radians).
	IMUOffset bool
	// OdometryScale adds forward_scale and turn_scale (dimensionless, near
	// 1): the true step is (s_f forward, s_f left, s_t turn).
	OdometryScale bool
	// RateBias adds the heading-rate bias b_r (rad/s): the true turn gains
	// b_r dt.
	RateBias bool
	// GyroScale adds the absolute IMU's gyro scale g (dimensionless, near
	// 0; needs IMUOffset): the IMU's heading zero moves by g times the
	// IMU's own turn between its headings (Filter.Update of an IMU
	// heading; DEVELOPERS.md, "Design: State").
	GyroScale bool
	// NoiseRatioStd is, with OdometryScale, the standard deviation of the
	// consider parameter of the turn scale's errors-in-variables
	// compensation: the reported steps' true noise is (1 + d) times the
	// one PredictReported is given (State's eivc). 0 takes that noise
	// for the truth, as the compensation did before it carried its own
	// uncertainty.
	NoiseRatioStd float64
	// Biases are the bias blocks of correlated sensors, in order.
	Biases []BiasSpec
}

// Layout is the state vector's layout: the size and the index of every
// optional state (-1 where absent). It is a plain value without pointers.
// Make it with NewLayout; the zero value is not usable.
type Layout struct {
	n                                     int
	offset, forwardScale, turnScale, rate int
	gyro                                  int
	blocks                                [maxBlocks]biasBlock
	nb                                    int
	// cons has bit i set for each consider state i (consider).
	cons uint16
	// eivVar is LayoutSpec.NoiseRatioStd squared, with a turn scale.
	eivVar float64
}

// biasBlock is a placed BiasSpec.
type biasBlock struct {
	at int
	BiasSpec
}

// NewLayout places the states spec asks for. It returns an error wrapping
// ErrShape if they exceed MaxStates, and one naming the block if a bias
// block's size, correlation time or covariance is unusable.
func NewLayout(spec LayoutSpec) (Layout, error) {
	l := Layout{n: 3, offset: -1, forwardScale: -1, turnScale: -1, rate: -1, gyro: -1}
	next := func() int { l.n++; return l.n - 1 }
	if spec.IMUOffset {
		l.offset = next()
	}
	if spec.OdometryScale {
		// Its square too: 1e155 is finite, its square is not.
		l.eivVar = spec.NoiseRatioStd * spec.NoiseRatioStd
		if !(spec.NoiseRatioStd >= 0) || math.IsInf(l.eivVar, 0) {
			return Layout{}, fmt.Errorf("noise ratio standard deviation %v: %w", spec.NoiseRatioStd, ErrNotFinite)
		}
		l.forwardScale, l.turnScale = next(), next()
	}
	if spec.RateBias {
		l.rate = next()
	}
	if spec.GyroScale {
		if !spec.IMUOffset {
			return Layout{}, fmt.Errorf("%w: a gyro scale without an IMU offset", ErrShape)
		}
		l.gyro = next()
	}
	need := l.n
	for _, b := range spec.Biases {
		need += b.Dim
	}
	if need > MaxStates || len(spec.Biases) > maxBlocks {
		return Layout{}, fmt.Errorf("%w: %d states asked for, at most %d", ErrShape, need, MaxStates)
	}
	for k, b := range spec.Biases {
		if b.Dim < 1 || b.Dim > 3 {
			return Layout{}, fmt.Errorf("%w: bias block %d of size %d", ErrShape, k, b.Dim)
		}
		if b.Mount {
			if b.Dim != 3 {
				return Layout{}, fmt.Errorf("%w: mount block %d of size %d, not 3", ErrShape, k, b.Dim)
			}
			b.TauS = math.Inf(1) // constant: exp(-dt/tau) = 1, no noise added
		} else if b.Landmark {
			if b.Dim != 2 {
				return Layout{}, fmt.Errorf("%w: landmark block %d of size %d, not 2", ErrShape, k, b.Dim)
			}
			b.TauS = math.Inf(1)
		} else if !(b.TauS > 0) || math.IsInf(b.TauS, 0) {
			return Layout{}, fmt.Errorf("bias block %d: correlation time %v s must be positive and finite", k, b.TauS)
		}
		c := make([]float64, b.Dim*b.Dim)
		for i := 0; i < b.Dim; i++ {
			copy(c[i*b.Dim:(i+1)*b.Dim], b.Cov[i*3:i*3+b.Dim])
		}
		if err := CheckCovariance(c, b.Dim); err != nil {
			return Layout{}, fmt.Errorf("bias block %d: %w", k, err)
		}
		symmetrise(b.Cov[:], b.Dim, 3) // symmetric to the bit, as the filter keeps P
		l.blocks[l.nb] = biasBlock{at: l.n, BiasSpec: b}
		l.nb++
		if !b.Landmark {
			l.cons |= (1<<b.Dim - 1) << l.n
		}
		l.n += b.Dim
	}
	return l, nil
}

// MustLayout is NewLayout for layouts known to be valid; it panics on error.
func MustLayout(spec LayoutSpec) Layout {
	l, err := NewLayout(spec)
	if err != nil {
		panic(err)
	}
	return l
}

// Size returns the number of states.
func (l *Layout) Size() int { return l.n }

// Offset returns the index of the IMU offset, or -1. When present it is
// IOffset.
func (l *Layout) Offset() int { return l.offset }

// ForwardScale returns the index of forward_scale, or -1.
func (l *Layout) ForwardScale() int { return l.forwardScale }

// TurnScale returns the index of turn_scale, or -1.
func (l *Layout) TurnScale() int { return l.turnScale }

// RateBias returns the index of the heading-rate bias, or -1.
func (l *Layout) RateBias() int { return l.rate }

// GyroScale returns the index of the IMU's gyro scale, or -1.
func (l *Layout) GyroScale() int { return l.gyro }

// Biases returns the number of bias blocks.
func (l *Layout) Biases() int { return l.nb }

// Bias returns the index of the first state of bias block k and its size.
func (l *Layout) Bias(k int) (at, dim int) { return l.blocks[k].at, l.blocks[k].Dim }

// IsLandmark reports whether bias block k is a landmark block.
func (l *Layout) IsLandmark(k int) bool { return l.blocks[k].Landmark }

// Angles returns the set of angular states, which are wrapped: bit i set
// for state i (heading, and the IMU offset when present).
func (l *Layout) Angles() uint16 {
	a := uint16(1) << IHead
	if l.offset >= 0 {
		a |= 1 << l.offset
	}
	return a
}

// consider reports whether state i is a consider state (a bias or mount
// block's), whose gain row is zero (DEVELOPERS.md, "Design: Measurement
// updates"). A landmark block's states are estimated.
func (l *Layout) consider(i int) bool { return l.cons&(1<<i) != 0 }
