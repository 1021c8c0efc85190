package server

import (
	"sort"
	"sync"
	"sync/atomic"

	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
)

// This file delivers a held input's final verdict (a Resolution) to the
// ingest stream that sent the input, whichever stream's input decided it
// (DEVELOPERS.md, "Design: Time ordering and late measurements"). The
// journal is not concerned: the deciding input's journaled response keeps
// every resolution it caused, as the robot computed it, and replay compares
// against that; only what is sent on which stream differs.

// Bounds of the resolutions a robot keeps for the sessions whose stream is
// gone, to be collected by the next stream with the same session id: the
// newest parkedPerSession of each of the parkedSessions most recently used
// sessions. Older ones are dropped (the robot's statistics still count them).
const (
	parkedPerSession = 4096
	parkedSessions   = 64
	// resolvedPerResponse bounds the resolutions in one resolution-only
	// response (about 40 bytes each: far below gRPC's 4 MiB message limit).
	resolvedPerResponse = 1024
)

// holder is who sent a held input: its stream's outbox (nil for an input
// that came without a stream), its session id and client sequence.
type holder struct {
	ob        *outbox
	sessionID string
	clientSeq uint64
}

// parcel is a resolution waiting in an outbox, with what it takes to park
// it for its session if the stream ends before sending it.
type parcel struct {
	r         *robot
	sessionID string
	res       *pb.Resolution
}

// outbox holds the resolutions that other streams' inputs decided for one
// ingest stream's held inputs, until the stream's taking goroutine sends
// them after its current batch (so after the "held" verdict they follow).
type outbox struct {
	mu      sync.Mutex // protects pending and closed
	pending []parcel
	closed  bool
	ready   chan struct{} // capacity 1: something pending

	// bound are the robots whose parked resolutions for this stream's
	// session were collected; only the stream's taking goroutine uses it.
	bound map[*robot]string
}

func newOutbox() *outbox { return &outbox{ready: make(chan struct{}, 1)} }

// put queues a resolution; false when the stream has ended.
func (ob *outbox) put(p parcel) bool {
	ob.mu.Lock()
	defer ob.mu.Unlock()
	if ob.closed {
		return false
	}
	ob.pending = append(ob.pending, p)
	signal(ob.ready)
	return true
}

func (ob *outbox) isClosed() bool {
	ob.mu.Lock()
	defer ob.mu.Unlock()
	return ob.closed
}

// drain returns the pending resolutions as resolution-only responses
// (client_sequence 0, sequence 0, verdict UNSPECIFIED, only resolved).
func (ob *outbox) drain() []encodedResponse {
	ob.mu.Lock()
	ps := ob.pending
	ob.pending = nil
	ob.mu.Unlock()
	return resolutionResponses(ps)
}

// close ends the outbox: later resolutions for the stream are parked for
// its session. It returns what was pending; park parks them instead, those
// of a deleted robot in gone.
func (ob *outbox) close(park bool, gone *orphans) []encodedResponse {
	ob.mu.Lock()
	ps := ob.pending
	ob.pending, ob.closed = nil, true
	ob.mu.Unlock()
	if !park {
		return resolutionResponses(ps)
	}
	for _, p := range ps {
		if p.sessionID == "" {
			continue
		}
		p.r.mu.Lock()
		if p.r.deleted {
			gone.add(p.r, p.sessionID, p.res)
		} else {
			p.r.parked.add(p.sessionID, p.res)
		}
		p.r.mu.Unlock()
	}
	return nil
}

func resolutionResponses(ps []parcel) []encodedResponse {
	var out []encodedResponse
	for len(ps) > 0 {
		n := min(len(ps), resolvedPerResponse)
		out = append(out, encodedResponse{})
		resp := &out[len(out)-1]
		for _, p := range ps[:n] {
			resp.Resolved = append(resp.Resolved, p.res)
		}
		ps = ps[n:]
	}
	return out
}

