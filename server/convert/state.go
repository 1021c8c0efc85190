package convert

import (
	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
)

// robotStateTable labels the service's robot states. A robot's state is
// the service's, not the estimator's, so its table lives here rather than in
// package fusion; it follows the same rule (the wire value's lowercase
// suffix) and the same test.
var robotStateTable = [...]fusion.Label[pb.RobotState]{
	{Value: pb.RobotState_ROBOT_STATE_SERVING, Name: "serving", Proto: 1},
	{Value: pb.RobotState_ROBOT_STATE_PAUSED, Name: "paused", Proto: 2},
	{Value: pb.RobotState_ROBOT_STATE_QUARANTINED, Name: "quarantined", Proto: 3},
}

// RobotStateLabels returns the label table of robot states (a copy).
func RobotStateLabels() []fusion.Label[pb.RobotState] {
	return append([]fusion.Label[pb.RobotState](nil), robotStateTable[:]...)
}

// RobotStateName returns a robot state's label ("quarantined").
func RobotStateName(s pb.RobotState) string {
	return labelName(robotStateTable[:], int32(s), "state")
}
