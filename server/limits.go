package server

import (
	"fmt"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "reckon.example/proto/reckon/v1"
)

// Limits bound what clients can make a server hold. (Sensors need no
// limit here: a robot refuses a fix from a sensor its configuration does
// not name, and the configuration holds at most fusion.MaxSensors.) Zero fields take the
// defaults given; each is a reckond flag (named in brackets), and a request
// past one is refused with a status naming the limit and the flag.
type Limits struct {
	// MaxRobots bounds the robots of the server (1000; -max-robots).
	MaxRobots int
	// MaxStringBytes bounds session_id, sensor_id, landmark_id, a pose
	// fix's marker and boot_id (128 bytes; -max-string-bytes): a longer one is
	// INVALID_ARGUMENT.
	MaxStringBytes int
	// MaxWatchersPerRobot and MaxWatchers bound open Watch streams per
	// robot (64; -max-watchers-per-robot) and in all (1024;
	// -max-watchers): one more is RESOURCE_EXHAUSTED.
	MaxWatchersPerRobot, MaxWatchers int
	// MaxViewers bounds open live views (16; -max-viewers): one more is
	// RESOURCE_EXHAUSTED.
	MaxViewers int
	// MaxIngestStreams bounds open Ingest streams in all (2048;
	// -max-ingest-streams): one more ends at once with
	// RESOURCE_EXHAUSTED. Each holds three goroutines and gRPC's buffers,
	// about 24 KiB (10,000 idle streams took 240 MB of reckond's memory).
	MaxIngestStreams int
	// MaxConnections bounds the open connections of a listener that
	// LimitConnections wraps (2048; -max-connections): one more is closed
	// at once. Each holds a file descriptor, which the journals need too.
	MaxConnections int
	// MaxHTTPConnections bounds the open connections of each of the
	// daemon's HTTP listeners, the metrics and the live view, on its own
	// (64; -max-http-connections): one more is closed at once. A live
	// view's event stream holds one, so it should be more than
	// MaxViewers.
	MaxHTTPConnections int
	// MaxPendingBytes bounds the bytes of the ingest requests that every
	// stream has received and not yet taken, together (64 MiB;
	// -max-pending-bytes): a request is charged its encoding and its
	// arrivedRequest (184 bytes on 64-bit; the sample decoded besides is
	// not charged). Past it, a stream
	// that holds requests not taken waits before receiving more, and its
	// client's sends block through gRPC's flow control: nothing is
	// refused. A stream holding none may always receive one, so the bytes
	// held stay below the bound plus one request per stream. Without it,
	// each stream could hold 2 x 256 requests of -max-message-bytes: 64
	// GiB at the defaults.
	MaxPendingBytes int
}

// withDefaults returns l with its zero fields set to the defaults.
func (l Limits) withDefaults() Limits {
	def := func(v *int, d int) {
		if *v <= 0 {
			*v = d
		}
	}
	def(&l.MaxRobots, 1000)
	def(&l.MaxStringBytes, 128)
	def(&l.MaxWatchersPerRobot, 64)
	def(&l.MaxWatchers, 1024)
	def(&l.MaxViewers, 16)
	def(&l.MaxIngestStreams, 2048)
	def(&l.MaxConnections, 2048)
	def(&l.MaxHTTPConnections, 64)
	def(&l.MaxPendingBytes, DefaultMaxPendingBytes)
	return l
}

// DefaultMaxPendingBytes is Limits.MaxPendingBytes' default, 64 MiB: a
// small coprocessor's memory (a few hundred MiB free for the service) can
// spare it, and it holds a backlog of about 200,000 ordinary samples (100
// to 200 bytes encoded, and 184 for the struct), 256 for each of 800
// streams, or 1,000 requests of the default -max-message-bytes.
const DefaultMaxPendingBytes = 64 << 20

// limitError is a refusal at a limit: the status code, a reason naming
// the field, the limit and its flag, and the field's path.
type limitError struct {
	code          codes.Code
	reason, field string
}

// checkLimits refuses a request past a limit before its robot sees it. The
// caller holds r.mu.
func (s *Server) checkLimits(r *robot, req *pb.IngestRequest) *limitError {
	max := s.opt.Limits.MaxStringBytes
	long := func(field, v string) *limitError {
		return &limitError{codes.InvalidArgument, fmt.Sprintf("%s: %d bytes exceeds the limit of %d (-max-string-bytes)", field, len(v), max), field}
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
	if id := fix.GetPose().GetMarker(); len(id) > max {
		return long("sample.fix.pose.marker", id)
	}
	if id := req.GetSample().GetRunStart().GetBootId(); len(id) > max {
		return long("sample.run_start.boot_id", id)
	}
	return nil
}

// checkConfigStrings refuses a configuration naming a sensor or a landmark
// by an id longer than -max-string-bytes: every fix naming it would be
// refused at the limit (checkLimits), so the robot could never take one.
func (s *Server) checkConfigStrings(cfg *pb.RobotConfig) error {
	max := s.opt.Limits.MaxStringBytes
	long := func(field, v string) error {
		return status.Errorf(codes.InvalidArgument, "config: %s: %d bytes exceeds the limit of %d (-max-string-bytes): no fix could name it", field, len(v), max)
	}
	for i, sen := range cfg.GetSensors() {
		if len(sen.GetId()) > max {
			return long(fmt.Sprintf("sensors[%d].id", i), sen.GetId())
		}
	}
	for i, l := range cfg.GetLandmarks() {
		if len(l.GetId()) > max {
			return long(fmt.Sprintf("landmarks[%d].id", i), l.GetId())
		}
	}
	return nil
}
