package server

import (
	"sync"
	"sync/atomic"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "reckon.example/proto/reckon/v1"
)

// maxLiveFixes bounds the fixes a live view keeps per robot between two
// reads; older ones are dropped first and counted.
const maxLiveFixes = 64

// LiveFix is a fix as a live view draws it: where the sensor said its
// mounted point was, in the field frame, and the verdict at arrival.
type LiveFix struct {
	// StampNs is the fix's stamp, nanoseconds on the robot's time base.
	StampNs int64
	// SensorID names the sensor.
	SensorID string
	// XM and YM are the measured field position of the sensor's mounted
	// point, metres; HasPosition is false for heading and landmark fixes,
	// which measure no position.
	XM, YM      float64
	HasPosition bool
	// Verdict is the verdict the fix got on arrival (a held fix is
	// decided later and stays held here).
	Verdict pb.Verdict
}

// LiveUpdate is the newest state of one robot for a live view, with what
// happened since the view last read it.
type LiveUpdate struct {
	// Robot is "robots/{robot}".
	Robot string
	// Gone is set when the robot was deleted; the other fields are empty.
	Gone bool
	// State is the robot's state.
	State pb.RobotState
	// Pose is the newest fused pose (nil for a robot quarantined at
	// restore, which has none).
	Pose *pb.FusedPose
	// Events happened since the last read (at most Options.MaxWatchEvents).
	Events []*pb.FusionEvent
	// Fixes arrived since the last read (at most 64).
	Fixes []LiveFix
	// Skipped counts the poses replaced before the view read them;
	// EventsDropped and FixesDropped count those dropped for the bounds.
	Skipped, EventsDropped, FixesDropped uint64
}

// Live is one live view's mailbox: the newest state of every robot and
// what happened since the last Take, fed where the Watch streams are fed
// (after a batch's journal write, under the robot's lock, so in the
// robot's order). Publishing
// overwrites the pose and bounds the events and fixes, so a view that
// does not read conflates and never slows ingest; it holds at most one
// LiveUpdate per robot. Its methods are safe for concurrent use.
type Live struct {
	s      *Server
	notify chan struct{} // capacity 1

	mu      sync.Mutex // protects robots and order
	robots  map[string]*LiveUpdate
	order   []string // robots with an update, in the order they first had one
	closed  atomic.Bool
	maxEvts int
}

// liveHub fans every robot's updates out to the open live views.
type liveHub struct {
	mu    sync.Mutex // protects views, done
	views map[*Live]struct{}
	done  chan struct{} // closed by end; made on first use
	open  atomic.Int64  // len(views), read without the lock on the ingest path

	conflated atomic.Uint64 // updates replaced before a view read them
}

func (h *liveHub) doneChan() chan struct{} {
	if h.done == nil {
		h.done = make(chan struct{})
	}
	return h.done
}

// OpenLive opens a live view of every robot; it starts with each robot's
// current state. Close it when done. Past Limits.MaxViewers open views it
// answers RESOURCE_EXHAUSTED naming the flag.
func (s *Server) OpenLive() (*Live, error) {
	h := &s.live
	l := &Live{s: s, notify: make(chan struct{}, 1), robots: map[string]*LiveUpdate{}, maxEvts: s.opt.MaxWatchEvents}
	h.mu.Lock()
	if len(h.views) >= s.opt.Limits.MaxViewers {
		h.mu.Unlock()
		return nil, status.Errorf(codes.ResourceExhausted, "view: the service already has %d open live views, the limit (-max-viewers)", s.opt.Limits.MaxViewers)
	}
	if h.views == nil {
		h.views = map[*Live]struct{}{}
	}
	h.views[l] = struct{}{}
	h.open.Store(int64(len(h.views)))
	s.opt.Metrics.views(len(h.views))
	h.doneChan()
	h.mu.Unlock()
	// Robots that change from here on publish to l; their newer poses win
	// over this first look (put keeps the higher sequence).
	for _, r := range s.list() {
		r.mu.Lock()
		u := LiveUpdate{Robot: r.name, State: r.state}
		if r.fr != nil {
			u.Pose = poseNow(r)
		}
		gone := r.deleted
		r.mu.Unlock()
		if !gone {
			l.put(u)
		}
	}
	return l, nil
}

// Notify receives a value when updates are waiting.
func (l *Live) Notify() <-chan struct{} { return l.notify }

