// Package calib holds offline calibration tools that read recordings
// already in memory; it does no I/O (the reckon tool reads the files).
//
// # Overview
//
// UMBmark turns the return errors of the bidirectional square test into
// corrections of a differential drive's wheel scales and wheelbase
// (Borenstein and Feng 1996). Diagnose finds common wiring mistakes in a run
// (a wheel counting backwards, swapped wheels, an IMU turning the other way
// or reporting degrees) and names the configuration field to change.
//
// AllanDeviation computes the overlapping Allan deviation of a rate sampled
// at a fixed interval (IEEE Std 952-1997, Annex C). Fit reads the noise
// terms from the slopes of its log-log plot: quantization or reading noise
// Q (slope -1), angle random walk N (slope -1/2), bias instability B (the
// flat minimum) and rate random walk K (slope +1/2). IMUTerms maps them to
// the robot configuration's IMU terms.
//
// # Mapping to the configuration
//
// The filter models an IMU heading reading as the robot's heading plus the
// IMU's zero (offset) plus white noise of variance imu_heading_var_rad2, the
// offset walking randomly at imu_offset_var_rad2_per_s (DEVELOPERS.md,
// "Design: Process noise"); the filter adds the wheels' latest counts'
// quantisation to that variance itself (the coarse encoders, same
// section), so the IMU's own figure is what belongs here. For a heading
// integrated from a gyro:
//
//   - imu_heading_var_rad2 = Q^2: white noise on each heading reading is the
//     -1 slope, sigma(tau) = sqrt(3) Q / tau (IEEE Std 952-1997, Annex C).
//     Without a -1 segment it is not determined and left as it was.
//   - imu_offset_var_rad2_per_s = N^2 + B^2 T + K^2 T^2 / 3. N^2 is exact:
//     angle random walk is a random walk of the heading with variance N^2
//     per second. Bias instability and rate random walk make the heading
//     drift faster than a random walk; the filter has no state for them, so
//     they are spread over a horizon T, the time constant of the filter's
//     estimate of the offset (Noise.OffsetHorizon; far longer than the time
//     between the fixes that correct it): a bias of B held over T gives an
//     angle variance B^2 T^2, a rate random walk K^2 T^3 / 3, each divided
//     by T. This is an approximation, good near T and pessimistic below it.
//     B enters only when the plot shows a flat segment.
//   - imu_turn_var_rad2_per_rad (imu_mode rotation, the IMU's heading
//     difference is a turn row) = N^2 / w, with w a typical turn rate: over
//     an interval dt the heading difference's variance from angle random
//     walk is N^2 dt = N^2 |turn| / w. reckon imu-noise prints it but does
//     not write it: in rotation mode imu_offset_var_rad2_per_s is the
//     heading's random walk (fusion.Config.HeadingDriftVarPerS), which
//     holds the angle random walk per second, and the turn term keeps what
//     a static recording cannot see, the scale factor error.
package calib

import (
	"fmt"
	"math"
)

// Point is the Allan deviation at one cluster time.
type Point struct {
	// M is the cluster size, samples; TauS = M * dt, seconds.
	M    int
	TauS float64
	// Dev is the Allan deviation, in the rate's units (rad/s for a gyro).
	Dev float64
	// Count is the number of overlapping second differences averaged.
	Count int
}

// ClusterSizes returns cluster sizes from 1 to max, about perDecade to a
// decade on a logarithmic scale, each once, ascending. It panics if
// perDecade < 1.
func ClusterSizes(max, perDecade int) []int {
	if perDecade < 1 {
		panic("calib: perDecade < 1")
	}
	var ms []int
	for i := 0; ; i++ {
		m := int(math.Round(math.Pow(10, float64(i)/float64(perDecade))))
		if m > max {
			return ms
		}
		if len(ms) == 0 || m > ms[len(ms)-1] {
			ms = append(ms, m)
		}
	}
}

// AllanDeviation appends to dst the overlapping Allan deviation of rate,
// sampled every dt seconds, at each cluster size in ms, and returns it.
// With theta the integrated angle (theta_0 = 0, theta_k = dt * sum of the
// first k rates) and n = len(rate) (IEEE Std 952-1997, Annex C, the
// overlapping estimator):
//
//	sigma^2(tau) = 1 / (2 tau^2 (n + 1 - 2m)) * sum_{k=0}^{n-2m} (theta_{k+2m} - 2 theta_{k+m} + theta_k)^2
//
// with tau = m dt. It panics if dt <= 0 or a cluster size is outside
// [1, n/2].
func AllanDeviation(dst []Point, rate []float64, dt float64, ms []int) []Point {
	if !(dt > 0) {
		panic(fmt.Sprintf("calib: dt %v is not positive", dt))
	}
	n := len(rate)
	theta := make([]float64, n+1)
	for k, r := range rate {
		theta[k+1] = theta[k] + r*dt
	}
	for _, m := range ms {
		if m < 1 || 2*m > n {
			panic(fmt.Sprintf("calib: cluster size %d outside [1, %d]", m, n/2))
		}
		count := n + 1 - 2*m
		var sum float64
		for k := 0; k < count; k++ {
			d := theta[k+2*m] - 2*theta[k+m] + theta[k]
			sum += d * d
		}
		tau := float64(m) * dt
		dst = append(dst, Point{M: m, TauS: tau, Dev: math.Sqrt(sum / (2 * tau * tau * float64(count))), Count: count})
	}
	return dst
}
