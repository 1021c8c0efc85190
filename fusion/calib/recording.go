package calib

import "reckon.example/fusion"

// RecordedInput is one input of a recorded run, in arrival order: exactly
// one of Odometry, Heading and Fix is set. The offline fits replay runs of
// them through a fusion.Robot (reseeds by hand are not replayed).
type RecordedInput struct {
	Odometry *fusion.Odometry
	Heading  *fusion.Heading
	Fix      *fusion.Fix
}

// feed passes the input to the robot.
func (in *RecordedInput) feed(r *fusion.Robot) fusion.Result {
	switch {
	case in.Odometry != nil:
		return r.AddOdometry(*in.Odometry)
	case in.Heading != nil:
		return r.AddHeading(*in.Heading)
	case in.Fix != nil:
		return r.AddFix(*in.Fix)
	}
	panic("calib: a RecordedInput with none of Odometry, Heading and Fix")
}
