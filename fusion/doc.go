// Package fusion is one robot's pose estimator: its configuration, the
// conversion of odometry samples into body steps, time ordering with a
// bounded history window (rewind, interval splitting and replay), IMU
// handling, gating, move recovery and consistency statistics.
//
// # Overview
//
// A Robot is made from a Config with New. Samples go in through
// AddOdometry, AddHeading, AddFix, Reseed and StartRun (a controller that
// restarted begins a new run, its clock starting again); each returns a
// Result with the sample's arrival sequence number, its Verdict and the
// events it caused.
// Pose, PoseAt and Stats read the estimate back.
//
// Samples may arrive in any order. The robot keeps every input of the last
// Config.WindowNs of odometry time together with a checkpoint of the filter
// after each. A measurement stamped inside the window is inserted at its
// stamp: the odometry interval that contains it is split by twist fractions
// (exact for constant-twist motion), the filter rewinds to the checkpoint
// before it and replays what follows. A measurement stamped after the newest
// odometry is held (bounded) until odometry reaches it. The result equals
// processing the same samples in stamp order.
//
// # Files
//
// robot.go (the Robot and its inputs), odometry.go (odometry to body
// steps), imu.go (IMU modes, headings, the offset's initialisation and the
// IMU gate), fixes.go (fixes to measurements and their verdicts),
// reseed.go, run.go (runs: a controller restart), window.go (the history window with the hold queue),
// recovery.go (move recovery), trust.go, stats.go, query.go (Pose, PoseAt),
// smooth.go, snapshot.go and snapwire.go (the versioned snapshot),
// labels.go (one label per enum value), config.go, sample.go.
//
// # Invariants
//
//   - A Robot is a deterministic state machine: no goroutines, no clocks, no
//     I/O. Time enters only with the samples' stamps, so a recorded run
//     replays bit for bit. A Robot is not safe for concurrent use.
//   - A sample that is refused (Invalid or TooOld) leaves the estimate, the
//     history window and the held samples exactly as they were. One that
//     fails its checks is not taken at all: its Result has Seq 0 and the
//     robot, statistics included, does not change, so a service can journal
//     exactly the inputs that were taken and replay them to the same state.
//   - Process noise depends only on distance travelled, angle turned and
//     elapsed time, and adds over sub-intervals: the estimate does not depend
//     on the rate at which the controller samples its encoders.
package fusion
