package server

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"os"
	"sync"
	"sync/atomic"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// testConfig is what a test starts a service with.
type testConfig struct {
	Options
	MaxMessageBytes int
}

// running is a service started by a test on a loopback port.
type running struct {
	addr string
	stop func()
}

// serveLoopback serves a new Server, restored from its journal directory,
// on a loopback port with the service's gRPC options (what the daemon adds
// around it, package daemon, is not needed here). stop ends it gracefully.
func serveLoopback(tc testConfig) (addr string, stop func() error, err error) {
	opts, err := ServiceOptions(tc.MaxMessageBytes)
	if err != nil {
		return "", nil, err
	}
	srv, err := New(tc.Options)
	if err != nil {
		return "", nil, err
	}
	if _, err := srv.Restore(); err != nil {
		srv.Close()
		return "", nil, err
	}
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		srv.Close()
		return "", nil, err
	}
	gs := grpc.NewServer(opts...)
	Register(gs, srv)
	served := make(chan error, 1)
	go func() { served <- gs.Serve(lis) }()
	return lis.Addr().String(), func() error {
		srv.EndStreams()
		gs.GracefulStop()
		err := <-served
		if errors.Is(err, grpc.ErrServerStopped) {
			// Stopped before Serve began (a test that stops at once).
			err = nil
		}
		return errors.Join(err, srv.Close())
	}, nil
}

// serveServer serves a Server made with opt on a loopback port with the
// service's gRPC options and extra, for a test that looks into the Server;
// stop ends it (and the test's cleanup does, if it did not).
func serveServer(t *testing.T, opt Options, extra ...grpc.ServerOption) (s *Server, api pb.FusionServiceClient, stop func()) {
	t.Helper()
	opts, err := ServiceOptions(0)
	if err != nil {
		t.Fatal(err)
	}
	if s, err = New(opt); err != nil {
		t.Fatal(err)
	}
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	gs := grpc.NewServer(append(opts, extra...)...)
	Register(gs, s)
	go gs.Serve(lis)
	var once sync.Once
	stop = func() {
		once.Do(func() {
			s.EndStreams()
			gs.GracefulStop()
			s.Close()
		})
	}
	t.Cleanup(stop)
	return s, dial(t, lis.Addr().String()), stop
}

func start(t testing.TB, tc testConfig) *running {
	t.Helper()
	if tc.Logger == nil {
		tc.Logger = slog.New(slog.NewTextHandler(os.Stderr, &slog.HandlerOptions{Level: slog.LevelWarn}))
	}
	addr, stop, err := serveLoopback(tc)
	if err != nil {
		t.Fatalf("serve: %v", err)
	}
	return &running{addr: addr, stop: func() {
		if err := stop(); err != nil {
			t.Errorf("serve: %v", err)
		}
	}}
}

// connect opens a plain-text connection to addr, as a robot on the same
// host would; the tests use the generated stubs, not the client library,
// which is a layer above (DEVELOPERS.md, "Design: Layers").
func connect(addr string) (*grpc.ClientConn, error) {
	return grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
}

// dial connects to addr for the rest of the test.
func dial(t testing.TB, addr string) pb.FusionServiceClient {
	t.Helper()
	conn, err := connect(addr)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	return pb.NewFusionServiceClient(conn)
}

// feed is one ingest stream for one robot. It numbers the samples it sends
// from 1 (their client sequence); send and Recv may be called from two
// goroutines, one each.
type feed struct {
	pb.FusionService_IngestClient
	robot   string
	session string        // IngestRequest.session_id ("": none)
	sent    atomic.Uint64 // client sequence of the last sample sent
	// resolved are the resolutions received in resolution-only responses
	// by apply and close, in order.
	resolved []*pb.Resolution
}

// openFeed opens an ingest stream for robot ("robots/{id}").
func openFeed(ctx context.Context, api pb.FusionServiceClient, robot string) (*feed, error) {
	st, err := api.Ingest(ctx)
	if err != nil {
		return nil, err
	}
	return &feed{FusionService_IngestClient: st, robot: robot}, nil
}

func (f *feed) send(sample *pb.Sample) error {
	return f.Send(&pb.IngestRequest{Robot: f.robot, ClientSequence: f.sent.Add(1), Sample: sample, SessionId: f.session})
}

// apply sends sample and returns its verdict, which must answer it;
// resolution-only responses before it go to f.resolved.
func (f *feed) apply(sample *pb.Sample) (*pb.IngestResponse, error) {
	if err := f.send(sample); err != nil {
		return nil, err
	}
	resp, err := f.Recv()
	for err == nil && resolutionOnly(resp) {
		f.resolved = append(f.resolved, resp.GetResolved()...)
		resp, err = f.Recv()
	}
	if err != nil {
		return nil, err
	}
	if got, want := resp.GetClientSequence(), f.sent.Load(); got != want {
		return nil, fmt.Errorf("verdict for client sequence %d, want %d", got, want)
	}
	return resp, nil
}

