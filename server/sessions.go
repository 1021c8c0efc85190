package server

import (
	"slices"
	"sort"

	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
)

// Bounds of what a robot remembers to answer retries (IngestRequest.
// session_id): the verdicts of the newest sessionVerdicts client sequences
// of each of its maxSessions most recently used sessions. A retry older
// than that is taken as a new input.
const (
	sessionVerdicts = 4096
	maxSessions     = 64
	// maxSessionBytes bounds a robot's remembered verdicts in all: a
	// verdict is about 30 bytes, so 8 MiB hold every session's whole window,
	// but one carrying events and resolutions may take ten times that, and
	// a client with many sessions would otherwise grow each robot by up to
	// 64 * 4096 such verdicts. Past it the sessions used longest ago are
	// forgotten first, never the one just used.
	maxSessionBytes = 8 << 20
	// snapshotSessionBytes bounds the verdicts a snapshot carries, so
	// that a retry is recognised after a restart although the inputs it
	// repeats are before the snapshot: the newest verdicts of the most
	// recently used sessions first, all sessionVerdicts of each while they
	// fit. A verdict is about 30 bytes, so 2 MiB hold the whole window of
	// about 16 sessions, and the snapshot stays below the journal's record
	// limit of 4 MiB.
	snapshotSessionBytes = 2 << 20
)

// sessions are a robot's recent ingest sessions; the robot's mutex
// protects them.
type sessions struct {
	byID map[string]*sessionLog
	tick uint64
	// bytes is the size of every remembered verdict (maxSessionBytes).
	bytes int
	// last is the session of the last lookup or add, under the key
	// lastID: a robot's samples mostly come from one session, and the map
	// lookup each sample made, on a map out of the cache at robot rates,
	// was about 0.6 us of a sample's time under the lock
	// (BenchmarkRobotRates' profile).
	lastID string
	last   *sessionLog
}

// log returns the session id's log, or nil.
func (ss *sessions) log(id string) *sessionLog {
	if ss.last != nil && id == ss.lastID {
		return ss.last
	}
	l := ss.byID[id]
	if l != nil {
		ss.lastID, ss.last = id, l
	}
	return l
}

// sessionLog is one session's newest verdicts, as encoded and sent, in
// the order added. A client counts its sequence up, so the ring's client
// sequences usually rise along it: lookup then searches the ring, and a
// sample costs no map operation. Once one is added out of that order,
// index maps each client sequence to its position from then on.
type sessionLog struct {
	used  uint64
	bytes int            // its verdicts' size
	index map[uint64]int // client sequence -> position in ring; nil while they rise
	ring  []sessionVerdict
	next  int // the ring position written next once it is full
	// lastSeq is the client sequence of the verdict written into the
	// ring last (the newest, at(len(ring)-1)), kept here so that a
	// sample's lookup and add compare with it without reading the ring,
	// whose end is out of the cache when the sample comes
	// (BenchmarkRobotRates' profile, session 19: sessionLog.find 0.4% of
	// the process's CPU).
	lastSeq uint64
}

type sessionVerdict struct {
	clientSeq uint64
	wire      []byte
}

// at returns the k-th oldest verdict of the ring.
func (l *sessionLog) at(k int) *sessionVerdict {
	if len(l.ring) == sessionVerdicts {
		k = (l.next + k) % sessionVerdicts
	}
	return &l.ring[k]
}

// find returns the ring position of clientSeq's verdict.
func (l *sessionLog) find(clientSeq uint64) (int, bool) {
	if l.index != nil {
		i, ok := l.index[clientSeq]
		return i, ok
	}
	n := len(l.ring)
	if n == 0 || clientSeq > l.lastSeq {
		return 0, false
	}
	k := sort.Search(n, func(k int) bool { return l.at(k).clientSeq >= clientSeq })
	if k == n || l.at(k).clientSeq != clientSeq {
		return 0, false
	}
	if n == sessionVerdicts {
		return (l.next + k) % sessionVerdicts, true
	}
	return k, true
}

// lookup returns the verdict sent for (id, clientSeq), or nil.
func (ss *sessions) lookup(id string, clientSeq uint64) []byte {
	l := ss.log(id)
	if l == nil {
		return nil
	}
	i, ok := l.find(clientSeq)
	if !ok {
		return nil
	}
	ss.tick++
	l.used = ss.tick
	return l.ring[i].wire
}

