package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"math"
	"time"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// poseFlags are the flags of a pose in the field frame with its
// covariance (reseed, start-run).
type poseFlags struct {
	x, y, heading, stdM, stdRad *float64
	cov                         *string
}

// addPoseFlags defines -x, -y, -heading, -std-m, -std-rad and -cov; need
// says whether the pose is required.
func addPoseFlags(fs *flag.FlagSet, need string) *poseFlags {
	return &poseFlags{
		x:       fs.Float64("x", 0, "field x, metres "+need),
		y:       fs.Float64("y", 0, "field y, metres "+need),
		heading: fs.Float64("heading", 0, "heading, radians counter-clockwise from the field x axis "+need),
		stdM:    fs.Float64("std-m", 0.05, "standard deviation of x and y, metres"),
		stdRad:  fs.Float64("std-rad", 0.035, "standard deviation of the heading, radians"),
		cov:     fs.String("cov", "", "full 3x3 covariance of (x, y, heading), 9 comma-separated row-major values (m^2, m*rad, rad^2); replaces -std-m and -std-rad"),
	}
}

// given tells whether -x, -y and -heading were all given.
func (p *poseFlags) given(fs *flag.FlagSet) bool {
	return isSet(fs, "x") && isSet(fs, "y") && isSet(fs, "heading")
}

// read returns the pose and its covariance, or a usage error. A heading,
// or its standard deviation, beyond a full turn was given in degrees
// (the check fusion.Config.CheckBounds makes of a configuration's angles).
func (p *poseFlags) read(fs *flag.FlagSet) (*pb.FloorPose, []float64, error) {
	for _, a := range []struct {
		name string
		v    float64
	}{{"heading", *p.heading}, {"std-rad", *p.stdRad}} {
		if math.Abs(a.v) > 2*math.Pi {
			return nil, nil, usagef(fs, "-%s %v is more than a full turn (2 pi rad): degrees? It is in radians", a.name, a.v)
		}
	}
	var cov []float64
	switch {
	case *p.cov != "" && (isSet(fs, "std-m") || isSet(fs, "std-rad")):
		return nil, nil, usagef(fs, "-cov replaces -std-m and -std-rad; give one or the other")
	case *p.cov != "":
		var err error
		if cov, err = parseCov(*p.cov); err != nil {
			return nil, nil, usagef(fs, "-cov: %v", err)
		}
	default:
		if !(*p.stdM > 0) || !(*p.stdRad > 0) {
			return nil, nil, usagef(fs, "-std-m and -std-rad must be positive")
		}
		cov = []float64{*p.stdM * *p.stdM, 0, 0, 0, *p.stdM * *p.stdM, 0, 0, 0, *p.stdRad * *p.stdRad}
	}
	return &pb.FloorPose{XM: *p.x, YM: *p.y, HeadingRad: *p.heading}, cov, nil
}

func runStartRun(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("start-run", "NAME [-boot-id ID] [-run N] [-x X_M -y Y_M -heading RAD [-std-m M -std-rad RAD | -cov C1,...,C9]] [flags]", `
Starts a new run of robots/NAME after its controller restarted (its clock
jumped back, and its odometry is refused as time_backwards): the inputs that
follow are stamped on the new clock. The last run's pose and covariance
carry over, or -x, -y and -heading re-seed the run. Nothing is deleted:
review, replay and export select a run with -run. A run start the robot
refuses (the same -boot-id as the current run's, a -run that is not the
next) exits 5.`)
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	boot := fs.String("boot-id", "", "names the controller boot (default: by-hand-{unix ns})")
	number := fs.Uint64("run", 0, "the new run's number, to refuse a second start of the same run (default: the next)")
	pf := addPoseFlags(fs, "(optional: re-seed the run)")
	name, _, err := oneRobot(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	var pose *pb.FloorPose
	var cov []float64
	switch {
	case pf.given(fs):
		if pose, cov, err = pf.read(fs); err != nil {
			return err
		}
	case isSet(fs, "x") || isSet(fs, "y") || isSet(fs, "heading") || isSet(fs, "cov") || isSet(fs, "std-m") || isSet(fs, "std-rad"):
		return usagef(fs, "a re-seed needs all of -x, -y and -heading")
	}
	if !isSet(fs, "boot-id") {
		*boot = fmt.Sprintf("by-hand-%d", time.Now().UnixNano())
	}
	c, err := cf.dial()
	if err != nil {
		return err
	}
	defer c.Close()
	resp, err := c.StartRun(ctx, name, *boot, *number, pose, cov)
	if err != nil {
		return err
	}
	if resp.GetVerdict() != pb.Verdict_VERDICT_APPLIED {
		return fmt.Errorf("%w: run start of %s %s: %s", errRefused, name, convert.VerdictName(resp.GetVerdict()), resp.GetReason())
	}
	fmt.Fprintf(stdout, "%s started run %d (boot %s, input %d)\n", name, resp.GetRun(), *boot, resp.GetSequence())
	return nil
}