// route runs after a run's entries are journaled: it notes who sent each
// held input, and keeps in each response only the resolutions of inputs
// that ob's stream sent, each stamped with its client sequence, handing
// the others to their senders' streams (or parking them for their
// sessions). A response so changed is encoded again, and its session
// remembers it as sent, so that a retry gets what the first answer was.
// ob is the stream of the run (nil: none, as for ReseedRobot); vs holds
// the new encodings. The caller holds r.mu.
func (r *robot) route(run []*arrivedRequest, out []encodedResponse, entries []int, ob *outbox, vs *slab) {
	if ob != nil && (len(r.parked.byID) > 0 || len(r.holders) > 0) {
		r.bind(run, ob)
	}
	for _, k := range entries {
		resp := &out[k].IngestResponse
		if len(resp.Resolved) > 0 {
			// Kept in place: the response's own slice, which the journal's
			// record has encoded already.
			own := resp.Resolved[:0]
			for _, res := range resp.Resolved {
				h, ok := r.holders[res.Sequence]
				if !ok {
					// Held before a restart, and either before the
					// journal's last snapshot or without a session id:
					// its sender is unknown.
					continue
				}
				delete(r.holders, res.Sequence)
				res.ClientSequence = h.clientSeq
				if ob != nil && h.ob == ob {
					own = append(own, res)
					continue
				}
				r.deliver(h, res)
			}
			resp.Resolved, out[k].wire = own, nil
			if sid := run[k].GetSessionId(); sid != "" {
				if wire, err := vs.marshalVerdict(resp); err == nil {
					// An error is not expected (record encoded it);
					// the retry then gets the journaled form.
					out[k].wire = wire
					r.sessions.add(sid, run[k].GetClientSequence(), wire)
				}
			}
		}
		if resp.Verdict == pb.Verdict_VERDICT_HELD {
			if r.holders == nil {
				r.holders = map[uint64]holder{}
			}
			r.holders[resp.Sequence] = holder{ob: ob, sessionID: run[k].GetSessionId(), clientSeq: run[k].GetClientSequence()}
		}
	}
}

// bind gives ob, the first time its stream feeds the robot with a session
// id, the resolutions parked for that session and the held inputs that
// the session's earlier streams sent. The caller holds r.mu.
func (r *robot) bind(run []*arrivedRequest, ob *outbox) {
	sid := run[0].GetSessionId()
	if sid == "" {
		return
	}
	if _, done := ob.bound[r]; done {
		return
	}
	if ob.bound == nil {
		ob.bound = map[*robot]string{}
	}
	ob.bound[r] = sid
	for _, res := range r.parked.take(sid) {
		ob.put(parcel{r: r, sessionID: sid, res: res})
	}
	for seq, h := range r.holders {
		if h.sessionID == sid && h.ob != ob && (h.ob == nil || h.ob.isClosed()) {
			h.ob = ob
			r.holders[seq] = h
		}
	}
}

// deliver hands a resolution to its sender's stream, or parks it for the
// sender's session when that stream has ended; without a session it is
// dropped. The caller holds r.mu.
func (r *robot) deliver(h holder, res *pb.Resolution) {
	if h.ob != nil && h.ob.put(parcel{r: r, sessionID: h.sessionID, res: res}) {
		return
	}
	if h.sessionID != "" {
		r.parked.add(h.sessionID, res)
	}
}

// resolveDeleted gives each input the robot holds a final verdict as the
// robot is deleted (DeleteRobot, under r.mu, r.deleted set, once its
// journal is set aside: a journal left in place is restored at the next
// start, holding the inputs still): not applied, REFUSAL_ROBOT_DELETED. Each goes to its sender's stream; those of senders
// whose stream is gone, and the resolutions parked for the robot's
// sessions, are kept in gone by the robot's name. An input whose sender is
// unknown (held before a restart, or sent without a session and its stream
// gone) is told no one.
func (r *robot) resolveDeleted(gone *orphans) {
	seqs := make([]uint64, 0, len(r.holders))
	for seq := range r.holders {
		seqs = append(seqs, seq)
	}
	sort.Slice(seqs, func(i, j int) bool { return seqs[i] < seqs[j] })
	for _, seq := range seqs {
		h := r.holders[seq]
		res := &pb.Resolution{Sequence: seq, Verdict: pb.Verdict_VERDICT_INVALID, Refusal: pb.Refusal_REFUSAL_ROBOT_DELETED,
			Reason: "robot: " + r.name + " was deleted while the input was held waiting for odometry; not applied", ClientSequence: h.clientSeq}
		if h.ob != nil && h.ob.put(parcel{r: r, sessionID: h.sessionID, res: res}) {
			continue
		}
		if h.sessionID != "" {
			r.parked.add(h.sessionID, res)
		}
	}
	r.holders = nil
	for id, l := range r.parked.byID {
		for _, res := range l.res {
			gone.add(r, id, res)
		}
	}
	r.parked = parkedResolutions{}
}

// orphanRobots bounds the deleted robots whose resolutions orphans keeps:
// the orphanRobots most recently given one.
const orphanRobots = 16

// orphans are the resolutions of deleted robots kept for sessions whose
// stream was gone, by the robot's name and the session, to be collected by
// the next stream that sends a request naming the robot with that session
// id, whether the name is free now or names a new robot.
type orphans struct {
	// n counts the robots kept, read without mu on every run of samples
	// (collect's fast path).
	n      atomic.Int32
	mu     sync.Mutex // protects byName and tick
	byName map[string]*orphanLog
	tick   uint64
}

type orphanLog struct {
	// gone stands for the deleted robots of the name in the parcels that
	// collect hands out: only its name and deleted are set, so that a
	// stream that ends before sending them keeps them here again (close),
	// and the robot itself, its filter and its sessions' verdicts (up to
	// maxSessionBytes), is not kept with them.
	gone   *robot
	used   uint64
	parked parkedResolutions
}

