// Package server is the gRPC FusionService: a registry of robots, each a
// fusion.Robot behind a mutex, fed by any number of ingest streams, read by
// watchers that never slow ingest, recorded in a crash-safe journal and
// restored from it on start.
//
// # Invariants
//
//   - A robot's inputs are serialised by its mutex, in arrival order.
//   - A verdict is sent only after its input and output are in the journal
//     (written to the operating system, and fsynced when SyncEach is set;
//     otherwise at most SyncInterval later). An input whose journal write
//     failed is answered UNAVAILABLE and is not applied: the robot is
//     rebuilt from its journal, so that memory equals the journal.
//   - A request whose (session_id, client_sequence) the robot took before
//     is answered with the original verdict and not applied again.
//   - A robot whose journal cannot be restored is quarantined: it stays
//     listed, its rpcs answer FAILED_PRECONDITION, the others serve. A
//     robot whose disk is full pauses and resumes by itself.
//   - An input refused before a robot took it (malformed, non-finite, bad
//     covariance, time backwards, unknown robot) changes neither the robot
//     nor the journal.
//   - A watcher holds at most one pose and MaxWatchEvents events.
package server

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"maps"
	"sort"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/protoadapt"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// Options configure a Server. The zero value keeps no journal.
type Options struct {
	// JournalDir holds the robots' journals ("" keeps none: memory only).
	JournalDir string
	// SyncEach fsyncs the journal before every verdict; otherwise the
	// journal is fsynced every SyncInterval (default 100 ms).
	SyncEach     bool
	SyncInterval time.Duration
	// SegmentBytes rotates journal segments past this size (64 MiB).
	SegmentBytes int64
	// VerifyBytesPerSecond bounds the rate at which VerifyHistories reads
	// (DefaultVerifyBytesPerSecond if 0 or less).
	VerifyBytesPerSecond int64
	// MaxWatchEvents bounds the events a slow watcher keeps (256).
	MaxWatchEvents int
	// SnapshotEvery writes the robot's state into its journal after this
	// many inputs (20000), so that a restart replays only what follows.
	SnapshotEvery int
	// Logger receives the server's log (default: discard).
	Logger *slog.Logger
	// Metrics, if set, is updated as the server works.
	Metrics *Metrics
	// FS is the file system of the journal (nil: the operating system's);
	// tests put a fault-injecting one here.
	FS journal.FS
	// Limits bound what clients can grow; zero fields take defaults.
	Limits Limits
	// Build names this build in the journals it writes (default
	// ThisBuild()); a journal whose outputs another build wrote may
	// differ on replay without being refused.
	Build string
	// ProbeInterval is how often a paused robot tries its journal again
	// (default 2 s).
	ProbeInterval time.Duration

	// wrapJournal, if set (tests), wraps every journal writer.
	wrapJournal func(journalWriter) journalWriter
	// afterRun, if set (tests), is called after a run of samples released
	// its robot's lock.
	afterRun func()
	// takingBatch, if set (tests), is called with each batch that an
	// ingest stream's batch-taking goroutine took from its inbox, before
	// it is applied, holding the stream's taking turn: a test that blocks
	// in it holds the stream's taker, as a robot's lock held long would.
	// Every request then goes to the batches (none is taken where it was
	// received), so that no receiver is held with the taker.
	takingBatch func(batch []*arrivedRequest)
	// afterTake, if set (benchmarks), is called after an ingest stream's
	// take with the number of samples it took and the time from its start
	// to its verdicts sent: the service's own path where it runs, among
	// the transport's work (BenchmarkRobotRates). It costs a clock read a
	// take.
	afterTake func(samples int, d time.Duration)
}

// Server implements pb.FusionServiceServer.
type Server struct {
	pb.UnimplementedFusionServiceServer
	opt Options
	log *slog.Logger

	mu     sync.RWMutex // protects robots, busy and making
	robots map[string]*robot
	// view is a copy of robots that lookup reads without s.mu, published
	// after each change (robotsChanged): every sample looks its robot up,
	// and the read lock's shared count moved between the two cores at each
	// (BenchmarkRobotRates' profile).
	view atomic.Pointer[map[string]*robot]
	// busy are the names whose journal is being made (CreateRobot) or set
	// aside (DeleteRobot) without mu held; a create of such a name waits
	// for the work to end. making counts the creates among them, which
	// count against MaxRobots.
	busy   map[string]chan struct{}
	making int

	watching  atomic.Int64 // open Watch streams
	ingesting atomic.Int64 // open Ingest streams
	// pending bounds the bytes of the ingest requests received and not
	// yet taken (Limits.MaxPendingBytes).
	pending pendingBudget
	live    liveHub // open live views (live.go)
	// dirLock is the journal directory's lock (nil: no journal), which
	// the sync loop checks is still the directory's (checkJournalDir);
	// dirGone is set, with why, once it is not.
	dirLock *journal.DirLock
	dirGone atomic.Pointer[error]
	// goneCh is closed when dirGone is set (JournalDirGone).
	goneCh chan struct{}

	stopSync chan struct{}
	// closeOnce makes Close idempotent; closeErr is its result.
	closeOnce sync.Once
	closeErr  error
	syncDone  chan struct{}
	// stopping is closed by EndStreams: ingest streams then end after
	// taking what they have received.
	stopping chan struct{}
	stopOnce sync.Once
	// whole, when not nil, syncs every due journal with one syncfs
	// (journal.WholeSync; the operating system's file system on Linux 5.8
	// and later).
	whole *journal.WholeSync
	// prefaultNoted is set once a journal's pages could not be readied
	// (prefault).
	prefaultNoted atomic.Bool
	// verifying counts the passes of VerifyHistories running, which the
	// end of verifyCtx (stopVerify, by Close) stops.
	verifying  sync.WaitGroup
	verifyCtx  context.Context
	stopVerify context.CancelFunc
	// orphans keeps deleted robots' resolutions for sessions whose stream
	// was gone (resolutions.go).
	orphans orphans
}

// robot is one robot and everything attached to it.
type robot struct {
	name string
	id   string
	cfg  *pb.RobotConfig

	mu            sync.Mutex    // protects the fields below
	fr            *fusion.Robot // nil when quarantined at restore
	journal       journalWriter
	state         pb.RobotState
	detail        string // why paused or quarantined; or a note from restore
	deleted       bool
	sinceSnapshot int // inputs journaled since the last snapshot
	// retrying counts the journal failures retried (journalFailed) since
	// the journal last wrote without one; 0: it does.
	retrying int
	// unread counts the journal's segments that restore did not read
	// whole (from segment 0), which VerifyHistories reads, the last of
	// them only up to byte unreadTo when that is not 0 (the segment being
	// written, which restore read from its snapshot on), and historySnap
	// is the sequence of the snapshot restore started from.
	unread      int
	unreadTo    int64
	historySnap uint64
	// note is the detail of a serving robot (restore's note, damage
	// VerifyHistories found), which it gets again after a pause.
	note     string
	sessions sessions
	// holders are the senders of the inputs held now, by sequence;
	// parked, the resolutions kept for sessions whose stream is gone
	// (resolutions.go).
	holders map[uint64]holder
	parked  parkedResolutions
	// gauges are the robot's metric series (nil until first observed).
	gauges *robotGauges

	hub hub
	// sync is the periodic fsync's own state (its own lock).
	sync syncer
}

