package server

import (
	"fmt"

	"google.golang.org/grpc/codes"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
)

// Limits bound what clients can make a server hold. Zero fields take the
// defaults given; each is a reckond flag (named in brackets), and a request
// past one is refused with a status naming the limit and the flag.
type Limits struct {
	// MaxRobots bounds the robots of the server (1000; -max-robots).
	MaxRobots int
	// MaxSensors bounds the distinct sensor ids a robot keeps statistics
	// for, its IMU included (64; -max-sensors): a fix from one more is
	// refused with RESOURCE_EXHAUSTED, as every sensor id costs a robot
	// state that its snapshots carry for good.
	MaxSensors int
	// MaxStringBytes bounds session_id, sensor_id and landmark_id (128
	// bytes; -max-string-bytes): a longer one is INVALID_ARGUMENT.
	MaxStringBytes int
	// MaxWatchersPerRobot and MaxWatchers bound open Watch streams per
	// robot (64; -max-watchers-per-robot) and in all (1024;
	// -max-watchers): one more is RESOURCE_EXHAUSTED.
	MaxWatchersPerRobot, MaxWatchers int
}

// withDefaults returns l with its zero fields set to the defaults.
func (l Limits) withDefaults() Limits {
	def := func(v *int, d int) {
		if *v <= 0 {
			*v = d
		}
	}
	def(&l.MaxRobots, 1000)
	def(&l.MaxSensors, 64)
	def(&l.MaxStringBytes, 128)
	def(&l.MaxWatchersPerRobot, 64)
	def(&l.MaxWatchers, 1024)
	return l
}

// limitError is a refusal at a limit: the status code and a reason naming
// the field, the limit and its flag.
type limitError struct {
	code   codes.Code
	reason string
}

// sensorOf returns the sensor id a sample adds to its robot's statistics
// ("" for none): a fix's sensor_id ("fix" when empty), "imu" for a heading.
func sensorOf(s *pb.Sample) string {
	switch {
	case s.GetFix() != nil:
		if id := s.GetFix().GetSensorId(); id != "" {
			return id
		}
		return "fix"
	case s.GetHeading() != nil:
		return "imu"
	}
	return ""
}

// checkLimits refuses a request past a limit before its robot sees it. The
// caller holds r.mu.
func (s *Server) checkLimits(r *robot, req *pb.IngestRequest) *limitError {
	max := s.opt.Limits.MaxStringBytes
	long := func(field, v string) *limitError {
		return &limitError{codes.InvalidArgument, fmt.Sprintf("%s: %d bytes exceeds the limit of %d (-max-string-bytes)", field, len(v), max)}
	}
	if len(req.GetSessionId()) > max {
		return long("session_id", req.GetSessionId())
	}
	fix := req.GetSample().GetFix()
	if len(fix.GetSensorId()) > max {
		return long("sample.fix.sensor_id", fix.GetSensorId())
	}
	if id := fix.GetLandmark().GetLandmarkId(); len(id) > max {
		return long("sample.fix.landmark.landmark_id", id)
	}
	if id := sensorOf(req.GetSample()); id != "" {
		if _, ok := r.sensors[id]; !ok && len(r.sensors) >= s.opt.Limits.MaxSensors {
			return &limitError{codes.ResourceExhausted, fmt.Sprintf("sample.fix.sensor_id: %s already has %d distinct sensor ids, the limit (-max-sensors)", r.name, len(r.sensors))}
		}
	}
	return nil
}

// knownSensors returns the sensor ids in a robot's statistics.
func knownSensors(fr *fusion.Robot) map[string]struct{} {
	out := map[string]struct{}{}
	for _, ss := range fr.Stats().Sensors {
		out[ss.ID] = struct{}{}
	}
	return out
}
