package estimator

import "math"

// Pose is a planar pose: position X, Y in metres and Heading in radians
// (counter-clockwise from the reference frame's +x). As a robot pose it is in
// the field frame; as a sensor mount it is in the robot's body frame.
type Pose struct {
	X, Y, Heading float64
}

// Step is the body twist over one interval in the body frame at the start of
// the interval: ForwardM along body +x, LeftM along body +y (metres) and
// TurnRad counter-clockwise (radians).
type Step struct {
	ForwardM, LeftM, TurnRad float64
}

// Scale returns the step scaled by f, the twist of the fraction f of an
// interval of constant twist.
func (s Step) Scale(f float64) Step {
	return Step{s.ForwardM * f, s.LeftM * f, s.TurnRad * f}
}

// seriesBelow is the half-turn magnitude below which sin(h)/h and its
// derivative use their Taylor series (DEVELOPERS.md, "Design: Motion prediction": about 1e-4).
const seriesBelow = 1e-4

// arcFactors returns s = sin(h)/h and ds/d(turn) for h = turn/2.
//
// Series: sin(h)/h = 1 - h^2/6 + h^4/120 - ..., so
// d/d(turn) = (1/2) d/dh = -h/6 + h^3/60 - ...
func arcFactors(turn float64) (s, ds float64) {
	h := turn / 2
	if math.Abs(h) < seriesBelow {
		h2 := h * h
		return 1 - h2/6, -h/6 + h*h2/60
	}
	sh, ch := math.Sincos(h)
	return sh / h, (h*ch - sh) / (2 * h * h)
}

// chord holds what Advance and ArcJacobians share for one step from one
// heading: k = sin(h)/h and its derivative dk (h = turn/2), the sine and
// cosine of the chord's direction (heading + turn/2), and the chord
// direction components before scaling by k.
type chord struct{ k, dk, sc, cc, cx, cy float64 }

func (c *chord) set(heading float64, s Step) {
	c.k, c.dk = arcFactors(s.TurnRad)
	c.sc, c.cc = math.Sincos(heading + s.TurnRad/2)
	c.cx, c.cy = c.cc*s.ForwardM-c.sc*s.LeftM, c.sc*s.ForwardM+c.cc*s.LeftM
}

// advance is Advance with the chord given.
func (c *chord) advance(p Pose, s Step) Pose {
	return Pose{X: p.X + c.k*c.cx, Y: p.Y + c.k*c.cy, Heading: Wrap(p.Heading + s.TurnRad)}
}

// jacobians are ArcJacobians with the chord given; fx is the identity
// except for fx[2] = -k*cy and fx[5] = k*cx.
func (c *chord) jacobians(fx, fu *[9]float64) {
	if fx != nil {
		*fx = [9]float64{
			1, 0, -c.k * c.cy,
			0, 1, c.k * c.cx,
			0, 0, 1,
		}
	}
	*fu = [9]float64{
		c.k * c.cc, -c.k * c.sc, c.dk*c.cx - 0.5*c.k*c.cy,
		c.k * c.sc, c.k * c.cc, c.dk*c.cy + 0.5*c.k*c.cx,
		0, 0, 1,
	}
}

// Advance returns the pose reached from p by moving with constant twist s.
// The position moves along the chord of the arc: length 2*sin(turn/2)*radius,
// pointing at half the turn, which is exact for constant-curvature motion.
func Advance(p Pose, s Step) Pose {
	var c chord
	c.set(p.Heading, s)
	return c.advance(p, s)
}

// ArcJacobians writes the Jacobians of Advance(p, s) with respect to the pose
// (x, y, heading) into fx and with respect to the step (forward, left, turn)
// into fu, both 3x3 row-major.
func ArcJacobians(p Pose, s Step, fx, fu *[9]float64) {
	var c chord
	c.set(p.Heading, s)
	c.jacobians(fx, fu)
}

// Compose returns the pose b expressed in a's frame composed onto a (a (+) b):
// the field pose of a sensor mounted at body pose b on a robot at pose a.
func Compose(a, b Pose) Pose {
	sa, ca := math.Sincos(a.Heading)
	return Pose{
		X:       a.X + ca*b.X - sa*b.Y,
		Y:       a.Y + sa*b.X + ca*b.Y,
		Heading: Wrap(a.Heading + b.Heading),
	}
}

// Detach returns the robot pose r such that Compose(r, m) == s: the robot
// pose implied by a sensor at field pose s mounted at body pose m.
func Detach(s, m Pose) Pose {
	h := Wrap(s.Heading - m.Heading)
	sh, ch := math.Sincos(h)
	return Pose{
		X:       s.X - (ch*m.X - sh*m.Y),
		Y:       s.Y - (sh*m.X + ch*m.Y),
		Heading: h,
	}
}