// add remembers the verdict sent for (id, clientSeq); the session used
// longest ago is forgotten when there are too many.
func (ss *sessions) add(id string, clientSeq uint64, wire []byte) {
	if ss.byID == nil {
		ss.byID = map[string]*sessionLog{}
	}
	ss.tick++
	l := ss.log(id)
	if l == nil {
		if len(ss.byID) >= maxSessions {
			ss.evict()
		}
		l = &sessionLog{}
		ss.byID[id] = l
		ss.lastID, ss.last = id, l
	}
	l.used = ss.tick
	if l.index != nil || len(l.ring) > 0 && clientSeq <= l.lastSeq {
		if i, ok := l.find(clientSeq); ok {
			ss.grow(l, len(wire)-len(l.ring[i].wire))
			l.ring[i].wire = wire
			ss.trim(l)
			return
		}
		if l.index == nil {
			// Out of order: map them from now on.
			l.index = make(map[uint64]int, sessionVerdicts)
			for i, v := range l.ring {
				l.index[v.clientSeq] = i
			}
		}
	}
	if len(l.ring) < sessionVerdicts {
		if l.index != nil {
			l.index[clientSeq] = len(l.ring)
		}
		l.ring = append(l.ring, sessionVerdict{clientSeq, wire})
		l.lastSeq = clientSeq
		ss.grow(l, len(wire))
		ss.trim(l)
		return
	}
	if l.index != nil {
		delete(l.index, l.ring[l.next].clientSeq)
		l.index[clientSeq] = l.next
	}
	ss.grow(l, len(wire)-len(l.ring[l.next].wire))
	l.ring[l.next] = sessionVerdict{clientSeq, wire}
	l.lastSeq = clientSeq
	l.next = (l.next + 1) % sessionVerdicts
	ss.trim(l)
}

// grow counts n more bytes of session l's verdicts.
func (ss *sessions) grow(l *sessionLog, n int) {
	l.bytes += n
	ss.bytes += n
}

// trim forgets the sessions used longest ago while the verdicts remembered
// exceed maxSessionBytes, but never keep, the session just used.
func (ss *sessions) trim(keep *sessionLog) {
	for ss.bytes > maxSessionBytes && len(ss.byID) > 1 {
		ss.evictBut(keep)
	}
}

func (ss *sessions) evict() { ss.evictBut(nil) }

// evictBut forgets the session used longest ago other than keep.
func (ss *sessions) evictBut(keep *sessionLog) {
	var oldest string
	var at uint64
	for id, l := range ss.byID {
		if l != keep && (oldest == "" || l.used < at) {
			oldest, at = id, l.used
		}
	}
	if oldest == "" {
		return
	}
	ss.bytes -= ss.byID[oldest].bytes
	delete(ss.byID, oldest)
	if oldest == ss.lastID {
		ss.lastID, ss.last = "", nil
	}
}

// recent returns the newest n verdicts of the session, oldest first.
func (l *sessionLog) recent(n int) []sessionVerdict {
	out := make([]sessionVerdict, 0, min(n, len(l.ring)))
	start := 0
	if len(l.ring) == sessionVerdicts {
		start = l.next
	}
	for k := max(0, len(l.ring)-n); k < len(l.ring); k++ {
		out = append(out, l.ring[(start+k)%len(l.ring)])
	}
	return out
}

// toProto returns the sessions for a snapshot, at most
// snapshotSessionBytes of verdicts: the most recently used session first,
// the newest verdicts of each first. The sessions are listed least
// recently used first, each one's verdicts oldest first, so that restore
// recreates the order.
func (ss *sessions) toProto() ([]*pb.JournalSession, error) {
	ids := make([]string, 0, len(ss.byID))
	for id := range ss.byID {
		ids = append(ids, id)
	}
	sort.Slice(ids, func(i, j int) bool { return ss.byID[ids[i]].used > ss.byID[ids[j]].used })
	budget := snapshotSessionBytes
	var out []*pb.JournalSession
	for _, id := range ids {
		vs := ss.byID[id].recent(sessionVerdicts)
		k := len(vs)
		for k > 0 && budget >= len(vs[k-1].wire) {
			budget -= len(vs[k-1].wire)
			k--
		}
		if k == len(vs) {
			break
		}
		js := &pb.JournalSession{SessionId: id}
		for _, v := range vs[k:] {
			resp := &pb.IngestResponse{}
			if err := proto.Unmarshal(v.wire, resp); err != nil {
				return nil, err
			}
			js.Verdicts = append(js.Verdicts, resp)
		}
		out = append(out, js)
	}
	slices.Reverse(out)
	return out, nil
}

// restore takes the sessions of a snapshot (before the inputs after it).
func (ss *sessions) restore(in []*pb.JournalSession) error {
	*ss = sessions{}
	for _, js := range in {
		for _, v := range js.GetVerdicts() {
			if err := ss.addMessage(js.GetSessionId(), v); err != nil {
				return err
			}
		}
	}
	return nil
}

// addMessage remembers a verdict read back from the journal.
func (ss *sessions) addMessage(id string, resp *pb.IngestResponse) error {
	wire, err := proto.Marshal(resp)
	if err != nil {
		return err
	}
	ss.add(id, resp.GetClientSequence(), wire)
	return nil
}
