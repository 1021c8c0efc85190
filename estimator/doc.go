// Package estimator is the extended Kalman filter at the core of reckon: the
// arc (constant-twist) odometry model, the weighted least-squares solver that
// turns wheel readings into a body step, the measurement models for absolute
// fixes and IMU heading, Joseph-form updates and chi-square gating.
//
// # Overview
//
// The state is [x, y, heading] (metres, radians, field frame; see the
// README for the frames), then, as its Layout says, the IMU offset, the
// odometry's forward and turn scales, a heading-rate bias, the bias
// blocks of sensors with exponentially correlated errors and the mount
// blocks of sensors whose mounts are known only so well, at most
// MaxStates in all (DEVELOPERS.md, "Design: State"). A body step
// (forward, left, turn) over one interval moves the pose along a circular arc
// (Advance); Filter.Predict propagates the covariance through the analytic
// Jacobians of that motion (ArcJacobians) and Filter.Update applies one
// Measurement, optionally re-weighted by a robust loss (Robust), with the
// sensors' bias and mount states as consider states. SolveStep finds the body step from any number of linear rows
// (encoder wheels of any layout, an IMU rotation row, a no-side-slip row).
//
// # Invariants
//
//   - The package is pure: no goroutines, no I/O, no clocks, no globals that
//     change. The same calls give the same results, bit for bit.
//   - Headings and heading innovations are wrapped to (-pi, pi].
//   - After every successful Predict or Update the covariance is symmetric and
//     passes a Cholesky factorisation; an update that would break this is
//     refused with ErrNotPositiveDefinite and leaves the filter unchanged.
//   - A gated or refused update leaves the filter unchanged.
//   - Predict and Update allocate nothing: the small matrices are fixed-size
//     arrays on the Filter, checked in tests against gonum mat.
//
// Dimension misuse (a state size beyond MaxStates, an unknown measurement
// kind) panics, with ErrShape where sizes do not fit; bad data is an error
// value (a covariance of the wrong size wraps ErrShape). Results go into a
// dst argument or the receiver, as in gonum: StepNoise, TimeNoise,
// Sandwich, RTSStep, RTSGain, State.CovarianceInto.
package estimator