// New returns a server. Call Restore before serving to bring back robots
// from the journal directory, and Close when done.
func New(opt Options) (*Server, error) {
	if opt.SyncInterval <= 0 {
		opt.SyncInterval = 100 * time.Millisecond
	}
	if opt.MaxWatchEvents <= 0 {
		opt.MaxWatchEvents = 256
	}
	if opt.SnapshotEvery <= 0 {
		opt.SnapshotEvery = 20000
	}
	if opt.Logger == nil {
		opt.Logger = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	if opt.Build == "" {
		opt.Build = ThisBuild()
	}
	if opt.ProbeInterval <= 0 {
		opt.ProbeInterval = 2 * time.Second
	}
	opt.Limits = opt.Limits.withDefaults()
	var dirLock *journal.DirLock
	if opt.JournalDir != "" {
		fsys := opt.FS
		if fsys == nil {
			fsys = journal.OS
		}
		if err := fsys.MkdirAll(opt.JournalDir, 0o755); err != nil {
			return nil, fmt.Errorf("journal directory: %w", err)
		}
		var err error
		if dirLock, err = journal.Lock(opt.FS, opt.JournalDir); err != nil {
			return nil, err
		}
	}
	s := &Server{opt: opt, log: opt.Logger, robots: map[string]*robot{}, busy: map[string]chan struct{}{}, dirLock: dirLock, goneCh: make(chan struct{}), stopSync: make(chan struct{}), syncDone: make(chan struct{}), stopping: make(chan struct{})}
	s.verifyCtx, s.stopVerify = context.WithCancel(context.Background())
	s.pending.max, s.pending.waited = int64(opt.Limits.MaxPendingBytes), opt.Metrics.pendingWait
	opt.Metrics.pendingBytes(&s.pending)
	if opt.JournalDir != "" && opt.FS == nil {
		// Without it (a directory that cannot be opened for reading),
		// each journal syncs by itself as elsewhere.
		whole, err := journal.OpenWholeSync(opt.JournalDir)
		if err != nil {
			s.log.Warn("journal directory not opened for syncfs; each journal syncs by itself", "err", err)
		}
		s.whole = whole
	}
	go s.syncLoop()
	return s, nil
}

// syncLoop fsyncs the journals every SyncInterval and probes the paused
// robots' journals every ProbeInterval.
func (s *Server) syncLoop() {
	defer close(s.syncDone)
	t := time.NewTicker(s.opt.SyncInterval)
	defer t.Stop()
	p := time.NewTicker(s.opt.ProbeInterval)
	defer p.Stop()
	for {
		select {
		case <-s.stopSync:
			return
		case <-t.C:
			s.checkJournalDir()
			s.SyncJournals()
		case <-p.C:
			s.probePaused()
		}
	}
}

// checkJournalDir quarantines every robot that keeps a journal once the
// journal directory is no longer the one locked at start (removed, renamed,
// replaced by a file or another directory: journal.ErrDirGone). Its
// journals then write to files that no path reaches, and a restart would
// find none of it; before this check the robots went on answering
// verdicts, and the operator learnt it only from the next restart. The
// inputs answered between the change and the check (one SyncInterval) are
// lost with the directory.
func (s *Server) checkJournalDir() {
	if s.dirLock == nil || s.dirGone.Load() != nil {
		return
	}
	err := s.dirLock.Check()
	if !errors.Is(err, journal.ErrDirGone) {
		// A stat that failed otherwise (EIO) does not say the
		// directory is gone; the journals' own writes report such faults.
		return
	}
	s.dirGone.Store(&err)
	close(s.goneCh)
	s.log.Error("the journal directory is gone; the robots stop taking input, as nothing they take could be recorded: restart reckond on a journal directory", "dir", s.opt.JournalDir, "err", err)
	for _, r := range s.list() {
		r.mu.Lock()
		if r.journal != nil {
			s.quarantine(r, err.Error())
		}
		r.mu.Unlock()
	}
}

// JournalDirGone returns a channel that is closed once the journal
// directory is found gone (checkJournalDir), when the service can record
// nothing and every robot is quarantined: the daemon then reports itself
// not serving on gRPC's health service, so that a supervisor or a load
// balancer sees it, not only the log.
func (s *Server) JournalDirGone() <-chan struct{} { return s.goneCh }

// SyncJournals fsyncs every robot's journal now (a paused or quarantined
// robot's too: what it wrote before is acknowledged), without holding the
// robot's lock while the disk works (syncer), so that ingest does not
// wait for it. Only journals written since their last sync are synced;
// when there are two or more and the server has a WholeSync, with one
// syncfs for all of them, and when that fails, each with its own
// fdatasync, which tells whose journal failed.
func (s *Server) SyncJournals() {
	type due struct {
		r      *robot
		j      journalWriter
		path   string
		writes uint64
	}
	var ds []due
	for _, r := range s.list() {
		r.mu.Lock()
		j := r.journal
		var path string
		var writes uint64
		if j != nil {
			path, writes = j.SyncPoint()
		}
		r.mu.Unlock()
		if j != nil && !r.sync.current(j, path, writes) {
			ds = append(ds, due{r, j, path, writes})
		}
	}
	if len(ds) >= 2 && s.whole != nil {
		err := s.whole.Sync()
		if err == nil {
			for _, d := range ds {
				d.r.sync.synced(d.j, d.path, d.writes)
				s.prefault(d.r, d.j)
			}
			return
		}
		s.log.Warn("journal file system sync failed; syncing each journal", "err", err)
	}
	for _, d := range ds {
		if err := d.r.sync.sync(s.opt.FS, d.j, d.path, d.writes); err != nil {
			d.r.mu.Lock()
			s.journalFailed(d.r, "journal sync", err)
			d.r.mu.Unlock()
			continue
		}
		s.prefault(d.r, d.j)
	}
}

// prefault readies the pages of r's journal j that its next appends will
// copy into, which the sync just made read-only (journal.Writer.Prefault),
// unless the robot's journal changed meanwhile. It is done under the
// robot's lock, which owns the writer; it costs about what the page
// faults it saves would have, but outside the verdicts' path. A kernel
// that cannot (Linux before 5.14) is noted once; the appends then fault
// as before.
func (s *Server) prefault(r *robot, j journalWriter) {
	p, ok := j.(interface{ Prefault() error })
	if !ok {
		return
	}
	r.mu.Lock()
	var err error
	if r.journal == j {
		err = p.Prefault()
	}
	r.mu.Unlock()
	if err != nil && s.prefaultNoted.CompareAndSwap(false, true) {
		s.log.Info("journal pages are not readied ahead of appends; each append that reaches a new page takes a page fault", "robot", r.name, "err", err)
	}
}

// EndStreams ends every open stream, before a graceful stop, which would
// otherwise wait for them: a robot's controller streams its samples for as
// long as the service runs. Watch streams and live views end at once; an
// ingest stream takes and answers what it has received, then ends with
// UNAVAILABLE (errStopping). A sample sent after that has no verdict: it
// was not taken, and is resent on the same session when the service
// serves again.
func (s *Server) EndStreams() {
	s.stopOnce.Do(func() { close(s.stopping) })
	for _, r := range s.list() {
		r.hub.close()
	}
	s.live.end()
}

// errStopping ends the ingest streams when the service stops (EndStreams).
var errStopping = status.Error(codes.Unavailable, "the service is stopping: every sample without a verdict was not taken; resend it on the same session when the service serves again")

// Close syncs and closes every journal and ends every watch. Closing again
// does nothing and returns what the first Close returned.
func (s *Server) Close() error {
	s.closeOnce.Do(func() { s.closeErr = s.close() })
	return s.closeErr
}

func (s *Server) close() error {
	close(s.stopSync)
	<-s.syncDone
	s.stopVerify()
	s.verifying.Wait()
	var errs []error
	if s.whole != nil {
		errs = append(errs, s.whole.Close())
	}
	for _, r := range s.list() {
		r.mu.Lock()
		if r.journal != nil {
			errs = append(errs, r.journal.Close())
			r.journal = nil
		}
		r.mu.Unlock()
		r.sync.close()
		r.hub.close()
	}
	s.live.end()
	if s.dirLock != nil {
		errs = append(errs, s.dirLock.Unlock())
	}
	return errors.Join(errs...)
}

func (s *Server) list() []*robot {
	s.mu.RLock()
	defer s.mu.RUnlock()
	out := make([]*robot, 0, len(s.robots))
	for _, r := range s.robots {
		out = append(out, r)
	}
	sort.Slice(out, func(i, j int) bool { return out[i].name < out[j].name })
	return out
}

// lookupFrom is lookup for a stream, which mostly feeds one robot: it
// keeps the robot found last in sc, and finds it there while the robots'
// view is the same (a robot made or deleted publishes a new one). The map's
// lookup, its hash and its buckets read cold at every sample, was about 20
// of the 1,050 cache lines a sample touched at robot rates
// (BenchmarkRatesPathCold under callgrind, session 25).
func (s *Server) lookupFrom(name string, sc *scratch) (*robot, error) {
	v := s.view.Load()
	if f := &sc.found; f.r != nil && f.view == v && f.name == name {
		return f.r, nil
	}
	r, err := s.lookup(name)
	if err == nil {
		sc.found.view, sc.found.name, sc.found.r = v, strings.Clone(name), r
	}
	return r, err
}

// lookup returns the robot named name. The map is asked first: every name
// in it was checked when the robot was made, and checking a name (a
// regular expression) cost about 0.7 us of the 15 us a sample spends
// under ingestRun in BenchmarkRobotRates' profile.
func (s *Server) lookup(name string) (*robot, error) {
	var r *robot
	if v := s.view.Load(); v != nil {
		r = (*v)[name]
	}
	if r != nil {
		return r, nil
	}
	if _, err := RobotID(name); err != nil {
		return nil, status.Errorf(codes.InvalidArgument, "robot: %v", err)
	}
	return nil, status.Errorf(codes.NotFound, "robot: %s does not exist", name)
}

// proto describes the robot; the caller holds r.mu.
func (r *robot) proto() *pb.Robot {
	out := &pb.Robot{Name: r.name, Config: r.cfg, State: r.state, StateDetail: r.detail}
	if r.fr != nil {
		out.NewestStampNs, out.InputCount = r.fr.NewestNs(), r.fr.Sequence()
		out.Run, out.BootId = r.fr.Run(), r.fr.BootID()
	}
	return out
}

// CreateRobot creates robots/{robot_id}.
func (s *Server) CreateRobot(ctx context.Context, req *pb.CreateRobotRequest) (*pb.CreateRobotResponse, error) {
	if !journal.ValidID(req.GetRobotId()) {
		return nil, status.Errorf(codes.InvalidArgument, "robot_id: %q must be %s", req.GetRobotId(), idForm)
	}
	cfg, err := convert.ConfigFromProto(req.GetConfig())
	if err == nil {
		err = cfg.CheckBounds()
	}
	if err != nil {
		return nil, status.Errorf(codes.InvalidArgument, "config: %v", err)
	}
	if err := s.checkConfigStrings(req.GetConfig()); err != nil {
		return nil, err
	}
	fr, err := fusion.New(cfg)
	if err != nil {
		return nil, status.Errorf(codes.InvalidArgument, "config: %v", err)
	}
	name := RobotName(req.GetRobotId())
	r := &robot{name: name, id: req.GetRobotId(), cfg: req.GetConfig(), fr: fr, state: pb.RobotState_ROBOT_STATE_SERVING}
	done, err := s.reserve(ctx, name)
	if err != nil {
		return nil, err
	}
	defer close(done)
	if gone := s.dirGone.Load(); gone != nil {
		s.release(name, true)
		return nil, status.Errorf(codes.FailedPrecondition, "journal: %v", *gone)
	}
	if s.opt.JournalDir != "" {
		// Without s.mu: making a journal waits for the disk (fsyncs), and
		// every other robot's samples look their robot up under it.
		j, err := journal.Create(s.opt.JournalDir, r.id, &pb.JournalOpening{Robot: name, Config: r.cfg, CreateTimeUnixNs: time.Now().UnixNano(), Build: s.opt.Build}, s.journalOptions())
		if err != nil {
			s.release(name, true)
			switch {
			case isNoSpace(err):
				return nil, status.Errorf(codes.Unavailable, "journal: %v", err)
			case isOutOfFiles(err):
				// Each robot keeps its journal open: INTERNAL said a
				// fault of the service's, not a limit of the host's.
				return nil, status.Errorf(codes.ResourceExhausted, "journal: %v: the service has no file descriptor left for another robot's journal (each robot keeps one open): raise ulimit -n (LimitNOFILE= of its unit), or lower -max-robots", err)
			case isNotWritable(err):
				return nil, status.Errorf(codes.FailedPrecondition, "journal: %v: the journal directory cannot be written (its permissions, or a file system mounted read-only); create the robot again once it can", err)
			}
			return nil, status.Errorf(codes.Internal, "journal: %v", err)
		}
		r.journal = s.wrap(openJournal(j))
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	delete(s.busy, name)
	s.making--
	s.robots[name] = r
	s.robotsChanged()
	r.mu.Lock()
	s.observeRobot(r, nil, -1)
	created := LiveUpdate{Robot: name, State: r.state, Pose: poseNow(r)}
	// Under r.mu: published, the robot may take samples already.
	resp := &pb.CreateRobotResponse{Robot: r.proto()}
	r.mu.Unlock()
	s.live.publish(func() LiveUpdate { return created })
	s.log.Info("robot created", "robot", name, "wheels", len(cfg.Wheels), "imu", cfg.IMU.String())
	return resp, nil
}

// robotsChanged publishes the robots for lookup and counts them; the
// caller holds s.mu and has changed s.robots.
func (s *Server) robotsChanged() {
	v := maps.Clone(s.robots)
	s.view.Store(&v)
	s.opt.Metrics.robots(len(s.robots))
}

// reserve reserves name for a robot being created: it waits while the
// name's journal is being made or set aside, and fails when a robot of
// that name exists or the service has MaxRobots. The caller makes the
// robot, then enters it and ends the reservation (or release), and closes
// done.
func (s *Server) reserve(ctx context.Context, name string) (done chan struct{}, err error) {
	for {
		s.mu.Lock()
		if s.robots[name] != nil {
			s.mu.Unlock()
			return nil, status.Errorf(codes.AlreadyExists, "robot_id: %s exists", name)
		}
		busy := s.busy[name]
		if busy == nil {
			break
		}
		s.mu.Unlock()
		select {
		case <-busy:
		case <-ctx.Done():
			return nil, status.FromContextError(ctx.Err()).Err()
		}
	}
	defer s.mu.Unlock()
	if n := len(s.robots) + s.making; n >= s.opt.Limits.MaxRobots {
		return nil, status.Errorf(codes.ResourceExhausted, "robot_id: the service already has %d robots, the limit (-max-robots)", n)
	}
	done = make(chan struct{})
	s.busy[name] = done
	s.making++
	return done, nil
}

// release ends the reservation of name by a create (creating) or a
// delete; the caller then closes its done channel.
func (s *Server) release(name string, creating bool) {
	s.mu.Lock()
	delete(s.busy, name)
	if creating {
		s.making--
	}
	s.mu.Unlock()
}

func (s *Server) journalOptions() journal.Options {
	return journal.Options{SyncEach: s.opt.SyncEach, SegmentBytes: s.opt.SegmentBytes, FS: s.opt.FS}
}

func (s *Server) wrap(j journalWriter) journalWriter {
	if s.opt.wrapJournal != nil {
		return s.opt.wrapJournal(j)
	}
	return j
}

// GetRobot gets a robot.
func (s *Server) GetRobot(ctx context.Context, req *pb.GetRobotRequest) (*pb.GetRobotResponse, error) {
	r, err := s.lookup(req.GetName())
	if err != nil {
		return nil, err
	}
	r.mu.Lock()
	defer r.mu.Unlock()
	return &pb.GetRobotResponse{Robot: r.proto()}, nil
}

// ListRobots lists robots in name order; the page token is the last name.
func (s *Server) ListRobots(ctx context.Context, req *pb.ListRobotsRequest) (*pb.ListRobotsResponse, error) {
	size := int(req.GetPageSize())
	if size < 0 {
		return nil, status.Errorf(codes.InvalidArgument, "page_size: %d is negative", size)
	}
	if size == 0 || size > 1000 {
		size = 1000
	}
	if tok := req.GetPageToken(); tok != "" {
		// A token is the last name of a page; any other string listed
		// from wherever it sorted (from the start for "garbage").
		if _, err := RobotID(tok); err != nil {
			return nil, status.Errorf(codes.InvalidArgument, "page_token: %q is not a token this service gave (a previous response's next_page_token)", tok)
		}
	}
	out := &pb.ListRobotsResponse{}
	for _, r := range s.list() {
		if r.name <= req.GetPageToken() {
			continue
		}
		if len(out.Robots) == size {
			out.NextPageToken = out.Robots[len(out.Robots)-1].Name
			break
		}
		r.mu.Lock()
		out.Robots = append(out.Robots, r.proto())
		r.mu.Unlock()
	}
	return out, nil
}

// DeleteRobot deletes a robot; its journal is closed and set aside
// (journal.SetAside), every record kept. A quarantined robot's journal is
// set aside as it is, without a closing record, damage and all: its name
// is free again and the service need not restart.
func (s *Server) DeleteRobot(ctx context.Context, req *pb.DeleteRobotRequest) (*pb.DeleteRobotResponse, error) {
	r, err := s.lookup(req.GetName())
	if err != nil {
		return nil, err
	}
	s.mu.Lock()
	if s.robots[r.name] != r {
		// Another delete took it first.
		s.mu.Unlock()
		return nil, status.Errorf(codes.NotFound, "robot: %s does not exist", r.name)
	}
	delete(s.robots, r.name)
	s.robotsChanged()
	// A create of the name waits until the journal is set aside.
	done := make(chan struct{})
	s.busy[r.name] = done
	s.mu.Unlock()
	defer close(done)
	defer s.release(r.name, false)
	defer r.sync.close()
	r.mu.Lock()
	r.deleted = true
	quarantined := r.state == pb.RobotState_ROBOT_STATE_QUARANTINED
	switch {
	case quarantined && r.journal != nil:
		// Its journal could no longer be written: no closing record.
		err = r.journal.Remove()
	case quarantined:
		// Its journal could not be restored, so it was never opened.
		err = journal.SetAside(s.opt.FS, s.opt.JournalDir, r.id)
	case r.journal != nil:
		// The closing record says when; a journal that cannot take it (a
		// full disk) is set aside without it, so that the robot does not
		// come back at the next restart.
		cerr := r.journal.Add(&pb.JournalRecord{Entry: &pb.JournalRecord_Closing{Closing: &pb.JournalClosing{DeleteTimeUnixNs: time.Now().UnixNano()}}})
		if cerr == nil {
			_, cerr = r.journal.flush()
		}
		if cerr != nil {
			s.log.Warn("journal closing record not written; the journal is set aside without it", "robot", r.name, "err", cerr)
		}
		err = r.journal.Remove()
	}
	r.journal = nil
	if err == nil {
		// Only once its journal is set aside: one that is not comes back
		// at the next start, holding these inputs still, to decide them.
		r.resolveDeleted(&s.orphans)
	}
	if quarantined {
		s.opt.Metrics.quarantined(-1)
	}
	if r.state == pb.RobotState_ROBOT_STATE_PAUSED {
		s.opt.Metrics.paused(-1)
	}
	r.gauges = nil
	r.mu.Unlock()
	s.opt.Metrics.forget(r.name)
	r.hub.close()
	s.live.publish(func() LiveUpdate { return LiveUpdate{Robot: r.name, Gone: true} })
	if err != nil {
		return nil, status.Errorf(codes.Internal, "journal: %v", err)
	}
	s.log.Info("robot deleted", "robot", r.name)
	return &pb.DeleteRobotResponse{}, nil
}

// maxBatch bounds a group commit: the samples of one stream taken under one
// lock and one journal write, which is also how many may wait to be taken.
// A batch is what has arrived while the last one was taken, so at a robot's
// own rates it holds one sample; under a backlog, 256 rather than 64 raised
// one stream's throughput by about 15 % (BenchmarkIngestThroughput) and
// holds a verdict back by at most the batch's work, about half a millisecond.
const maxBatch = 256

// Ingest takes a stream of samples and answers each in order. Samples that
// are already waiting when one is taken are taken with it, journaled with
// one write (group commit) and then answered.
//
// Two goroutines share the taking, one at a time (ingestTurn): the one
// that receives takes a sample itself when it arrived alone, which saves
// the sample a wake-up of another goroutine (BenchmarkRobotRates); when
// samples come faster than they are taken, it hands them to the other,
// which takes them in batches while the receiver goes on receiving
// (BenchmarkIngestThroughput).
func (s *Server) Ingest(stream pb.FusionService_IngestServer) error {
	if lim := s.opt.Limits.MaxIngestStreams; s.ingesting.Add(1) > int64(lim) {
		s.ingesting.Add(-1)
		return status.Errorf(codes.ResourceExhausted, "ingest: the service already has %d open ingest streams, the limit (-max-ingest-streams)", lim)
	}
	defer s.ingesting.Add(-1)
	ctx := stream.Context()
	in := newInbox(&s.pending)
	// A third goroutine sends the verdicts of large batches, so that taking
	// the next batch overlaps with sending the last one's verdicts.
	snd := &sender{stream: stream, out: make(chan []encodedResponse, 4)}
	sendErr := make(chan error, 1)
	go func() { sendErr <- snd.run() }()
	ob := newOutbox()
	t := &ingestTurn{s: s, in: in, snd: snd, ob: ob, done: ctx.Done(), stop: s.stopping, sc: scratch{verdicts: slab{next: verdictSlabStart}}}
	go t.receive(ctx, stream)
	err := t.takeBatches(ctx)
	in.close()
	if err == nil {
		// The client closed its side: what is pending still goes out.
		if rest := ob.close(false, nil); len(rest) > 0 {
			_, err = snd.send(ctx, rest)
		}
	} else {
		ob.close(true, &s.orphans)
	}
	close(snd.out)
	if serr := <-sendErr; err == nil {
		err = serr
	}
	return err
}

// A sample counts as arriving alone when its receive waited at least
// aloneAfter for it and nothing was taken on its stream for quietFor: a
// sample already buffered when the receive began returns within a few
// microseconds, one that had to come over the connection waits at least
// for the goroutine's wake-up, tens of microseconds; and a stream that
// was taken from within the last millisecond is busy, so its samples go
// to the batches. A wrong guess costs time, never order: the taking turn
// keeps it.
//
// The requests that follow one that arrived alone without a wait of their
// own, up to togetherHere in all, are taken where they were received too:
// a robot sends what it measured at one instant together (odometry, IMU
// and a fix), and handing the second and third to the other goroutine cost
// each a wake-up (a fifth of the samples in BenchmarkRobotRates). A stream
// whose requests keep coming without a wait goes to the batches after
// them.
const (
	aloneAfter   = 50 * time.Microsecond
	quietFor     = time.Millisecond
	togetherHere = 3
)

// ingestTurn is one ingest stream's taking: whoever holds mu takes the
// waiting samples, applies them and sends their verdicts, so that order
// holds whichever goroutine does it.
type ingestTurn struct {
	s   *Server
	in  *inbox
	snd *sender
	ob  *outbox
	// done is the stream context's Done, read once: asking the context at
	// every take walks grpc-go's chain of contexts to the one that is
	// cancelled (BenchmarkRobotRates' profile).
	done <-chan struct{}
	// stop is closed when the service stops (Server.EndStreams).
	stop <-chan struct{}

	mu       sync.Mutex
	batch    []*arrivedRequest // reused by the holder of mu
	sc       scratch           // used by the holder of mu
	err      error             // the first send error; the stream is then done
	lastEnd  time.Time         // when the holder of mu last ended a take
	lastTake atomic.Int64      // the same, Unix nanoseconds, for the receiver
}

// scratch is what one ingest stream's taking reuses from batch to batch,
// so that a sample arriving alone costs no allocation of its own beyond
// its request: the space of the verdicts, the positions of the samples
// taken, and the buffer of the encoded verdicts (which the robots'
// sessions keep, so it is never written again: slab). The verdicts are
// reused once SendMsg returned with them: grpc-go has encoded them then
// (its documentation warns that a stats handler may look at a message
// later; the service installs none).
type scratch struct {
	out      []encodedResponse // the last verdicts, once they were sent; nil while the sender has them
	entries  []int
	verdicts slab
	// found is the robot the stream's last run was for, by name, in the
	// view it was found in (lookupFrom).
	found struct {
		view *map[string]*robot
		name string
		r    *robot
	}
}

// receive receives the stream's requests until it ends; a request that
// arrived alone, or with the few sent with it, it takes itself when no one
// else is taking.
func (t *ingestTurn) receive(ctx context.Context, stream grpc.ServerStream) {
	sl, dec := &slab{}, &requestDecoder{}
	// here counts the requests taken here since the last that arrived
	// alone (0: the stream's requests go to the batches).
	here := 0
	// before is when the receive began: the end of the take just done
	// here, or read anew (a clock read costs about 0.2 us on this virtual
	// machine, and a sample took four: BenchmarkRobotRates' profile).
	var before time.Time
	var reqs []arrivedRequest // a block of requests to receive into
	for {
		if t.s.pending.spent() {
			// -max-pending-bytes: received, not yet taken.
			if err := t.s.pending.wait(ctx, t.in, t.stop); err != nil {
				t.in.end(err)
				return
			}
			before = time.Time{} // the wait was not the request's
		}
		if len(reqs) == 0 {
			reqs = make([]arrivedRequest, requestBlock)
		}
		req := &reqs[0]
		reqs = reqs[1:]
		req.slab, req.dec = sl, dec
		if before.IsZero() {
			before = time.Now()
		}
		err := stream.RecvMsg(req)
		if err == nil {
			now := time.Now()
			req.arrived = now
			switch {
			case now.Sub(before) >= aloneAfter && now.UnixNano()-t.lastTake.Load() >= int64(quietFor) && t.s.opt.takingBatch == nil:
				here = 1
			case here > 0 && here < togetherHere:
				here++
			default:
				here = 0
			}
			before = time.Time{}
			if err = t.in.put(ctx, req, here == 0); err == nil && here > 0 {
				var took bool
				if took, before = t.takeHere(ctx); !took {
					here = 0
				}
			}
		}
		if err != nil {
			t.in.end(err)
			return
		}
	}
}

// requestBlock is the number of requests a stream allocates at once: one
// allocation for many samples, not one each.
const requestBlock = 32

// takeHere takes what waits, on the receiving goroutine, unless the other
// is taking; then it signals the other, which takes it after, and returns
// false. end is when its take ended (zero: it took nothing).
func (t *ingestTurn) takeHere(ctx context.Context) (took bool, end time.Time) {
	if !t.mu.TryLock() {
		signal(t.in.ready)
		return false, time.Time{}
	}
	defer t.mu.Unlock()
	if t.err == nil {
		if t.batch = t.in.takeNow(t.batch); len(t.batch) > 0 {
			t.err = t.takeOne(ctx, t.batch)
			end = t.lastEnd
		}
	}
	if t.err != nil {
		// Sending failed: the stream ends with that error (the other
		// goroutine waits on the inbox, which now returns it).
		t.in.end(t.err)
	}
	return true, end
}

// takeBatches takes requests as they come, in batches of what is waiting,
// and sends after each batch the resolutions that other streams decided
// for this one's held inputs (ob), waking for them too.
func (t *ingestTurn) takeBatches(ctx context.Context) error {
	for {
		if err := t.in.wait(ctx, t.ob.ready, t.stop); err != nil {
			t.mu.Lock()
			defer t.mu.Unlock()
			switch {
			case err == io.EOF:
				// Ended: take what the receiver left.
				for t.err == nil {
					if t.batch = t.in.takeNow(t.batch); len(t.batch) == 0 {
						break
					}
					t.err = t.takeOne(ctx, t.batch)
				}
			case err == errStopping && t.err == nil:
				// The service stops: take what was received, once (a
				// client that keeps sending would keep it going).
				t.batch = t.in.takeNow(t.batch)
				t.err = t.takeOne(ctx, t.batch)
			}
			if t.err == nil {
				// Holding the turn, so that the receiver, which takes
				// nothing once t.err is set, is not taking either when
				// the stream's sender is closed.
				t.err = err
			}
			if err == io.EOF && t.err == err {
				return nil
			}
			return t.err
		}
		t.mu.Lock()
		if t.err == nil {
			t.batch = t.in.takeNow(t.batch)
			if h := t.s.opt.takingBatch; h != nil {
				h(t.batch)
			}
			t.err = t.takeOne(ctx, t.batch)
		}
		err := t.err
		t.mu.Unlock()
		if err != nil {
			return err
		}
	}
}

// takeOne applies a batch (it may be empty: resolutions only) and sends
// its verdicts and the resolutions waiting. The caller holds t.mu.
func (t *ingestTurn) takeOne(ctx context.Context, batch []*arrivedRequest) error {
	var began time.Time
	if t.s.opt.afterTake != nil {
		began = time.Now()
	}
	defer func() {
		t.lastEnd = time.Now()
		t.lastTake.Store(t.lastEnd.UnixNano())
		if t.s.opt.afterTake != nil && len(batch) > 0 {
			t.s.opt.afterTake(len(batch), t.lastEnd.Sub(began))
		}
	}()
	var resps []encodedResponse
	if len(batch) > 0 {
		resps = t.s.ingestStream(batch, t.ob, &t.sc)
		t.in.release(batch)
	}
	if !t.gone() {
		// A stream that is gone leaves them pending, to be kept for its
		// session.
		resps = append(resps, t.ob.drain()...)
	}
	if len(resps) == 0 {
		return nil
	}
	sent, err := t.snd.send(ctx, resps)
	if sent {
		t.sc.out = resps
	} else {
		t.sc.out = nil // the sender's now
	}
	return err
}

// gone reports whether the stream's context has ended.
func (t *ingestTurn) gone() bool {
	select {
	case <-t.done:
		return true
	default:
		return false
	}
}

// inlineBatch is the largest batch whose verdicts the taking goroutine
// sends itself when nothing else waits to be sent: at a robot's own rates
// a sample arrives alone, and sending its verdict at once saves it a
// third goroutine's wake-up (BenchmarkRobotRates).
const inlineBatch = 8

// sender sends one ingest stream's verdicts in order, either from the
// taking goroutine (send) or from a goroutine of its own (queue, run).
type sender struct {
	stream grpc.ServerStream
	out    chan []encodedResponse
	// queued counts the batches queued and not yet sent. Only the holder
	// of the taking turn queues, so when it reads 0 the goroutine is idle
	// and the holder may send itself without breaking the order.
	queued atomic.Int64
}

// run sends the queued batches until out is closed; after an error it
// drains them unsent.
func (snd *sender) run() error {
	var err error
	for resps := range snd.out {
		for k := range resps {
			if err == nil {
				err = snd.stream.SendMsg(&resps[k])
			}
		}
		snd.queued.Add(-1)
	}
	return err
}

// send sends a batch's verdicts: at once when the batch is small and
// nothing waits, otherwise through the goroutine. sent says they were sent
// (or failed) before it returned: resps is then the caller's again.
func (snd *sender) send(ctx context.Context, resps []encodedResponse) (sent bool, err error) {
	if len(resps) <= inlineBatch && snd.queued.Load() == 0 {
		for k := range resps {
			if err := snd.stream.SendMsg(&resps[k]); err != nil {
				return true, err
			}
		}
		return true, nil
	}
	snd.queued.Add(1)
	select {
	case snd.out <- resps:
		return false, nil
	case <-ctx.Done():
		snd.queued.Add(-1)
		return true, ctx.Err()
	}
}

// refuse makes out the refusal of a sample, whatever it held before. A
// refusal at the service's edge is REFUSAL_NOT_JOURNALED when it is
// UNAVAILABLE (not applied: resend), REFUSAL_LIMIT for a limit, and none
// for a robot that is unknown or quarantined (its status code says it).
func refuse(out *encodedResponse, clientSeq uint64, code codes.Code, reason string) {
	out.wire = nil
	out.IngestResponse.Reset()
	out.ClientSequence, out.Verdict, out.Reason, out.StatusCode = clientSeq, pb.Verdict_VERDICT_INVALID, reason, int32(code)
	switch code {
	case codes.Unavailable:
		out.Refusal = pb.Refusal_REFUSAL_NOT_JOURNALED
	case codes.ResourceExhausted, codes.InvalidArgument:
		out.Refusal = pb.Refusal_REFUSAL_LIMIT
	case codes.FailedPrecondition:
		// robot.refusal's only FAILED_PRECONDITION.
		out.Refusal = pb.Refusal_REFUSAL_QUARANTINED
	}
}

// refuseMalformed makes out the refusal of a request the codec could not
// take (arrivedRequest.malformed): RESOURCE_EXHAUSTED, REFUSAL_LIMIT for
// one past -max-message-bytes, otherwise INVALID_ARGUMENT,
// REFUSAL_MALFORMED.
func refuseMalformed(out *encodedResponse, clientSeq uint64, err error) {
	if big, ok := err.(tooLargeError); ok {
		refuse(out, clientSeq, codes.ResourceExhausted, big.Error()+"; nothing was taken")
		return
	}
	refuse(out, clientSeq, codes.InvalidArgument,
		fmt.Sprintf("request: not a valid reckon.v1.IngestRequest encoding (%v); nothing was taken", err))
	out.Refusal = pb.Refusal_REFUSAL_MALFORMED
}

// retriedTooLarge answers a request too large to take (tooLargeError)
// whose (session_id, client_sequence) its robot took before as takeRun
// answers any retry: with the verdict sent then, or with why the robot
// takes nothing now. It reports whether the request was such a retry.
// Otherwise a client resending, after a restart that lowered
// -max-message-bytes, a sample the robot holds would be told it was
// refused.
func (s *Server) retriedTooLarge(out *encodedResponse, req *pb.IngestRequest, err error) bool {
	if _, ok := err.(tooLargeError); !ok || req.GetSessionId() == "" {
		return false
	}
	r, lerr := s.lookup(req.GetRobot())
	if lerr != nil {
		return false
	}
	r.mu.Lock()
	defer r.mu.Unlock()
	wire := r.sessions.lookup(req.GetSessionId(), req.GetClientSequence())
	if wire == nil {
		return false
	}
	if code, reason := r.refusal(); code != codes.OK {
		s.opt.Metrics.refused(code)
		refuse(out, req.GetClientSequence(), code, reason)
		return true
	}
	s.answerAgain(out, wire)
	return true
}

// ingest applies one sample (ReseedRobot and tests).
func (s *Server) ingest(name string, clientSeq uint64, sample *pb.Sample) *pb.IngestResponse {
	req := &arrivedRequest{IngestRequest: pb.IngestRequest{Robot: name, ClientSequence: clientSeq, Sample: sample}}
	return &s.ingestBatch([]*arrivedRequest{req})[0].IngestResponse
}

// ingestBatch applies samples that came without a stream: the resolutions
// their inputs decide all go to their senders' streams.
func (s *Server) ingestBatch(batch []*arrivedRequest) []encodedResponse {
	return s.ingestStream(batch, nil, &scratch{verdicts: slab{next: verdictSlabStart * len(batch)}})
}

// ingestStream applies samples of one stream (ob) in order: per run of
// samples for one robot, the robot (which checks each input first) under
// its lock, one journal write, then the watchers. The verdicts are in
// sc.out's space when it has room. A request without an arrival time (it
// came without a stream) arrived now.
func (s *Server) ingestStream(batch []*arrivedRequest, ob *outbox, sc *scratch) []encodedResponse {
	var now time.Time
	for _, req := range batch {
		if req.arrived.IsZero() {
			if now.IsZero() {
				now = time.Now()
			}
			req.arrived = now
		}
	}
	var out []encodedResponse
	if cap(sc.out) >= len(batch) {
		out = sc.out[:len(batch)]
		clear(out)
	} else {
		out = make([]encodedResponse, len(batch))
	}
	sc.out = nil
	for i := 0; i < len(batch); {
		if err := batch[i].malformed; err != nil {
			if !s.retriedTooLarge(&out[i], &batch[i].IngestRequest, err) {
				refuseMalformed(&out[i], batch[i].GetClientSequence(), err)
				s.opt.Metrics.refused(codes.Code(out[i].StatusCode))
			}
			i++
			continue
		}
		j := i + 1
		for j < len(batch) && batch[j].malformed == nil && batch[j].GetRobot() == batch[i].GetRobot() {
			j++
		}
		s.ingestRun(batch[i:j], out[i:j], ob, sc)
		i = j
	}
	return out
}

// taking is what takeRun did with a run of samples.
type taking struct {
	// entries are the positions in the run of the samples taken and added
	// to the journal's buffer, in order.
	entries []int
	// lost is the position of a sample taken but not added to the journal
	// (-1: none), cause why; the samples after it were not taken.
	lost  int
	cause error
	// dups are the positions answered with an earlier verdict.
	dups []int
}

// ingestRun takes a run of samples for one robot: under its lock, the
// samples, one journal write, the routing of resolutions to their senders
// and the pose for the watchers; then the metrics.
func (s *Server) ingestRun(run []*arrivedRequest, out []encodedResponse, ob *outbox, sc *scratch) {
	start := run[0].arrived // ingestStream set it
	// Resolutions of a deleted robot of the name kept for the session go
	// out after the run's verdicts, whatever the name names now.
	s.orphans.collect(run[0].GetRobot(), run[0].GetSessionId(), ob)
	r, err := s.lookupFrom(run[0].GetRobot(), sc)
	if err != nil {
		st := status.Convert(err)
		for k, req := range run {
			s.opt.Metrics.refused(st.Code())
			refuse(&out[k], req.GetClientSequence(), st.Code(), st.Message())
			// No robot: the status code says why (a malformed name is
			// INVALID_ARGUMENT, which refuse takes for a limit).
			out[k].Refusal = pb.Refusal_REFUSAL_UNSPECIFIED
		}
		return
	}
	var pose *pb.FusedPose
	r.mu.Lock()
	tk := s.takeRun(r, run, out, sc)
	written, cause := s.flushJournal(r, &tk)
	var lag time.Duration
	if len(tk.entries) > 0 && r.fr != nil && (s.opt.Metrics != nil || r.hub.count() > 0 || s.live.watched()) {
		// The pose is for the watchers, the live views and the metrics:
		// none, no pose (and no clock read for the lag).
		lag = time.Since(start)
		pose = poseNow(r)
	}
	if cause != nil {
		s.unapply(r, run, out, &tk, written, cause)
	}
	r.route(run, out, tk.entries[:written], ob, &sc.verdicts)
	if cause == nil && r.journal != nil && r.state == pb.RobotState_ROBOT_STATE_SERVING && r.sinceSnapshot >= s.opt.SnapshotEvery {
		// After route: the snapshot's sessions remember the verdicts as sent.
		s.snapshot(r)
	}
	if pose != nil {
		s.observeRobot(r, pose, lag)
		s.publish(r, pose, run, out, tk.entries[:written])
	}
	r.mu.Unlock()
	if s.opt.afterRun != nil {
		s.opt.afterRun()
	}
	if pose == nil {
		sc.entries = tk.entries[:0]
		return
	}
	d := time.Since(start)
	for _, k := range tk.entries[:written] {
		s.opt.Metrics.verdict(out[k].Verdict, d)
	}
	sc.entries = tk.entries[:0]
}

// publish hands the watchers and the live views the robot's pose after a
// run and the events of its entries. The caller holds r.mu, so that they
// get the robot's poses in the order the robot made them: published after
// the unlock, a run that took the lock first could publish after a later
// one, and its older pose would replace the newest in every mailbox (and
// a run's pose could follow the robot's deletion and show it again in the
// live views). A publish never blocks: it only fills mailboxes.
func (s *Server) publish(r *robot, pose *pb.FusedPose, run []*arrivedRequest, out []encodedResponse, entries []int) {
	var events []*pb.FusionEvent
	for _, k := range entries {
		events = append(events, out[k].Events...)
	}
	r.hub.publish(pose, events, s.opt.MaxWatchEvents)
	state := r.state
	s.live.publish(func() LiveUpdate {
		return LiveUpdate{Robot: r.name, State: state, Pose: pose, Events: events, Fixes: liveFixes(run, out, entries)}
	})
}

// unapply answers the samples taken but not journaled UNAVAILABLE, not
// applied: the robot was rebuilt from its journal (flushJournal), so that
// none of them is in its state. A duplicate answered from a verdict that is
// now forgotten with it is answered so too. The caller holds r.mu.
func (s *Server) unapply(r *robot, run []*arrivedRequest, out []encodedResponse, tk *taking, written int, cause error) {
	reason := "not journaled, not applied: " + cause.Error() + "; resend"
	lost := tk.entries[written:]
	if tk.lost >= 0 {
		lost = append(lost, tk.lost)
	}
	for _, k := range lost {
		s.opt.Metrics.refused(codes.Unavailable)
		refuse(&out[k], run[k].GetClientSequence(), codes.Unavailable, reason)
	}
	for _, k := range tk.dups {
		if r.sessions.lookup(run[k].GetSessionId(), run[k].GetClientSequence()) == nil {
			refuse(&out[k], run[k].GetClientSequence(), codes.Unavailable, reason)
		}
	}
	s.log.Warn("inputs not journaled, answered unavailable", "robot", r.name, "journaled", written, "not_journaled", len(lost), "cause", cause)
}

// refusal returns why the robot takes no input now ("" when it does), with
// the status code. The caller holds r.mu.
func (r *robot) refusal() (codes.Code, string) {
	switch {
	case r.deleted:
		return codes.NotFound, "robot: " + r.name + " was deleted"
	case r.state == pb.RobotState_ROBOT_STATE_QUARANTINED:
		return codes.FailedPrecondition, "robot: " + r.name + " is quarantined: " + r.detail
	case r.state == pb.RobotState_ROBOT_STATE_PAUSED:
		return codes.Unavailable, "robot: " + r.name + " is paused (" + r.detail + "); not applied, resend when it serves"
	}
	return codes.OK, ""
}

// takeRun gives the samples to the robot in order and adds those it takes,
// with their verdicts, to the journal's buffer. The caller holds r.mu.
func (s *Server) takeRun(r *robot, run []*arrivedRequest, out []encodedResponse, sc *scratch) taking {
	tk := taking{lost: -1, entries: sc.entries[:0]}
	for k, req := range run {
		if code, reason := r.refusal(); code != codes.OK {
			s.opt.Metrics.refused(code)
			refuse(&out[k], req.GetClientSequence(), code, reason)
			continue
		}
		if tk.cause != nil {
			refuse(&out[k], req.GetClientSequence(), codes.Unavailable, "not applied: an earlier input of the batch could not be journaled ("+tk.cause.Error()+"); resend")
			continue
		}
		// A retry first: one of a sample taken before a restart that
		// lowered a limit is answered as first sent, not refused.
		sid := req.GetSessionId()
		if sid != "" {
			if wire := r.sessions.lookup(sid, req.GetClientSequence()); wire != nil {
				s.answerAgain(&out[k], wire)
				tk.dups = append(tk.dups, k)
				continue
			}
		}
		if le := s.checkLimits(r, &req.IngestRequest); le != nil {
			s.opt.Metrics.refused(le.code)
			refuse(&out[k], req.GetClientSequence(), le.code, le.reason)
			out[k].Field = le.field
			continue
		}
		resp := &out[k].IngestResponse
		if !convert.TakeInto(resp, r.fr, req.GetSample(), req.GetClientSequence()) {
			s.opt.Metrics.refused(codes.Code(resp.StatusCode))
			continue
		}
		if err := r.record(req, &out[k], &sc.verdicts); err != nil {
			tk.lost, tk.cause = k, err
			continue
		}
		tk.entries = append(tk.entries, k)
		if sid != "" {
			r.sessions.add(sid, req.GetClientSequence(), out[k].wire)
		}
	}
	return tk
}

// answerAgain answers a retried request with the verdict sent the first
// time (its session remembers it as sent: route).
func (s *Server) answerAgain(out *encodedResponse, wire []byte) {
	out.IngestResponse.Reset()
	if err := proto.Unmarshal(wire, &out.IngestResponse); err != nil {
		panic(fmt.Sprintf("server: a remembered verdict does not decode: %v", err)) // we encoded it
	}
	out.wire = wire
	s.opt.Metrics.duplicate()
}

// record encodes a taken sample's verdict into vs (out keeps it) and adds
// the sample, as the bytes it arrived as (encoded here when it came
// without them), and the verdict to the journal's buffer. On error nothing
// was added. The caller holds r.mu.
func (r *robot) record(req *arrivedRequest, out *encodedResponse, vs *slab) error {
	resp := &out.IngestResponse
	wire, err := vs.marshalVerdict(resp)
	if err != nil {
		// Not expected: every string in a verdict comes from decoded,
		// hence valid, input or from our own messages.
		return fmt.Errorf("encoding verdict %d: %w", resp.Sequence, err)
	}
	out.wire = wire
	if r.journal == nil {
		return nil
	}
	sample := requestSample(req.wire)
	if sample == nil {
		if sample, err = (proto.MarshalOptions{Deterministic: true}).Marshal(req.GetSample()); err != nil {
			return fmt.Errorf("encoding sample %d: %w", resp.Sequence, err)
		}
	}
	var p *pb.FusedPose
	if resp.Sequence%journal.PoseEvery == 0 {
		p = convert.PoseToProto(r.name, r.fr.Pose(), resp.Sequence)
	}
	in := journal.EncodedInput{Sequence: resp.Sequence, Sample: sample, ArrivalUnixNs: req.arrived.UnixNano(),
		SessionID: req.GetSessionId(), ClientSequence: req.GetClientSequence()}
	return r.journal.AddSessionPair(in, out.wire, p)
}

// flushJournal writes what the run added to the journal. It returns how many of the run's entries are written and,
// when some sample taken is not, why: the robot is then rebuilt from its
// journal. A failure after the entries were written (rotation, sync)
// changes no verdict. The caller holds r.mu.
func (s *Server) flushJournal(r *robot, tk *taking) (written int, cause error) {
	if r.journal == nil {
		if tk.lost >= 0 {
			// Memory only: nothing to rebuild from.
			s.quarantine(r, fmt.Sprintf("input not recorded: %v", tk.cause))
		}
		return len(tk.entries), tk.cause
	}
	written, err := r.journal.flush()
	written = min(written, len(tk.entries))
	r.sinceSnapshot += written
	if err != nil {
		cause = err
		s.journalFailed(r, "journal write", err)
		if written < len(tk.entries) && r.retrying >= 2 && r.state == pb.RobotState_ROBOT_STATE_SERVING {
			// A write failing again, not for a full disk, nor broken: a
			// file system remounted read-only, say. (A fault once is
			// retried at once with the next batch.) Before, the robot
			// served on, each batch answered UNAVAILABLE after a rebuild
			// from its journal.
			s.pause(r, fmt.Sprintf("journal not writable: %v", err), "journal write failed; the robot pauses until its journal can be written", "journal write", err)
		}
	} else if r.retrying > 0 {
		s.log.Info("the journal writes again", "robot", r.name, "failures", r.retrying)
		r.retrying = 0
	}
	if cause == nil && tk.lost >= 0 {
		cause = tk.cause
	}
	if written < len(tk.entries) || tk.lost >= 0 {
		s.rebuild(r, cause)
		return written, cause
	}
	return written, nil
}

// journalFailed pauses the robot on a full disk, and quarantines it when
// its journal cannot be written any more. The caller holds r.mu.
func (s *Server) journalFailed(r *robot, what string, err error) {
	switch {
	case r.state == pb.RobotState_ROBOT_STATE_QUARANTINED:
	case isBroken(err):
		// Broken first: a writer that could not take its segment back is
		// unusable whatever else the error says (a full disk among it).
		s.quarantine(r, fmt.Sprintf("%s failed: %v", what, err))
	case isNoSpace(err):
		s.pause(r, "journal disk full", "journal disk full; the robot pauses until space returns", what, err)
	default:
		// Said once until the journal writes again (flushJournal): a
		// failing rotation (no file descriptor left, say) is tried again
		// at every batch, hundreds a second, and each logged a line.
		if r.retrying == 0 {
			s.log.Warn(what+" failed; retried at every write, logged again when it works", "robot", r.name, "err", err)
		}
		r.retrying++
	}
}

// pause stops the robot taking input, answered UNAVAILABLE with detail,
// until probePaused writes its journal again; msg is logged. The caller
// holds r.mu.
func (s *Server) pause(r *robot, detail, msg, what string, err error) {
	if r.state == pb.RobotState_ROBOT_STATE_PAUSED {
		return
	}
	r.state, r.detail = pb.RobotState_ROBOT_STATE_PAUSED, detail
	s.opt.Metrics.paused(1)
	s.log.Error(msg, "robot", r.name, "op", what, "err", err)
}

// quarantine stops the robot taking input for good (until a restart
// restores it). The caller holds r.mu.
func (s *Server) quarantine(r *robot, detail string) {
	if r.state == pb.RobotState_ROBOT_STATE_PAUSED {
		s.opt.Metrics.paused(-1)
	}
	if r.state != pb.RobotState_ROBOT_STATE_QUARANTINED {
		s.opt.Metrics.quarantined(1)
	}
	r.state, r.detail = pb.RobotState_ROBOT_STATE_QUARANTINED, detail
	s.log.Error("robot quarantined", "robot", r.name, "problem", detail)
	// Its watches end naming the problem, as a new watch is refused:
	// otherwise they would wait for poses that no longer come.
	r.hub.close()
}

// rebuild makes the robot's memory equal its journal again after inputs it
// took were not journaled: its state, sessions and sensors from the last
// snapshot and the inputs after it. The caller holds r.mu.
func (s *Server) rebuild(r *robot, cause error) {
	rp, err := s.replayRobot(context.Background(), r.id)
	if err != nil {
		s.quarantine(r, fmt.Sprintf("rebuilding from the journal after %v: %v", cause, err))
		return
	}
	r.fr, r.sessions, r.sinceSnapshot = rp.fr, rp.sessions, rp.scan.Replayed
}

// probePaused tries the journal of every paused robot by writing a
// snapshot; a robot whose write succeeds serves again.
func (s *Server) probePaused() {
	for _, r := range s.list() {
		r.mu.Lock()
		if r.state == pb.RobotState_ROBOT_STATE_PAUSED && r.journal != nil {
			if err := s.writeSnapshot(r); err == nil {
				r.state, r.detail = pb.RobotState_ROBOT_STATE_SERVING, r.note
				r.retrying = 0
				s.opt.Metrics.paused(-1)
				s.log.Info("journal writable again; the robot serves", "robot", r.name)
			} else if !isNoSpace(err) {
				s.journalFailed(r, "journal probe", err)
			}
		}
		r.mu.Unlock()
	}
}

// usable returns the status of a robot that cannot answer reads
// (quarantined), or nil. The caller holds r.mu.
func (r *robot) usable() error {
	if r.state == pb.RobotState_ROBOT_STATE_QUARANTINED || r.fr == nil {
		return status.Errorf(codes.FailedPrecondition, "robot: %s is quarantined: %s", r.name, r.detail)
	}
	return nil
}

// GetPoseAt gets the estimate at a stamp.
func (s *Server) GetPoseAt(ctx context.Context, req *pb.GetPoseAtRequest) (*pb.GetPoseAtResponse, error) {
	r, err := s.lookup(req.GetRobot())
	if err != nil {
		return nil, err
	}
	r.mu.Lock()
	defer r.mu.Unlock()
	if err := r.usable(); err != nil {
		return nil, err
	}
	p, err := r.fr.PoseAt(req.GetStampNs())
	if err != nil {
		if r.fr.Pose().Distrust&fusion.TrustNoOdometry != 0 {
			// fusion says "stamped before the history window", which
			// misleads for a stamp after every input: there is no window.
			return nil, status.Errorf(codes.OutOfRange, "stamp_ns: %s has taken no odometry yet, so it has a pose at no stamp", r.name)
		}
		return nil, status.Errorf(codes.OutOfRange, "stamp_ns: %v", err)
	}
	return &pb.GetPoseAtResponse{Pose: convert.PoseToProto(r.name, p, r.fr.Sequence())}, nil
}

// ReseedRobot restarts a robot's filter from a given pose; it is journaled like any input.
func (s *Server) ReseedRobot(ctx context.Context, req *pb.ReseedRobotRequest) (*pb.ReseedRobotResponse, error) {
	if req.GetReseed() == nil {
		const reason = "reseed: missing"
		return nil, callRefused(int32(codes.InvalidArgument), reason, &pb.ReseedRobotResponse{Verdict: pb.Verdict_VERDICT_INVALID, Reason: reason,
			Refusal: pb.Refusal_REFUSAL_MALFORMED, Field: "reseed"})
	}
	resp := s.ingest(req.GetRobot(), 0, &pb.Sample{Sample: &pb.Sample_Reseed{Reseed: req.GetReseed()}})
	out := &pb.ReseedRobotResponse{Sequence: resp.Sequence, Verdict: resp.Verdict, Reason: resp.Reason, Refusal: resp.Refusal, Field: callField(resp.Field)}
	if resp.StatusCode != 0 && resp.Sequence == 0 {
		out.Reason = callReason(resp.Reason)
		return nil, callRefused(resp.StatusCode, out.Reason, out)
	}
	return out, nil
}

// callReason is the reason of a call's (ReseedRobot, StartRun) input that
// the robot refused before taking it. The reason names the field as in a
// sample ("bad sample: sample.reseed.pose: missing"); the call's request
// has no sample, so it names the request's own field ("reseed.pose:
// missing").
func callReason(reason string) string {
	return callField(strings.TrimPrefix(reason, convert.ErrSample.Error()+": "))
}

// callField is a sample's field as a call's request names it:
// "sample.reseed.pose" is "reseed.pose".
func callField(field string) string { return strings.TrimPrefix(field, "sample.") }

// callRefused is the status of a call whose input the robot refused before
// taking it: the refusal's status code and reason, with the call's response
// in its details, which says the refusal as a value (two refusals may share
// a code: a run start out of order and a quarantined robot are both
// FAILED_PRECONDITION).
func callRefused(code int32, reason string, resp protoadapt.MessageV1) error {
	st := status.New(codes.Code(code), reason)
	if withResp, err := st.WithDetails(resp); err == nil {
		// It fails only for code OK, which a refusal does not have.
		st = withResp
	}
	return st.Err()
}

// StartRun starts a new run of a robot by hand (DEVELOPERS.md, "Design:
// Runs"); it is journaled like any input, so that a restart restores the
// run as the robot took it.
func (s *Server) StartRun(ctx context.Context, req *pb.StartRunRequest) (*pb.StartRunResponse, error) {
	if req.GetRunStart() == nil {
		const reason = "run_start: missing"
		return nil, callRefused(int32(codes.InvalidArgument), reason, &pb.StartRunResponse{Verdict: pb.Verdict_VERDICT_INVALID, Reason: reason,
			Refusal: pb.Refusal_REFUSAL_MALFORMED, Field: "run_start"})
	}
	resp := s.ingest(req.GetRobot(), 0, &pb.Sample{Sample: &pb.Sample_RunStart{RunStart: req.GetRunStart()}})
	out := &pb.StartRunResponse{Sequence: resp.Sequence, Verdict: resp.Verdict, Reason: resp.Reason, Refusal: resp.Refusal, Field: callField(resp.Field)}
	if resp.StatusCode != 0 && resp.Sequence == 0 {
		out.Reason = callReason(resp.Reason)
		return nil, callRefused(resp.StatusCode, out.Reason, out)
	}
	for _, e := range resp.Events {
		if e.GetKind() == pb.EventKind_EVENT_KIND_RUN_STARTED {
			out.Run = uint64(e.GetValue()) // the run this input started, not a later one's
		}
	}
	return out, nil
}

// GetStatistics gets a robot's statistics.
func (s *Server) GetStatistics(ctx context.Context, req *pb.GetStatisticsRequest) (*pb.GetStatisticsResponse, error) {
	r, err := s.lookup(req.GetRobot())
	if err != nil {
		return nil, err
	}
	r.mu.Lock()
	defer r.mu.Unlock()
	if err := r.usable(); err != nil {
		return nil, err
	}
	return &pb.GetStatisticsResponse{Statistics: convert.StatsToProto(r.fr.Stats())}, nil
}

// snapshot writes the robot's state into its journal when it is due; the
// caller holds r.mu. A failure changes no verdict: a snapshot costs only
// restart time, and it is tried again after SnapshotEvery/4 more inputs
// (a full disk pauses the robot).
func (s *Server) snapshot(r *robot) {
	err := s.writeSnapshot(r)
	if err == nil {
		return
	}
	r.sinceSnapshot = s.opt.SnapshotEvery - max(1, s.opt.SnapshotEvery/4)
	if errors.Is(err, errNotEncoded) {
		s.log.Warn("snapshot not taken", "robot", r.name, "err", err)
		return
	}
	s.journalFailed(r, "snapshot", err)
}

// errNotEncoded says that a snapshot was not written because it could not
// be made: the journal is fine.
var errNotEncoded = errors.New("snapshot not encoded")

// writeSnapshot writes the robot's state, recent sessions and this build
// into its journal. The caller holds r.mu.
func (s *Server) writeSnapshot(r *robot) error {
	b, err := r.fr.Snapshot()
	if err != nil {
		return fmt.Errorf("%w: %w", errNotEncoded, err)
	}
	sess, err := r.sessions.toProto()
	if err != nil {
		return fmt.Errorf("%w: sessions: %w", errNotEncoded, err)
	}
	rec := &pb.JournalRecord{Entry: &pb.JournalRecord_Snapshot{Snapshot: &pb.JournalSnapshot{Sequence: r.fr.Sequence(), State: b,
		Sessions: sess, Build: s.opt.Build, WriteTimeUnixNs: time.Now().UnixNano()}}}
	if err := r.journal.Add(rec); err != nil {
		return err
	}
	if _, err := r.journal.flush(); err != nil {
		return fmt.Errorf("snapshot: %w", err)
	}
	r.sinceSnapshot = 0
	return nil
}

func poseNow(r *robot) *pb.FusedPose {
	return convert.PoseToProto(r.name, r.fr.Pose(), r.fr.Sequence())
}
