// Package client is the Go client library of the reckon FusionService:
// connect, create, look up, list and delete robots, feed samples through an
// ingest session, iterate over a robot's fused poses, read the estimate at a
// stamp and the running statistics, and re-seed a robot that was moved.
// Robots are named by their resource name, "robots/{id}"; stamps are
// nanoseconds on the robot's time base.
//
// # Using the library from another module
//
// The module path is reckon.example. No module proxy serves it, so another
// module requires it at a placeholder version and replaces it with a
// checkout of the repository (here at ../reckon):
//
//	go mod edit -require reckon.example@v0.0.0 -replace reckon.example=../reckon
//	go mod tidy
//
// or lists both modules in a go.work file (go work init . ../reckon). It
// then imports reckon.example/clients/client and the wire types,
// reckon.example/proto/reckon/v1.
package client

import (
	"context"
	"crypto/rand"
	"crypto/tls"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"iter"
	"net"
	"strings"
	"sync"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/keepalive"

	pb "reckon.example/proto/reckon/v1"
)

// Options configure Dial. The zero value connects in plain text without a
// token, which suits the service's default loopback listener.
type Options struct {
	// TLS, if set, connects with TLS (and a client certificate, if the
	// configuration carries one, for mutual TLS).
	TLS *tls.Config
	// Token is sent as "authorization: Bearer <token>".
	Token string
	// RequireSecureToken refuses to send a token without TLS. By default a
	// token may travel in plain text only to a loopback address: Dial
	// refuses a token without TLS to any other address.
	RequireSecureToken bool
	// DialOptions are more gRPC dial options (interceptors, for instance),
	// applied after the client's own.
	DialOptions []grpc.DialOption
}

// ErrPlaintextToken is returned by Dial for a token without TLS to an
// address that is not loopback.
var ErrPlaintextToken = errors.New("refusing to send a token in plain text to an address that is not loopback; use TLS")

// IsLoopback tells whether a gRPC target names this machine only: a
// unix socket, "localhost", or a loopback IP (127.0.0.0/8, ::1), with or
// without a port and a "dns:///" or "passthrough:///" scheme. Other host
// names are not resolved and count as remote.
func IsLoopback(target string) bool {
	if strings.HasPrefix(target, "unix:") || strings.HasPrefix(target, "unix-abstract:") {
		return true
	}
	for _, scheme := range []string{"dns:///", "passthrough:///"} {
		target = strings.TrimPrefix(target, scheme)
	}
	host := target
	if h, _, err := net.SplitHostPort(target); err == nil {
		host = h
	}
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(strings.Trim(host, "[]"))
	return ip != nil && ip.IsLoopback()
}

type bearer struct {
	token  string
	secure bool
}

func (b bearer) GetRequestMetadata(ctx context.Context, _ ...string) (map[string]string, error) {
	return map[string]string{"authorization": "Bearer " + b.token}, nil
}

func (b bearer) RequireTransportSecurity() bool { return b.secure }

// Client is a connection to the service. It is safe for concurrent use.
type Client struct {
	conn *grpc.ClientConn
	api  pb.FusionServiceClient
}

// Dial connects to the service at addr ("host:port").
func Dial(addr string, opt Options) (*Client, error) {
	dopts := []grpc.DialOption{
		grpc.WithKeepaliveParams(keepalive.ClientParameters{Time: 30 * time.Second, Timeout: 10 * time.Second}),
	}
	if opt.TLS != nil {
		dopts = append(dopts, grpc.WithTransportCredentials(credentials.NewTLS(opt.TLS)))
	} else {
		dopts = append(dopts, grpc.WithTransportCredentials(insecure.NewCredentials()))
	}
	if opt.Token != "" && opt.TLS == nil && !IsLoopback(addr) {
		return nil, fmt.Errorf("client: dial %s: %w", addr, ErrPlaintextToken)
	}
	if opt.Token != "" {
		dopts = append(dopts, grpc.WithPerRPCCredentials(bearer{token: opt.Token, secure: opt.TLS != nil || opt.RequireSecureToken}))
	}
	conn, err := grpc.NewClient(addr, append(dopts, opt.DialOptions...)...)
	if err != nil {
		return nil, err
	}
	return &Client{conn: conn, api: pb.NewFusionServiceClient(conn)}, nil
}

// Close closes the connection.
func (c *Client) Close() error { return c.conn.Close() }

