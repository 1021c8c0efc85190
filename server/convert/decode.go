package convert

import (
	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
)

// Decoded is a wire sample decoded into the fusion input it carries, for
// offline tools that replay runs themselves (fusion/calib): Kind says
// which of Odometry, Heading and Fix holds it; a reseed has Kind
// fusion.InputReseed and none of them.
type Decoded struct {
	Kind     fusion.InputKind
	Odometry fusion.Odometry
	Heading  fusion.Heading
	Fix      fusion.Fix
}

// Decode decodes a wire sample as the service does before handing it to a
// robot, refusing what is malformed on the wire (an error wrapping
// ErrSample and naming the field); the robot checks the values.
func Decode(s *pb.Sample) (Decoded, error) {
	var in input
	if err := decode(s, &in); err != nil {
		return Decoded{}, err
	}
	return Decoded{Kind: in.kind, Odometry: in.Odometry, Heading: in.Heading, Fix: in.Fix}, nil
}