// close ends the stream once every sample sent has its verdict.
func (f *feed) close() error {
	if err := f.CloseSend(); err != nil {
		return err
	}
	for {
		resp, err := f.Recv()
		if errors.Is(err, io.EOF) {
			return nil
		} else if err != nil {
			return err
		}
		if resolutionOnly(resp) {
			f.resolved = append(f.resolved, resp.GetResolved()...)
		}
	}
}

// resolutionOnly tells whether a response carries only resolutions of
// held inputs sent before (IngestResponse.resolved).
func resolutionOnly(r *pb.IngestResponse) bool {
	return r.GetClientSequence() == 0 && r.GetSequence() == 0 && r.GetVerdict() == pb.Verdict_VERDICT_UNSPECIFIED && len(r.GetResolved()) > 0
}

// journaledForm returns a response as sent, less the client sequences of
// its resolutions, which the journal does not keep: the form the journal
// records when the resolutions' inputs came on the same stream. It checks
// each client sequence against clientSeq (robot sequence -> client
// sequence of the held input).
func journaledForm(t testing.TB, sent *pb.IngestResponse, clientSeq map[uint64]uint64) *pb.IngestResponse {
	t.Helper()
	if len(sent.GetResolved()) == 0 {
		return sent
	}
	out := proto.CloneOf(sent)
	for _, r := range out.GetResolved() {
		if want := clientSeq[r.GetSequence()]; r.GetClientSequence() != want {
			t.Fatalf("resolution of input %d carries client sequence %d, want %d", r.GetSequence(), r.GetClientSequence(), want)
		}
		r.ClientSequence = 0
	}
	return out
}

// watch calls seen with every pose watched on robot until the stream ends,
// ctx's end included.
func watch(ctx context.Context, api pb.FusionServiceClient, robot string, seen func(*pb.FusedPose)) {
	st, err := api.Watch(ctx, &pb.WatchRequest{Robot: robot})
	if err != nil {
		return
	}
	for {
		resp, err := st.Recv()
		if err != nil {
			return
		}
		seen(resp.GetPose())
	}
}

// toProto turns a simulator input into a wire sample.
func toProto(in *fusiontest.Input) *pb.Sample {
	switch {
	case in.Odometry != nil:
		return convert.OdometryToProto(in.Odometry)
	case in.Heading != nil:
		return convert.HeadingToProto(in.Heading)
	default:
		return convert.FixToProto(in.Fix)
	}
}

// samples returns a scenario's inputs as wire samples in arrival order, and
// the robot configuration.
func samples(sc fusiontest.Scenario) ([]*pb.Sample, []fusiontest.Input, *pb.RobotConfig) {
	s := fusiontest.New(sc)
	cfg := convert.ConfigToProto(s.Config())
	var out []*pb.Sample
	var ins []fusiontest.Input
	for {
		in, ok := s.Next()
		if !ok {
			return out, ins, cfg
		}
		out = append(out, toProto(&in))
		ins = append(ins, in)
	}
}

func wireConfig(c fusion.Config) *pb.RobotConfig { return convert.ConfigToProto(c) }

// createCart creates robots/cart, the simulated cart of cartRun(seed, 1),
// and returns that run's samples.
func createCart(t testing.TB, api pb.FusionServiceClient, seed uint64) []*pb.Sample {
	t.Helper()
	samp, cfg := cartRun(seed, 1)
	if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	return samp
}

// serveCart starts a service for the rest of the test, connects to it and
// creates robots/cart in it (createCart with seed 3).
func serveCart(t testing.TB, tc testConfig) pb.FusionServiceClient {
	t.Helper()
	srv := start(t, tc)
	t.Cleanup(srv.stop)
	api := dial(t, srv.addr)
	createCart(t, api, 3)
	return api
}

// openWatch opens a watch of robot and receives its first pose.
func openWatch(t testing.TB, ctx context.Context, api pb.FusionServiceClient, robot string) pb.FusionService_WatchClient {
	t.Helper()
	w, err := api.Watch(ctx, &pb.WatchRequest{Robot: robot})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := w.Recv(); err != nil {
		t.Fatalf("first pose: %v", err)
	}
	return w
}

// newestOdometry returns the stamp of the last odometry sample in samp
// (0 if none).
func newestOdometry(samp []*pb.Sample) int64 {
	var newest int64
	for _, s := range samp {
		if o := s.GetOdometry(); o != nil {
			newest = o.GetStampNs()
		}
	}
	return newest
}
