package estimator

import (
	"fmt"
	"math"
)

// Kind says what a Measurement measures and so its dimension.
type Kind uint8

// The measurement kinds (DEVELOPERS.md, "Design: Measurement updates"). A sensor is
// mounted at body pose Mount; z is what the sensor reports.
const (
	// KindPose: the sensor's field pose (x, y, heading) = pose (+) Mount.
	KindPose Kind = iota + 1
	// KindPosition: the field position (x, y) of the mounted point.
	KindPosition
	// KindHeading: the sensor's field heading = heading + Mount.Heading.
	KindHeading
	// KindRangeBearing: range (m) and bearing (rad, from the sensor's +x,
	// counter-clockwise) from the sensor to the landmark at Landmark.
	KindRangeBearing
	// KindRange: range alone.
	KindRange
	// KindBearing: bearing alone.
	KindBearing
	// KindIMUHeading: the IMU's absolute heading = heading + imu_offset.
	KindIMUHeading
)

// Kinds returns every measurement kind, for tests and conformance suites.
func Kinds() []Kind {
	return []Kind{KindPose, KindPosition, KindHeading, KindRangeBearing, KindRange, KindBearing, KindIMUHeading}
}

// Dim returns the dimension of the kind's measurement vector.
func (k Kind) Dim() int {
	switch k {
	case KindPose:
		return 3
	case KindPosition, KindRangeBearing:
		return 2
	case KindHeading, KindRange, KindBearing, KindIMUHeading:
		return 1
	}
	panic(fmt.Sprintf("estimator: unknown measurement kind %d", k))
}

// IsAngle reports whether component i of the kind's vector is an angle, whose
// innovation is wrapped.
func (k Kind) IsAngle(i int) bool {
	switch k {
	case KindPose:
		return i == 2
	case KindHeading, KindBearing, KindIMUHeading:
		return true
	case KindRangeBearing:
		return i == 1
	}
	return false
}

// String names the kind.
func (k Kind) String() string {
	switch k {
	case KindPose:
		return "pose"
	case KindPosition:
		return "position"
	case KindHeading:
		return "heading"
	case KindRangeBearing:
		return "range_bearing"
	case KindRange:
		return "range"
	case KindBearing:
		return "bearing"
	case KindIMUHeading:
		return "imu_heading"
	}
	return fmt.Sprintf("kind(%d)", uint8(k))
}

// Measurement is one absolute measurement of the state.
type Measurement struct {
	Kind Kind
	// Mount is the sensor's pose in the body frame (unused by KindIMUHeading).
	Mount Pose
	// LandmarkX, LandmarkY are the landmark's field position in metres for
	// the range and bearing kinds.
	LandmarkX, LandmarkY float64
	// Z holds the Dim() measured values, in the order of the kind's doc.
	Z [3]float64
	// R is the Dim() x Dim() measurement covariance, row-major with stride 3:
	// the white part of the error, when a bias block carries the rest.
	R [9]float64
	// Bias holds, for each component, the index of the state holding its
	// bias (a sensor's Gauss-Markov error, added to h(x)), or 0 for none.
	Bias [3]int
	// MountError is the index of the first of three states holding the
	// error of Mount (x, y, heading; a mount block of the layout), or 0
	// for none: the measurement is taken from the mount Mount plus those
	// states.
	MountError int
	// LandmarkError is the index of the first of two states holding the
	// survey error of the landmark's position (x, y; a landmark block of
	// the layout), or 0 for none: the range and bearing kinds measure from
	// LandmarkX, LandmarkY plus those states.
	LandmarkError int
	// LandmarkVar, when LandmarkError is 0, is the variance of the
	// landmark's survey error in each axis (m^2), which the update adds to
	// R through the measurement's Jacobian in the landmark's position: the
	// survey error as white noise of this fix alone, for a landmark no
	// block of the state stands for.
	LandmarkVar float64
	// Robust is the robust weighting of the update (the zero value: none).
	Robust Robust
	// Hold marks states (bit i for state i) that this update leaves where
	// they are: their gain rows are zero, as a consider state's (Schmidt
	// 1966), and the Joseph form keeps the covariance right for that gain.
	// fusion holds the odometry scales when the turns and distances since
	// the last update are within the odometry's own noise (DEVELOPERS.md,
	// "Design: State").
	Hold uint16
}

// measStride is the stride of measurement-sized matrices.
const measStride = 3