// add keeps a resolution of the deleted robot r for session id, forgetting
// the robot given one longest ago past orphanRobots.
func (o *orphans) add(r *robot, id string, res *pb.Resolution) {
	name := r.name
	o.mu.Lock()
	defer o.mu.Unlock()
	if o.byName == nil {
		o.byName = map[string]*orphanLog{}
	}
	o.tick++
	l := o.byName[name]
	if l == nil {
		if len(o.byName) >= orphanRobots {
			evictOldest(o.byName, func(l *orphanLog) uint64 { return l.used })
		}
		l = &orphanLog{gone: &robot{name: name, deleted: true}}
		o.byName[name] = l
	}
	l.used = o.tick
	l.parked.add(id, res)
	o.n.Store(int32(len(o.byName)))
}

// collect hands ob the resolutions kept for the deleted robot name and
// session id (none: nothing).
func (o *orphans) collect(name, id string, ob *outbox) {
	if o.n.Load() == 0 || id == "" || ob == nil {
		return
	}
	o.mu.Lock()
	var res []*pb.Resolution
	var r *robot
	if l := o.byName[name]; l != nil {
		r, res = l.gone, l.parked.take(id)
		if len(l.parked.byID) == 0 {
			delete(o.byName, name)
			o.n.Store(int32(len(o.byName)))
		}
	}
	o.mu.Unlock()
	for _, rs := range res {
		// Kept again, if the stream ends before sending it, as a deleted
		// robot's (close).
		if !ob.put(parcel{r: r, sessionID: id, res: rs}) {
			o.add(r, id, rs)
		}
	}
}

// parkedResolutions are the resolutions kept for sessions whose stream is
// gone; the robot's mutex protects them.
type parkedResolutions struct {
	byID map[string]*parkedLog
	tick uint64
}

type parkedLog struct {
	used uint64
	res  []*pb.Resolution
}

// add parks a resolution, dropping the session's oldest past
// parkedPerSession and the session used longest ago past parkedSessions.
func (p *parkedResolutions) add(id string, res *pb.Resolution) {
	if p.byID == nil {
		p.byID = map[string]*parkedLog{}
	}
	p.tick++
	l := p.byID[id]
	if l == nil {
		if len(p.byID) >= parkedSessions {
			evictOldest(p.byID, func(l *parkedLog) uint64 { return l.used })
		}
		l = &parkedLog{}
		p.byID[id] = l
	}
	l.used = p.tick
	if len(l.res) >= parkedPerSession {
		l.res = append(l.res[:0], l.res[1:]...)
	}
	l.res = append(l.res, res)
}

// evictOldest deletes the entry of m with the least used.
func evictOldest[V any](m map[string]V, used func(V) uint64) {
	var oldest string
	var at uint64
	for k, v := range m {
		if u := used(v); oldest == "" || u < at {
			oldest, at = k, u
		}
	}
	delete(m, oldest)
}

// take returns and forgets the resolutions parked for a session.
func (p *parkedResolutions) take(id string) []*pb.Resolution {
	l := p.byID[id]
	if l == nil {
		return nil
	}
	delete(p.byID, id)
	return l.res
}

// sentForm returns a journaled response as it was sent on the stream of
// session sid: only the resolutions of held inputs that the session sent
// (holders, updated), with their client sequences. Restore remembers it for
// retries.
func sentForm(resp *pb.IngestResponse, sid string, holders map[uint64]holder) *pb.IngestResponse {
	if len(resp.GetResolved()) == 0 {
		return resp
	}
	var own []*pb.Resolution
	for _, res := range resp.GetResolved() {
		h, ok := holders[res.GetSequence()]
		delete(holders, res.GetSequence())
		if ok && h.sessionID == sid {
			c := proto.CloneOf(res)
			c.ClientSequence = h.clientSeq
			own = append(own, c)
		}
	}
	sent := proto.CloneOf(resp)
	sent.Resolved = own
	return sent
}

// noteHeld records the sender of a held input in holders.
func noteHeld(holders map[uint64]holder, resp *pb.IngestResponse, sid string) {
	if sid != "" && resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
		holders[resp.GetSequence()] = holder{sessionID: sid, clientSeq: resp.GetClientSequence()}
	}
}

// pruneHolders keeps, of the holders a restore found, the newest n by
// sequence: the robot holds n inputs now, held ones resolve in stamp order
// (which for one sender is its sending order), and a stale entry, whose
// input was decided before the journal's last snapshot, is the older.
func pruneHolders(holders map[uint64]holder, n int) map[uint64]holder {
	if len(holders) <= n {
		return holders
	}
	seqs := make([]uint64, 0, len(holders))
	for s := range holders {
		seqs = append(seqs, s)
	}
	sort.Slice(seqs, func(i, j int) bool { return seqs[i] > seqs[j] })
	for _, s := range seqs[n:] {
		delete(holders, s)
	}
	return holders
}