// CreateRobot creates robots/{id}.
func (c *Client) CreateRobot(ctx context.Context, id string, cfg *pb.RobotConfig) (*pb.Robot, error) {
	resp, err := c.api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: id, Config: cfg})
	if err != nil {
		return nil, err
	}
	return resp.GetRobot(), nil
}

// GetRobot returns the robot named name ("robots/{id}").
func (c *Client) GetRobot(ctx context.Context, name string) (*pb.Robot, error) {
	resp, err := c.api.GetRobot(ctx, &pb.GetRobotRequest{Name: name})
	if err != nil {
		return nil, err
	}
	return resp.GetRobot(), nil
}

// ListRobots iterates over every robot, in the server's order, fetching
// pageSize robots per call (0: the server's default). An error is yielded
// once, as the last element.
func (c *Client) ListRobots(ctx context.Context, pageSize int) iter.Seq2[*pb.Robot, error] {
	return func(yield func(*pb.Robot, error) bool) {
		req := &pb.ListRobotsRequest{PageSize: int32(pageSize)}
		for {
			resp, err := c.api.ListRobots(ctx, req)
			if err != nil {
				yield(nil, err)
				return
			}
			for _, r := range resp.GetRobots() {
				if !yield(r, nil) {
					return
				}
			}
			if resp.GetNextPageToken() == "" {
				return
			}
			req.PageToken = resp.GetNextPageToken()
		}
	}
}

// DeleteRobot deletes the robot named name ("robots/{id}"); the service
// closes its journal and sets it aside.
func (c *Client) DeleteRobot(ctx context.Context, name string) error {
	_, err := c.api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: name})
	return err
}

// PoseAt returns robot's ("robots/{id}") fused pose at stampNs, on the
// robot's time base in nanoseconds: the filtered estimate inside the
// robot's history window, extrapolated a little past its newest odometry.
func (c *Client) PoseAt(ctx context.Context, robot string, stampNs int64) (*pb.FusedPose, error) {
	resp, err := c.api.GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: robot, StampNs: stampNs})
	if err != nil {
		return nil, err
	}
	return resp.GetPose(), nil
}

// Statistics returns robot's ("robots/{id}") running statistics: inputs by
// verdict, each sensor's consistency, slips, gaps, recoveries and trust.
func (c *Client) Statistics(ctx context.Context, robot string) (*pb.RobotStatistics, error) {
	resp, err := c.api.GetStatistics(ctx, &pb.GetStatisticsRequest{Robot: robot})
	if err != nil {
		return nil, err
	}
	return resp.GetStatistics(), nil
}

// Reseed restarts robot's ("robots/{id}") estimate from pose (field frame:
// metres, radians) at stampNs with cov, its 3x3 row-major covariance
// (m^2, m*rad, rad^2). Samples stamped before stampNs are no longer taken.
// The response carries the reseed's sequence number and verdict; a reseed
// the robot took and refused (stamped too far ahead) is a response with its
// reason and refusal, one it refused before taking it (malformed, or a
// quarantined robot) an error whose gRPC status details hold the response
// with its refusal and field (sequence 0).
func (c *Client) Reseed(ctx context.Context, robot string, stampNs int64, pose *pb.FloorPose, cov []float64) (*pb.ReseedRobotResponse, error) {
	return c.api.ReseedRobot(ctx, &pb.ReseedRobotRequest{Robot: robot, Reseed: &pb.Reseed{
		StampNs: stampNs, Pose: pose, Covariance: &pb.Covariance{Dimension: 3, Values: cov}}})
}

// StartRun starts a new run of robot ("robots/{id}") after its controller
// restarted: bootID names the controller's boot; run is the run's number
// (0: the next). The last run's pose and covariance carry over, unless
// pose is given (with its 3x3 covariance cov, m^2, m*rad, rad^2).
func (c *Client) StartRun(ctx context.Context, robot, bootID string, run uint64, pose *pb.FloorPose, cov []float64) (*pb.StartRunResponse, error) {
	rs := &pb.RunStart{BootId: bootID, Run: run, Pose: pose}
	if pose != nil {
		rs.Covariance = &pb.Covariance{Dimension: 3, Values: cov}
	}
	return c.api.StartRun(ctx, &pb.StartRunRequest{Robot: robot, RunStart: rs})
}