// predict writes h(x) into z and the Dim() x n Jacobian into H (stride
// MaxStates).
func (m *Measurement) predict(x []float64, n int, z *[3]float64, H *[3 * MaxStates]float64) error {
	*H = [3 * MaxStates]float64{}
	th := x[2]
	st, ct := math.Sincos(th)
	mx, my, mth := m.Mount.X, m.Mount.Y, m.Mount.Heading
	me := m.MountError
	if me > 0 {
		if me+3 > n || m.Kind == KindIMUHeading {
			panic(fmt.Errorf("%w: mount error states at %d of a %d-state filter", ErrShape, me, n))
		}
		mx, my, mth = mx+x[me], my+x[me+1], mth+x[me+2]
	}
	// Derivative of the mounted point p + R(th) m_xy with respect to th.
	dsx := -st*mx - ct*my
	dsy := ct*mx - st*my
	switch m.Kind {
	case KindPose, KindPosition:
		z[0] = x[0] + ct*mx - st*my
		z[1] = x[1] + st*mx + ct*my
		H[0*stride+0], H[0*stride+2] = 1, dsx
		H[1*stride+1], H[1*stride+2] = 1, dsy
		if me > 0 {
			// The mounted point moves by R(th) (dmx, dmy).
			H[0*stride+me], H[0*stride+me+1] = ct, -st
			H[1*stride+me], H[1*stride+me+1] = st, ct
		}
		if m.Kind == KindPose {
			z[2] = Wrap(th + mth)
			H[2*stride+2] = 1
			if me > 0 {
				H[2*stride+me+2] = 1
			}
		}
	case KindHeading:
		z[0] = Wrap(th + mth)
		H[2] = 1
		if me > 0 {
			H[me+2] = 1
		}
	case KindRangeBearing, KindRange, KindBearing:
		lx, ly := m.LandmarkX, m.LandmarkY
		le := m.LandmarkError
		if le > 0 {
			if le+2 > n {
				panic(fmt.Errorf("%w: landmark error states at %d of a %d-state filter", ErrShape, le, n))
			}
			lx, ly = lx+x[le], ly+x[le+1]
		}
		dx := lx - (x[0] + ct*mx - st*my)
		dy := ly - (x[1] + st*mx + ct*my)
		r2 := dx*dx + dy*dy
		if r2 < 1e-12 {
			return ErrDegenerate
		}
		r := math.Sqrt(r2)
		row := 0
		if m.Kind != KindBearing {
			z[0] = r
			H[0], H[1], H[2] = -dx/r, -dy/r, -(dx*dsx+dy*dsy)/r
			if me > 0 {
				// The sensor moves by R(th) (dmx, dmy).
				H[me], H[me+1] = -(dx*ct+dy*st)/r, (dx*st-dy*ct)/r
			}
			if le > 0 {
				// The landmark moves the other way round from the sensor.
				H[le], H[le+1] = dx/r, dy/r
			}
			row = 1
		}
		if m.Kind != KindRange {
			z[row] = Wrap(math.Atan2(dy, dx) - th - mth)
			H[row*stride+0] = dy / r2
			H[row*stride+1] = -dx / r2
			H[row*stride+2] = (dy*dsx-dx*dsy)/r2 - 1
			if me > 0 {
				H[row*stride+me] = (dy*ct - dx*st) / r2
				H[row*stride+me+1] = -(dy*st + dx*ct) / r2
				H[row*stride+me+2] = -1
			}
			if le > 0 {
				H[row*stride+le] = -dy / r2
				H[row*stride+le+1] = dx / r2
			}
		}
	case KindIMUHeading:
		if n < 4 {
			panic("estimator: IMU heading measurement on a filter without an IMU offset state")
		}
		z[0] = Wrap(th + x[3])
		H[2], H[3] = 1, 1
	default:
		panic(fmt.Sprintf("estimator: unknown measurement kind %d", m.Kind))
	}
	for i, b := range m.Bias[:m.Kind.Dim()] {
		if b > 0 {
			if b >= n {
				panic(fmt.Errorf("%w: bias state %d of a %d-state filter", ErrShape, b, n))
			}
			z[i] += x[b]
			H[i*stride+b] = 1
			if m.Kind.IsAngle(i) {
				z[i] = Wrap(z[i])
			}
		}
	}
	return nil
}

// PredictedPose is Predicted for a state of the pose alone, without
// allocating: it writes h(p) into z and its Jacobian (Dim() x 3,
// row-major) into h.
func (m *Measurement) PredictedPose(p Pose, z *[3]float64, h *[9]float64) error {
	var hh [3 * MaxStates]float64
	x := [3]float64{p.X, p.Y, p.Heading}
	if err := m.predict(x[:], 3, z, &hh); err != nil {
		return err
	}
	for i := range m.Kind.Dim() {
		copy(h[i*3:i*3+3], hh[i*stride:i*stride+3])
	}
	return nil
}

// Predicted returns h(x), the measurement the state x (length 3 to
// MaxStates) predicts, and its Jacobian (Dim() x len(x), row-major). It
// allocates; the filter uses the same code without allocating.
func (m *Measurement) Predicted(x []float64) (z []float64, H []float64, err error) {
	var zz [3]float64
	var hh [3 * MaxStates]float64
	n := len(x)
	if err := m.predict(x, n, &zz, &hh); err != nil {
		return nil, nil, err
	}
	d := m.Kind.Dim()
	H = make([]float64, d*n)
	for i := 0; i < d; i++ {
		copy(H[i*n:(i+1)*n], hh[i*stride:i*stride+n])
	}
	return append([]float64(nil), zz[:d]...), H, nil
}
