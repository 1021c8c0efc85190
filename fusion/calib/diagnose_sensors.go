package calib

import (
	"fmt"
	"math"

	"reckon.example/fusion"
)

// Thresholds of DiagnoseSensors: a mount is named wrong when the fit moves
// it by more than mountOffM (metres) or mountOffRad, a latency when the fit
// moves it by more than latencyOffS (seconds), each also by more than
// sigmas standard errors.
const (
	mountOffM, mountOffRad, latencyOffS, sigmas = 0.05, 0.1, 0.04, 5.0
)

// DiagnoseSensors looks in a run with fixes for two wiring mistakes of
// fix sensors: a mount missing or wrong (the fixes' innovations follow a
// pattern that turns with the heading) and fixes stamped at their arrival
// rather than their capture (innovations correlated with the velocity).
// Both are regressions of the innovations on those patterns, which is
// what FitSystematic with SensorsOnly fits: the mount's columns of the
// Jacobian are the heading's rotation, the latency's the velocity. It
// returns one finding per mistake, naming the field to change; Slope is
// the fitted correction (metres of mount offset, or seconds of latency)
// and R2 is NaN. A run the fit cannot use is one undetermined finding.
func DiagnoseSensors(cfg fusion.Config, odo []fusion.Odometry, fixes []fusion.Fix) []Finding {
	out, _ := DiagnoseSensorsFrom(cfg, Samples(odo), fixes)
	return out
}

// DiagnoseSensorsFrom is DiagnoseSensors with the odometry handed over by
// a source (FitSystematicFrom); it returns the source's error, if it had
// one, and no findings.
func DiagnoseSensorsFrom(cfg fusion.Config, odo OdometrySource, fixes []fusion.Fix) ([]Finding, error) {
	var readErr error
	fit, err := FitSystematicFrom(cfg, func(yield func(*fusion.Odometry) bool) error {
		readErr = odo(yield)
		return readErr
	}, fixes, SystematicOptions{SensorsOnly: true})
	if readErr != nil {
		return nil, readErr
	}
	if err != nil {
		return []Finding{{Field: "sensors", Sentence: err.Error(), Slope: math.NaN(), R2: math.NaN(), Undetermined: true}}, nil
	}
	var out []Finding
	for si, s := range cfg.Sensors {
		px, okx := fit.Param(MountX, si)
		py, oky := fit.Param(MountY, si)
		ph, okh := fit.Param(MountHeading, si)
		name := fmt.Sprintf("sensors[%d] (%s)", si, s.ID)
		if okx && oky && px.Determined && py.Determined {
			dx, dy := px.Fitted-px.Configured, py.Fitted-py.Configured
			off, se := math.Hypot(dx, dy), math.Max(px.StdErr, py.StdErr)
			dh := 0.0
			if okh && ph.Determined {
				dh = ph.Fitted - ph.Configured
			}
			if off > mountOffM && off > sigmas*se || math.Abs(dh) > mountOffRad && math.Abs(dh) > sigmas*ph.StdErr {
				what := "is wrong"
				if s.Mount.X == 0 && s.Mount.Y == 0 && s.Mount.Heading == 0 {
					what = "is missing"
				}
				out = append(out, Finding{Field: fmt.Sprintf("sensors[%d].mount", si), Slope: off, R2: math.NaN(),
					Sentence: fmt.Sprintf("%s's mount %s: its innovations follow a pattern that turns with the heading, %.3f m off; set mount to {x_m: %.3f, y_m: %.3f, heading_rad: %.3f} (configured %.3f, %.3f, %.3f)",
						name, what, off, px.Fitted, py.Fitted, s.Mount.Heading+dh, s.Mount.X, s.Mount.Y, s.Mount.Heading)})
			}
		}
		// Not only a determined latency: the bound says whether the fit
		// knows it well enough to write into the configuration, while 40
		// ms and five standard errors say it is wrong (a stamp at arrival
		// is 50 to 200 ms late; a minute's run states about 15 ms).
		if pl, ok := fit.Param(Latency, si); ok && !math.IsInf(pl.StdErr, 0) {
			d := pl.Fitted - pl.Configured
			if math.Abs(d) > latencyOffS && math.Abs(d) > sigmas*pl.StdErr {
				out = append(out, Finding{Field: fmt.Sprintf("sensors[%d].latency_ns", si), Slope: pl.Fitted, R2: math.NaN(),
					Sentence: fmt.Sprintf("%s's innovations correlate with the velocity: it stamps its fixes %.0f ms after their capture (at arrival rather than capture?); stamp them at capture, or set latency_ns to %.0f",
						name, pl.Fitted*1e3, math.Max(pl.Fitted, 0)*1e9)})
			}
		}
	}
	return out, nil
}