// Session is one ingest stream for one robot. Send and Recv may be used
// from two goroutines (one each); Apply pairs them for you. Every request
// carries the session's random id (ID) and its client sequence, so that the
// service answers a resent sample with its original verdict instead of
// applying it twice.
//
// A held sample's final verdict (a reckon.v1.Resolution, with the held
// sample's client sequence) comes to the session that sent it, whichever
// client's sample decided it: in the response to that sample when this
// session sent it, otherwise in a response carrying only resolutions
// (OnlyResolutions). While no stream of the session is open, the service
// keeps them for its id (within bounds: IngestResponse.resolved; in
// memory, so not across a restart of the service) and sends them after the
// first response of a stream opened with Resume. A robot deleted while it
// holds a sample resolves it VERDICT_INVALID, REFUSAL_ROBOT_DELETED.
//
// A request larger than the service's -max-message-bytes (64 KiB by
// default) is refused alone, VERDICT_INVALID, status RESOURCE_EXHAUSTED,
// REFUSAL_LIMIT, the reason naming its size and the limit; the stream goes
// on. One past twice the limit ends the stream (Recv returns
// RESOURCE_EXHAUSTED): open another with Resume and resend with SendAs
// what has no verdict, without it.
type Session struct {
	robot  string
	id     string
	stream pb.FusionService_IngestClient
	mu     sync.Mutex // protects next
	next   uint64
}

// ID returns the session id sent with every request (IngestRequest.
// session_id): 32 random hexadecimal digits.
func (s *Session) ID() string { return s.id }

func newSessionID() string {
	var b [16]byte
	rand.Read(b[:]) // never fails (crypto/rand)
	return hex.EncodeToString(b[:])
}

// IngestOption configures OpenIngest.
type IngestOption func(*Session)

// Resume makes the new session continue an earlier one: it sends session
// id id and numbers its samples from last+1, so that a resent sample
// (given its old number with SendAs) is answered with its original verdict,
// and the service sends it the final verdicts of the earlier session's
// held samples that were decided while no stream of it was open. id and
// last come from the earlier session's ID and Last.
func Resume(id string, last uint64) IngestOption {
	return func(s *Session) { s.id, s.next = id, last }
}

// OpenIngest opens an ingest stream for robot ("robots/{robot}").
func (c *Client) OpenIngest(ctx context.Context, robot string, opts ...IngestOption) (*Session, error) {
	st, err := c.api.Ingest(ctx)
	if err != nil {
		return nil, err
	}
	s := &Session{robot: robot, id: newSessionID(), stream: st}
	for _, o := range opts {
		o(s)
	}
	return s, nil
}

// Last returns the client sequence number of the last sample sent.
func (s *Session) Last() uint64 {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.next
}

// ErrSequenceNotGiven is returned by SendAs for a client sequence number
// the session has not given (0, or past Last): Send would give it to
// another sample later, which the service would then answer with this
// one's verdict and not take.
var ErrSequenceNotGiven = errors.New("client sequence not given by this session")

// SendAs resends a sample with the client sequence number seq it had
// before, on this stream or an earlier one of this session (Resume); the
// service answers it with its original verdict if it took it, and takes
// it otherwise. A seq of 0 or past Last is refused with
// ErrSequenceNotGiven, sending nothing; a caller numbering samples itself
// gives its numbers out with Skip first.
func (s *Session) SendAs(seq uint64, sample *pb.Sample) error {
	s.mu.Lock()
	last := s.next
	s.mu.Unlock()
	if seq == 0 || seq > last {
		return fmt.Errorf("Session.SendAs: client sequence %d (last is %d; send a new sample with Send): %w", seq, last, ErrSequenceNotGiven)
	}
	return s.stream.Send(&pb.IngestRequest{Robot: s.robot, ClientSequence: seq, Sample: sample, SessionId: s.id})
}

// Skip gives out the client sequence numbers up to last without sending:
// the next Send gives last+1, and SendAs takes numbers up to last. A
// caller that numbers its samples itself (reckon feed numbers each by its
// place in the file, so that a feed continuing a session sends each under
// the number it had) skips the numbers of the samples it does not send.
// A last below Last is refused: those numbers are given already.
func (s *Session) Skip(last uint64) error {
	s.mu.Lock()
	defer s.mu.Unlock()
	if last < s.next {
		return fmt.Errorf("Session.Skip: to %d, below the last number given (%d)", last, s.next)
	}
	s.next = last
	return nil
}

