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
//     otherwise at most SyncInterval later).
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
	"sort"
	"sync"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

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
}

// Server implements pb.FusionServiceServer.
type Server struct {
	pb.UnimplementedFusionServiceServer
	opt Options
	log *slog.Logger

	mu     sync.RWMutex // protects robots
	robots map[string]*robot

	stopSync chan struct{}
	syncDone chan struct{}
	unlock   func() error // releases the journal directory's lock (nil: none)
}

// robot is one robot and everything attached to it.
type robot struct {
	name string
	id   string
	cfg  *pb.RobotConfig

	mu            sync.Mutex // protects fr, journal, broken, deleted
	fr            *fusion.Robot
	journal       *journal.Writer
	broken        error // a journal failure: the robot takes no more input
	deleted       bool
	sinceSnapshot int // inputs journaled since the last snapshot

	hub hub
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
	var unlock func() error
	if opt.JournalDir != "" {
		fsys := opt.FS
		if fsys == nil {
			fsys = journal.OS
		}
		if err := fsys.MkdirAll(opt.JournalDir, 0o755); err != nil {
			return nil, fmt.Errorf("journal directory: %w", err)
		}
		var err error
		if unlock, err = journal.Lock(opt.FS, opt.JournalDir); err != nil {
			return nil, err
		}
	}
	s := &Server{opt: opt, log: opt.Logger, robots: map[string]*robot{}, stopSync: make(chan struct{}), syncDone: make(chan struct{}), unlock: unlock}
	go s.syncLoop()
	return s, nil
}

// syncLoop fsyncs the journals every SyncInterval.
func (s *Server) syncLoop() {
	defer close(s.syncDone)
	t := time.NewTicker(s.opt.SyncInterval)
	defer t.Stop()
	for {
		select {
		case <-s.stopSync:
			return
		case <-t.C:
			s.SyncJournals()
		}
	}
}

// SyncJournals fsyncs every robot's journal now.
func (s *Server) SyncJournals() {
	for _, r := range s.list() {
		r.mu.Lock()
		if r.journal != nil && r.broken == nil {
			if err := r.journal.Sync(); err != nil {
				r.broken = err
				s.log.Error("journal sync failed; the robot takes no more input", "robot", r.name, "err", err)
			}
		}
		r.mu.Unlock()
	}
}

// EndWatches ends every open watch stream (before a graceful stop, which
// would otherwise wait for them).
func (s *Server) EndWatches() {
	for _, r := range s.list() {
		r.hub.close()
	}
}

