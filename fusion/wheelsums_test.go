package fusion

import (
	"os"
	"testing"
)

// TestMain runs the package's tests with wheelTurn checking its running
// sums against a walk of the window at every call (verifyWheelSums): every
// test that feeds a robot with wheels and an absolute IMU, late fixes,
// slips and restores among them, checks that the sums equal the walk bit
// for bit.
func TestMain(m *testing.M) {
	verifyWheelSums = true
	os.Exit(m.Run())
}