// NotTaken tells whether a verdict says the service did not take its
// sample and it should be sent again: refused with status UNAVAILABLE, as
// when the robot is paused (its journal's disk is full) or the sample's
// batch could not be journaled. Send it again with SendAs and its own
// client sequence once the robot serves (GetRobot's state): a sample the
// robot did take is answered with its first verdict, not applied twice.
func NotTaken(resp *pb.IngestResponse) bool {
	return resp.GetVerdict() == pb.Verdict_VERDICT_INVALID && codes.Code(resp.GetStatusCode()) == codes.Unavailable
}

// OnlyResolutions tells whether a response answers no sample of its own
// and carries only final verdicts of held samples sent earlier (client
// sequence 0, verdict VERDICT_UNSPECIFIED).
func OnlyResolutions(resp *pb.IngestResponse) bool {
	return resp.GetClientSequence() == 0 && resp.GetSequence() == 0 && resp.GetVerdict() == pb.Verdict_VERDICT_UNSPECIFIED && len(resp.GetResolved()) > 0
}

// Send sends one sample and returns its client sequence number.
func (s *Session) Send(sample *pb.Sample) (uint64, error) {
	s.mu.Lock()
	s.next++
	seq := s.next
	s.mu.Unlock()
	return seq, s.stream.Send(&pb.IngestRequest{Robot: s.robot, ClientSequence: seq, Sample: sample, SessionId: s.id})
}

// Recv returns the next response as it comes: the verdicts of the samples
// in the order they were sent, and between them, at any point after a held
// sample's own verdict, responses carrying only resolutions of this
// session's earlier held samples (OnlyResolutions). A verdict's resolved
// may also list resolutions of earlier samples (those its sample decided).
func (s *Session) Recv() (*pb.IngestResponse, error) { return s.stream.Recv() }

// Apply sends one sample and waits for its verdict. Resolutions that come
// before it in responses of their own are added to its resolved, ahead of
// its own: the response may carry resolutions of earlier samples only.
func (s *Session) Apply(sample *pb.Sample) (*pb.IngestResponse, error) {
	seq, err := s.Send(sample)
	if err != nil {
		return nil, err
	}
	var early []*pb.Resolution
	resp, err := s.Recv()
	for err == nil && OnlyResolutions(resp) {
		early = append(early, resp.GetResolved()...)
		resp, err = s.Recv()
	}
	if err != nil {
		return nil, err
	}
	if len(early) > 0 {
		resp.Resolved = append(early, resp.GetResolved()...)
	}
	if resp.GetClientSequence() != seq {
		return nil, fmt.Errorf("verdict for client sequence %d, want %d", resp.GetClientSequence(), seq)
	}
	return resp, nil
}

// CloseSend tells the server that no more samples follow, without waiting:
// another goroutine may keep calling Recv until it returns io.EOF, after the
// verdict of every sample sent.
func (s *Session) CloseSend() error { return s.stream.CloseSend() }

// Close ends the stream after the server has answered everything sent;
// responses not yet read, resolutions included, are dropped.
func (s *Session) Close() error {
	if err := s.stream.CloseSend(); err != nil {
		return err
	}
	for {
		if _, err := s.stream.Recv(); err != nil {
			if errors.Is(err, io.EOF) {
				return nil
			}
			return err
		}
	}
}

// Watch iterates over a robot's fused poses until ctx is done or the
// stream ends; a stream error is yielded once, as the last element.
// minInterval rate-limits the poses (0: every one the server conflates
// for this reader).
func (c *Client) Watch(ctx context.Context, robot string, minInterval time.Duration) iter.Seq2[*pb.WatchResponse, error] {
	return func(yield func(*pb.WatchResponse, error) bool) {
		ctx, cancel := context.WithCancel(ctx)
		defer cancel()
		st, err := c.api.Watch(ctx, &pb.WatchRequest{Robot: robot, MinIntervalNs: minInterval.Nanoseconds()})
		if err != nil {
			yield(nil, err)
			return
		}
		for {
			resp, err := st.Recv()
			if errors.Is(err, io.EOF) || (err != nil && ctx.Err() != nil) {
				return
			}
			if !yield(resp, err) || err != nil {
				return
			}
		}
	}
}
