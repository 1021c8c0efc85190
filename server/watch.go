package server

import (
	"context"
	"sync"
	"sync/atomic"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "reckon.example/proto/reckon/v1"
)

// watcher is one Watch stream's mailbox: the newest pose and the events
// since the last send. Publishing overwrites, so a slow watcher conflates.
type watcher struct {
	mu      sync.Mutex // protects the fields below
	pose    *pb.FusedPose
	events  []*pb.FusionEvent
	skipped uint64
	dropped uint64

	notify chan struct{} // capacity 1
}

// take empties the mailbox.
func (w *watcher) take() *pb.WatchResponse {
	w.mu.Lock()
	defer w.mu.Unlock()
	if w.pose == nil {
		return nil
	}
	resp := &pb.WatchResponse{Pose: w.pose, Events: w.events, Skipped: w.skipped, EventsDropped: w.dropped}
	w.pose, w.events, w.skipped, w.dropped = nil, nil, 0, 0
	return resp
}

// hub fans a robot's poses out to its watchers.
type hub struct {
	mu       sync.Mutex // protects watchers, closed, done
	watchers map[*watcher]struct{}
	closed   bool
	done     chan struct{}
	// n is len(watchers), for count without the mutex: every sample asks
	// whether its robot is watched (BenchmarkRobotRates' profile).
	n atomic.Int32
}

func (h *hub) doneChan() chan struct{} {
	if h.done == nil {
		h.done = make(chan struct{})
	}
	return h.done
}

// add adds a watcher unless the hub already has limit.
func (h *hub) add(limit int) (*watcher, <-chan struct{}, bool) {
	h.mu.Lock()
	defer h.mu.Unlock()
	if len(h.watchers) >= limit {
		return nil, nil, false
	}
	w := &watcher{notify: make(chan struct{}, 1)}
	if h.watchers == nil {
		h.watchers = map[*watcher]struct{}{}
	}
	h.watchers[w] = struct{}{}
	h.n.Store(int32(len(h.watchers)))
	return w, h.doneChan(), true
}

func (h *hub) remove(w *watcher) {
	h.mu.Lock()
	defer h.mu.Unlock()
	delete(h.watchers, w)
	h.n.Store(int32(len(h.watchers)))
}

func (h *hub) count() int { return int(h.n.Load()) }

// publish hands every watcher the newest pose; it never blocks.
func (h *hub) publish(pose *pb.FusedPose, events []*pb.FusionEvent, maxEvents int) {
	h.mu.Lock()
	defer h.mu.Unlock()
	for w := range h.watchers {
		w.mu.Lock()
		if w.pose != nil {
			w.skipped++
		}
		w.pose = pose
		for _, e := range events {
			if len(w.events) >= maxEvents {
				w.events = w.events[1:]
				w.dropped++
			}
			w.events = append(w.events, e)
		}
		w.mu.Unlock()
		select {
		case w.notify <- struct{}{}:
		default:
		}
	}
}

// close ends every watch of the robot.
func (h *hub) close() {
	h.mu.Lock()
	defer h.mu.Unlock()
	if !h.closed {
		h.closed = true
		close(h.doneChan())
	}
}

// watchEnded is how a watch of r ends when the service ends it: NOT_FOUND
// when r was deleted and FAILED_PRECONDITION, naming the problem, when it
// was quarantined, so that a client tells them from the service stopping
// (OK), after which it may connect again.
func watchEnded(r *robot) error {
	r.mu.Lock()
	defer r.mu.Unlock()
	if r.deleted {
		return status.Errorf(codes.NotFound, "robot: %s was deleted", r.name)
	}
	return r.usable()
}

// watchGone is how a watch ends when its client is gone: CANCELLED, or
// DEADLINE_EXCEEDED for a client's deadline. Not OK, which says that the
// service stops: a client whose deadline passed as the service ended the
// watch with OK took that for a stop (644 of 5000 watches with deadlines
// of 0 to 2 ms over loopback).
func watchGone(ctx context.Context) error {
	return status.FromContextError(ctx.Err()).Err()
}

// Watch streams a robot's poses, conflated for slow readers and rate
// limited by min_interval_ns. It ends with NOT_FOUND when the robot is
// deleted and with FAILED_PRECONDITION when it is quarantined.
func (s *Server) Watch(req *pb.WatchRequest, stream pb.FusionService_WatchServer) error {
	if n := req.GetMinIntervalNs(); n < 0 {
		return status.Errorf(codes.InvalidArgument, "min_interval_ns: %d is negative", n)
	}
	r, err := s.lookup(req.GetRobot())
	if err != nil {
		return err
	}
	lim := s.opt.Limits
	if n := s.watching.Add(1); n > int64(lim.MaxWatchers) {
		s.watching.Add(-1)
		return status.Errorf(codes.ResourceExhausted, "watch: the service already has %d open watches, the limit (-max-watchers)", lim.MaxWatchers)
	}
	defer s.watching.Add(-1)
	// Start with the current estimate, taken under the robot's lock with
	// the watcher's entry, so that the watcher gets every later pose and
	// none before it (ingestRun publishes under the lock).
	r.mu.Lock()
	if err := r.usable(); err != nil {
		r.mu.Unlock()
		return err
	}
	w, done, ok := r.hub.add(lim.MaxWatchersPerRobot)
	if !ok {
		r.mu.Unlock()
		return status.Errorf(codes.ResourceExhausted, "watch: %s already has %d open watches, the limit (-max-watchers-per-robot)", r.name, lim.MaxWatchersPerRobot)
	}
	first := &pb.WatchResponse{Pose: poseNow(r)}
	r.mu.Unlock()
	defer r.hub.remove(w)
	s.opt.Metrics.watchers(1)
	defer s.opt.Metrics.watchers(-1)
	if err := stream.Send(first); err != nil {
		return err
	}
	interval := time.Duration(req.GetMinIntervalNs())
	ctx := stream.Context()
	for {
		select {
		case <-ctx.Done():
			return watchGone(ctx)
		case <-done:
			return watchEnded(r)
		case <-w.notify:
		}
		if resp := w.take(); resp != nil {
			if err := stream.Send(resp); err != nil {
				return err
			}
		}
		if interval > 0 {
			t := time.NewTimer(interval)
			select {
			case <-ctx.Done():
				t.Stop()
				return watchGone(ctx)
			case <-done:
				t.Stop()
				return watchEnded(r)
			case <-t.C:
			}
		}
	}
}