// Close syncs and closes every journal and ends every watch.
func (s *Server) Close() error {
	close(s.stopSync)
	<-s.syncDone
	var errs []error
	for _, r := range s.list() {
		r.mu.Lock()
		if r.journal != nil {
			errs = append(errs, r.journal.Close())
			r.journal = nil
		}
		r.mu.Unlock()
		r.hub.close()
	}
	if s.unlock != nil {
		errs = append(errs, s.unlock())
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

func (s *Server) lookup(name string) (*robot, error) {
	if _, err := RobotID(name); err != nil {
		return nil, status.Errorf(codes.InvalidArgument, "robot: %v", err)
	}
	s.mu.RLock()
	r := s.robots[name]
	s.mu.RUnlock()
	if r == nil {
		return nil, status.Errorf(codes.NotFound, "robot: %s does not exist", name)
	}
	return r, nil
}

func (r *robot) proto() *pb.Robot {
	return &pb.Robot{Name: r.name, Config: r.cfg, NewestStampNs: r.fr.NewestNs(), InputCount: r.fr.Sequence()}
}

// CreateRobot creates robots/{robot_id}.
func (s *Server) CreateRobot(ctx context.Context, req *pb.CreateRobotRequest) (*pb.CreateRobotResponse, error) {
	if !journal.ValidID(req.GetRobotId()) {
		return nil, status.Errorf(codes.InvalidArgument, "robot_id: %q must be 1 to 63 lower-case letters, digits and hyphens, starting with a letter", req.GetRobotId())
	}
	cfg, err := convert.ConfigFromProto(req.GetConfig())
	if err != nil {
		return nil, status.Errorf(codes.InvalidArgument, "config: %v", err)
	}
	fr, err := fusion.New(cfg)
	if err != nil {
		return nil, status.Errorf(codes.InvalidArgument, "config: %v", err)
	}
	name := RobotName(req.GetRobotId())
	r := &robot{name: name, id: req.GetRobotId(), cfg: req.GetConfig(), fr: fr}
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.robots[name] != nil {
		return nil, status.Errorf(codes.AlreadyExists, "robot_id: %s exists", name)
	}
	if s.opt.JournalDir != "" {
		j, err := journal.Create(s.opt.JournalDir, r.id, &pb.JournalOpening{Robot: name, Config: r.cfg, CreateTimeUnixNs: time.Now().UnixNano()}, s.journalOptions())
		if err != nil {
			return nil, status.Errorf(codes.Internal, "journal: %v", err)
		}
		r.journal = j
	}
	s.robots[name] = r
	s.opt.Metrics.robots(len(s.robots))
	s.log.Info("robot created", "robot", name, "wheels", len(cfg.Wheels), "imu", cfg.IMU.String())
	return &pb.CreateRobotResponse{Robot: r.proto()}, nil
}

func (s *Server) journalOptions() journal.Options {
	return journal.Options{SyncEach: s.opt.SyncEach, SegmentBytes: s.opt.SegmentBytes, FS: s.opt.FS}
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

// DeleteRobot deletes a robot; its journal is closed and set aside.
func (s *Server) DeleteRobot(ctx context.Context, req *pb.DeleteRobotRequest) (*pb.DeleteRobotResponse, error) {
	r, err := s.lookup(req.GetName())
	if err != nil {
		return nil, err
	}
	s.mu.Lock()
	delete(s.robots, r.name)
	s.opt.Metrics.robots(len(s.robots))
	s.mu.Unlock()
	r.mu.Lock()
	r.deleted = true
	if r.journal != nil {
		err = r.journal.Append(&pb.JournalRecord{Entry: &pb.JournalRecord_Closing{Closing: &pb.JournalClosing{DeleteTimeUnixNs: time.Now().UnixNano()}}})
		if err == nil {
			err = r.journal.Remove()
		}
		r.journal = nil
	}
	r.mu.Unlock()
	r.hub.close()
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
func (s *Server) Ingest(stream pb.FusionService_IngestServer) error {
	ctx := stream.Context()
	in := newInbox()
	go func() {
		sl := &slab{}
		for {
			req := &arrivedRequest{slab: sl}
			err := stream.RecvMsg(req)
			if err == nil {
				err = in.put(ctx, req)
			}
			if err != nil {
				in.end(err)
				return
			}
		}
	}()
	// A third goroutine sends the verdicts, so that taking the next batch
	// overlaps with sending the last one's verdicts.
	out := make(chan []encodedResponse, 4)
	sendErr := make(chan error, 1)
	go func() {
		var err error
		for resps := range out {
			for k := range resps {
				if err == nil {
					err = stream.SendMsg(&resps[k])
				}
			}
		}
		sendErr <- err
	}()
	err := s.takeBatches(ctx, in, out)
	close(out)
	if serr := <-sendErr; err == nil {
		err = serr
	}
	return err
}

// takeBatches takes requests as they come, in batches of what is waiting.
func (s *Server) takeBatches(ctx context.Context, in *inbox, out chan<- []encodedResponse) error {
	var batch []*arrivedRequest
	for {
		var err error
		if batch, err = in.take(ctx, batch); err != nil {
			if err == io.EOF {
				return nil
			}
			return err
		}
		select {
		case out <- s.ingestBatch(batch):
		case <-ctx.Done():
			return ctx.Err()
		}
	}
}

// refuse makes out the refusal of a sample, whatever it held before.
func refuse(out *encodedResponse, clientSeq uint64, code codes.Code, reason string) {
	out.wire = nil
	out.IngestResponse.Reset()
	out.ClientSequence, out.Verdict, out.Reason, out.StatusCode = clientSeq, pb.Verdict_VERDICT_INVALID, reason, int32(code)
}

// ingest applies one sample (ReseedRobot and tests).
func (s *Server) ingest(name string, clientSeq uint64, sample *pb.Sample) *pb.IngestResponse {
	req := &arrivedRequest{IngestRequest: pb.IngestRequest{Robot: name, ClientSequence: clientSeq, Sample: sample}}
	return &s.ingestBatch([]*arrivedRequest{req})[0].IngestResponse
}

// ingestBatch applies samples in order: per run of samples for one robot,
// the robot (which checks each input first) under its lock, one journal
// write, then the watchers.
func (s *Server) ingestBatch(batch []*arrivedRequest) []encodedResponse {
	out := make([]encodedResponse, len(batch))
	for i := 0; i < len(batch); {
		j := i + 1
		for j < len(batch) && batch[j].GetRobot() == batch[i].GetRobot() {
			j++
		}
		s.ingestRun(batch[i:j], out[i:j])
		i = j
	}
	return out
}

// ingestRun takes a run of samples for one robot: under its lock, the
// samples and one journal write; then the watchers and the metrics.
func (s *Server) ingestRun(run []*arrivedRequest, out []encodedResponse) {
	start := time.Now()
	r, err := s.lookup(run[0].GetRobot())
	if err != nil {
		st := status.Convert(err)
		for k, req := range run {
			s.opt.Metrics.refused(st.Code())
			refuse(&out[k], req.GetClientSequence(), st.Code(), st.Message())
		}
		return
	}
	var pose *pb.FusedPose
	r.mu.Lock()
	events, anyTaken := s.takeRun(r, run, out, start)
	if anyTaken {
		pose = poseNow(r)
	}
	s.flushJournal(r, len(run))
	broken := r.broken
	r.mu.Unlock()
	if broken != nil && pose != nil {
		// Nothing taken in this run may be acknowledged: it is not (all) in
		// the journal. The robot takes no more input until a restart
		// restores it from what the journal holds.
		s.log.Error("journal write failed; the robot takes no more input", "robot", r.name, "err", broken)
		for k, req := range run {
			if out[k].Sequence != 0 {
				refuse(&out[k], req.GetClientSequence(), codes.Unavailable, "journal: "+broken.Error())
			}
		}
		return
	}
	if pose != nil {
		r.hub.publish(pose, events, s.opt.MaxWatchEvents)
	}
	d := time.Since(start)
	for k := range run {
		if out[k].Sequence != 0 {
			s.opt.Metrics.verdict(out[k].Verdict, d)
		}
	}
}

// takeRun gives the samples to the robot in order and adds those it takes,
// with their verdicts, to the journal's buffer; it returns their events and
// whether any was taken. The caller holds r.mu.
func (s *Server) takeRun(r *robot, run []*arrivedRequest, out []encodedResponse, arrival time.Time) (events []*pb.FusionEvent, anyTaken bool) {
	// The encoded verdicts of the run, one buffer; each verdict's piece is
	// capped so that later appends never write into it.
	enc := make([]byte, 0, 48*len(run))
	for k, req := range run {
		switch {
		case r.deleted:
			refuse(&out[k], req.GetClientSequence(), codes.NotFound, "robot: "+r.name+" was deleted")
			continue
		case r.broken != nil:
			refuse(&out[k], req.GetClientSequence(), codes.Unavailable, "journal: failed earlier ("+r.broken.Error()+"); restart the service to restore the robot")
			continue
		}
		resp := &out[k].IngestResponse
		if !convert.TakeInto(resp, r.fr, req.GetSample(), req.GetClientSequence()) {
			s.opt.Metrics.refused(codes.Code(resp.StatusCode))
			continue
		}
		anyTaken = true
		events = append(events, resp.Events...)
		enc = r.record(req, &out[k], enc, arrival)
	}
	return events, anyTaken
}

// record encodes a taken sample's verdict at the end of enc (out keeps its
// piece) and adds the sample, as the bytes it arrived as (encoded here
// when it came without them), and the verdict to the journal's buffer. A
// failure breaks the robot. The caller holds r.mu.
func (r *robot) record(req *arrivedRequest, out *encodedResponse, enc []byte, arrival time.Time) []byte {
	resp := &out.IngestResponse
	mark := len(enc)
	enc, err := (proto.MarshalOptions{}).MarshalAppend(enc, resp)
	if err != nil {
		// Not expected: every string in a verdict comes from decoded,
		// hence valid, input or from our own messages. Should it
		// happen, the input cannot be journaled with its output, so the
		// robot stops as on a failed journal write.
		r.broken = fmt.Errorf("encoding verdict %d: %w", resp.Sequence, err)
		return enc[:mark]
	}
	out.wire = enc[mark:len(enc):len(enc)]
	if r.journal == nil {
		return enc
	}
	sample := requestSample(req.wire)
	if sample == nil {
		if sample, err = (proto.MarshalOptions{Deterministic: true}).Marshal(req.GetSample()); err != nil {
			r.broken = fmt.Errorf("encoding sample %d: %w", resp.Sequence, err)
			return enc
		}
	}
	var p *pb.FusedPose
	if resp.Sequence%journal.PoseEvery == 0 {
		p = convert.PoseToProto(r.name, r.fr.Pose(), resp.Sequence)
	}
	if err := r.journal.AddEncodedPair(resp.Sequence, sample, arrival.UnixNano(), out.wire, p); err != nil {
		r.broken = err
	}
	return enc
}

// flushJournal writes what the run added to the journal, and a snapshot
// when one is due. The caller holds r.mu.
func (s *Server) flushJournal(r *robot, n int) {
	if r.journal == nil || r.broken != nil {
		return
	}
	if _, err := r.journal.Flush(); err != nil {
		r.broken = err
	} else if r.sinceSnapshot += n; r.sinceSnapshot >= s.opt.SnapshotEvery {
		s.snapshot(r)
	}
}

// GetPoseAt gets the estimate at a stamp.
func (s *Server) GetPoseAt(ctx context.Context, req *pb.GetPoseAtRequest) (*pb.GetPoseAtResponse, error) {
	r, err := s.lookup(req.GetRobot())
	if err != nil {
		return nil, err
	}
	r.mu.Lock()
	defer r.mu.Unlock()
	p, err := r.fr.PoseAt(req.GetStampNs())
	if err != nil {
		return nil, status.Errorf(codes.OutOfRange, "stamp_ns: %v", err)
	}
	return &pb.GetPoseAtResponse{Pose: convert.PoseToProto(r.name, p, r.fr.Sequence())}, nil
}

// ReseedRobot restarts a robot's filter from a given pose; it is journaled like any input.
func (s *Server) ReseedRobot(ctx context.Context, req *pb.ReseedRobotRequest) (*pb.ReseedRobotResponse, error) {
	if req.GetReseed() == nil {
		return nil, status.Errorf(codes.InvalidArgument, "reseed: missing")
	}
	resp := s.ingest(req.GetRobot(), 0, &pb.Sample{Sample: &pb.Sample_Reseed{Reseed: req.GetReseed()}})
	if resp.StatusCode != 0 && resp.Sequence == 0 {
		return nil, status.Error(codes.Code(resp.StatusCode), resp.Reason)
	}
	return &pb.ReseedRobotResponse{Sequence: resp.Sequence, Verdict: resp.Verdict, Reason: resp.Reason}, nil
}

// GetStatistics gets a robot's statistics.
func (s *Server) GetStatistics(ctx context.Context, req *pb.GetStatisticsRequest) (*pb.GetStatisticsResponse, error) {
	r, err := s.lookup(req.GetRobot())
	if err != nil {
		return nil, err
	}
	r.mu.Lock()
	defer r.mu.Unlock()
	return &pb.GetStatisticsResponse{Statistics: convert.StatsToProto(r.fr.Stats())}, nil
}

// snapshot writes the robot's state into its journal; the caller holds r.mu.
// A snapshot that cannot be encoded costs only restart time and is logged; a
// failed write breaks the robot like any journal write.
func (s *Server) snapshot(r *robot) {
	r.sinceSnapshot = 0
	b, err := r.fr.Snapshot()
	if err != nil {
		s.log.Warn("snapshot not taken", "robot", r.name, "err", err)
		return
	}
	if err := r.journal.Append(&pb.JournalRecord{Entry: &pb.JournalRecord_Snapshot{Snapshot: &pb.JournalSnapshot{Sequence: r.fr.Sequence(), State: b}}}); err != nil {
		r.broken = err
	}
}

func poseNow(r *robot) *pb.FusedPose {
	return convert.PoseToProto(r.name, r.fr.Pose(), r.fr.Sequence())
}
