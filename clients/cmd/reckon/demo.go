package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"math"
	"sort"
	"strings"

	"reckon/clients/sim"
	"reckon/fusion"
)

func parseLayout(s string) (sim.Layout, error) {
	for _, l := range []sim.Layout{sim.TwoParallelOneLateral, sim.ParallelLateralIMU, sim.Differential} {
		if l.String() == s {
			return l, nil
		}
	}
	return 0, fmt.Errorf("unknown layout %q (two-parallel-one-lateral, parallel-lateral-imu, differential)", s)
}

func runDemo(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("demo", flag.ContinueOnError)
	fs.SetOutput(stderr)
	layout := fs.String("layout", "two-parallel-one-lateral", "wheel layout: two-parallel-one-lateral, parallel-lateral-imu or differential")
	seed := fs.Uint64("seed", 1, "simulator seed")
	duration := fs.Float64("duration", 90, "simulated seconds")
	outliers := fs.Float64("outliers", 0.05, "fraction of camera fixes that are wrong by metres")
	every := fs.Float64("every", 2, "print a track line every this many simulated seconds")
	bump := fs.Float64("bump-at", 55, "lift the cart 1 m sideways at this simulated second (0: never)")
	markers := fs.Bool("markers", false, "camera reports range and bearing to post markers instead of its pose")
	if err := fs.Parse(args); err != nil {
		return err
	}
	lay, err := parseLayout(*layout)
	if err != nil {
		return err
	}
	sc := sim.Scenario{Layout: lay, Seed: *seed, DurationS: *duration, OutlierFraction: *outliers, SlipPerS: 0.02,
		IMU: lay != sim.ParallelLateralIMU, Counts: true, Markers: *markers}
	if *bump > 0 {
		sc.Bump = &sim.Bump{AtS: *bump, DXM: 0.8, DYM: 0.6, DRad: 0.35}
	}
	s := sim.New(sc)
	robot, err := fusion.New(s.Config())
	if err != nil {
		return err
	}
	fmt.Fprintf(stdout, "greenhouse cart, layout %s, %.0f s simulated, camera fixes 50-200 ms late, %.0f%% outliers\n\n", lay, *duration, 100**outliers)
	fmt.Fprintf(stdout, "%7s %8s %8s %8s %7s %7s %7s %8s %7s  %s\n", "t_s", "x_m", "y_m", "head_deg", "sx_m", "sy_m", "sh_deg", "r95_m", "err_m", "trust")
	var next int64
	step := int64(*every * 1e9)
	var se float64
	var n int
	verdicts := map[string]int{}
	heldFixes := map[uint64]bool{}
	events := map[string]int{}
	var notes []string
	for {
		if err := ctx.Err(); err != nil {
			return err
		}
		in, ok := s.Next()
		if !ok {
			break
		}
		res := sim.Feed(robot, &in)
		if in.Fix != nil {
			if res.Verdict == fusion.VerdictHeld {
				heldFixes[res.Seq] = true
			} else {
				verdicts["fix "+res.Verdict.String()]++
			}
		}
		for _, r := range res.Resolved {
			if heldFixes[r.Seq] {
				delete(heldFixes, r.Seq)
				verdicts["fix "+r.Verdict.String()]++
			}
		}
		for _, e := range res.Events {
			events[e.Kind.String()]++
			if e.Kind == fusion.EventMoveRecovered || e.Kind == fusion.EventTrustLost || e.Kind == fusion.EventTrustRegained {
				notes = append(notes, fmt.Sprintf("%7.2f s  %s  %s", float64(e.StampNs)*1e-9, e.Kind, e.Detail))
			}
		}
		if in.Odometry == nil {
			continue
		}
		p := robot.Pose()
		e := math.Hypot(p.Pose.X-in.Truth.X, p.Pose.Y-in.Truth.Y)
		se += e * e
		n++
		if in.Odometry.StampNs >= next {
			next += step
			fmt.Fprintf(stdout, "%7.2f %8.3f %8.3f %8.1f %7.3f %7.3f %7.2f %8.3f %7.3f  %s\n",
				float64(p.StampNs)*1e-9, p.Pose.X, p.Pose.Y, p.Pose.Heading*180/math.Pi,
				math.Sqrt(p.Cov[0]), math.Sqrt(p.Cov[4]), math.Sqrt(p.Cov[8])*180/math.Pi,
				p.Position95M, e, p.Distrust)
		}
	}
	fmt.Fprintf(stdout, "\nRMS position error against truth: %.3f m over %d odometry samples\n", math.Sqrt(se/float64(n)), n)
	fmt.Fprintf(stdout, "verdicts: %s\n", joinCounts(verdicts))
	fmt.Fprintf(stdout, "events:   %s\n", joinCounts(events))
	for _, ss := range robot.Stats().Sensors {
		mean, lo, hi, v := ss.Consistency()
		fmt.Fprintf(stdout, "sensor %-7s applied %5d gated %4d  mean NIS %.2f (95%% band %.2f-%.2f): %s\n", ss.ID, ss.Applied, ss.Gated, mean, lo, hi, v)
	}
	if len(notes) > 0 {
		fmt.Fprintln(stdout, "\nnotable moments:")
		for _, l := range notes {
			fmt.Fprintln(stdout, l)
		}
	}
	return nil
}

func joinCounts(m map[string]int) string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	parts := make([]string, len(keys))
	for i, k := range keys {
		parts[i] = fmt.Sprintf("%s %d", k, m[k])
	}
	return strings.Join(parts, ", ")
}