// Done is closed when the server ends its watches (EndStreams, Close).
func (l *Live) Done() <-chan struct{} {
	h := &l.s.live
	h.mu.Lock()
	defer h.mu.Unlock()
	return h.doneChan()
}

// Take returns the waiting updates, one per robot in the order the robots
// first appeared, and empties the mailbox.
func (l *Live) Take() []LiveUpdate {
	l.mu.Lock()
	defer l.mu.Unlock()
	out := make([]LiveUpdate, 0, len(l.order))
	for _, name := range l.order {
		out = append(out, *l.robots[name])
		delete(l.robots, name)
	}
	l.order = l.order[:0]
	return out
}

// Close closes the view; further updates are not kept.
func (l *Live) Close() {
	if l.closed.Swap(true) {
		return
	}
	h := &l.s.live
	h.mu.Lock()
	delete(h.views, l)
	h.open.Store(int64(len(h.views)))
	l.s.opt.Metrics.views(len(h.views))
	h.mu.Unlock()
}

// LiveConflated returns how many live view updates were replaced by a
// newer one before their view read them, since the server started.
func (s *Server) LiveConflated() uint64 { return s.live.conflated.Load() }

// put merges u into the mailbox and wakes the reader; it never blocks.
// The mailbox copies u's events and fixes into slices of its own, which
// it bounds: every view gets the same u.
func (l *Live) put(u LiveUpdate) {
	l.mu.Lock()
	old := l.robots[u.Robot]
	switch {
	case old == nil:
		old = &LiveUpdate{Robot: u.Robot}
		l.robots[u.Robot] = old
		l.order = append(l.order, u.Robot)
	default:
		l.s.live.conflated.Add(1)
		l.s.opt.Metrics.viewConflated()
	}
	if u.Gone {
		*old = LiveUpdate{Robot: u.Robot, Gone: true}
	} else {
		l.merge(old, &u)
	}
	l.mu.Unlock()
	select {
	case l.notify <- struct{}{}:
	default:
	}
}

// merge adds u to the unread update old; the caller holds l.mu.
func (l *Live) merge(old, u *LiveUpdate) {
	old.Gone, old.State = false, u.State
	if u.Pose != nil && (old.Pose == nil || u.Pose.GetSequence() >= old.Pose.GetSequence()) {
		if old.Pose != nil {
			old.Skipped++
		}
		old.Pose = u.Pose
	}
	for _, e := range u.Events {
		if len(old.Events) >= l.maxEvts {
			old.Events = old.Events[1:]
			old.EventsDropped++
		}
		old.Events = append(old.Events, e)
	}
	for _, f := range u.Fixes {
		if len(old.Fixes) >= maxLiveFixes {
			old.Fixes = old.Fixes[1:]
			old.FixesDropped++
		}
		old.Fixes = append(old.Fixes, f)
	}
}

// publish hands every open view u; with none open it costs one atomic load.
func (h *liveHub) publish(u func() LiveUpdate) {
	if !h.watched() {
		return
	}
	v := u()
	h.mu.Lock()
	defer h.mu.Unlock()
	for l := range h.views {
		l.put(v)
	}
}

// watched tells whether a live view is open; it costs one atomic load.
func (h *liveHub) watched() bool { return h.open.Load() > 0 }

// end ends every live view (EndStreams, Close).
func (h *liveHub) end() {
	h.mu.Lock()
	defer h.mu.Unlock()
	select {
	case <-h.doneChan():
	default:
		close(h.done)
	}
}

// liveFixes returns the fixes among a batch's journaled inputs (positions
// entries of run), with their verdicts from out.
func liveFixes(run []*arrivedRequest, out []encodedResponse, entries []int) []LiveFix {
	var fixes []LiveFix
	for _, k := range entries {
		f := run[k].GetSample().GetFix()
		if f == nil {
			continue
		}
		lf := LiveFix{StampNs: f.GetStampNs(), SensorID: f.GetSensorId(), Verdict: out[k].Verdict}
		switch m := f.GetMeasurement().(type) {
		case *pb.Fix_Pose:
			lf.XM, lf.YM, lf.HasPosition = m.Pose.GetXM(), m.Pose.GetYM(), true
		case *pb.Fix_Position:
			lf.XM, lf.YM, lf.HasPosition = m.Position.GetXM(), m.Position.GetYM(), true
		}
		fixes = append(fixes, lf)
	}
	return fixes
}
