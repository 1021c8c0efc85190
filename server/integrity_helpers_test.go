package server

import (
	"context"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// stub dials a test service with the generated client.
func stub(t testing.TB, addr string) pb.FusionServiceClient {
	t.Helper()
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	return pb.NewFusionServiceClient(conn)
}

// feedStub sends samples on one ingest stream with a session id and
// returns the verdicts in order.
func feedStub(t testing.TB, api pb.FusionServiceClient, robot, session string, firstSeq uint64, samp []*pb.Sample) []*pb.IngestResponse {
	t.Helper()
	st, err := api.Ingest(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	out := make([]*pb.IngestResponse, 0, len(samp))
	errc := make(chan error, 1)
	go func() {
		for i, s := range samp {
			if err := st.Send(&pb.IngestRequest{Robot: robot, ClientSequence: firstSeq + uint64(i), Sample: s, SessionId: session}); err != nil {
				errc <- err
				return
			}
		}
		errc <- st.CloseSend()
	}()
	for range samp {
		resp, err := st.Recv()
		if err != nil {
			t.Fatal(err)
		}
		out = append(out, resp)
	}
	if err := <-errc; err != nil {
		t.Fatal(err)
	}
	return out
}

// cartRun is a greenhouse cart's run: wire samples and the configuration.
func cartRun(seed uint64, seconds float64) ([]*pb.Sample, *pb.RobotConfig) {
	samp, _, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: seed, DurationS: seconds, OutlierFraction: 0.05})
	return samp, cfg
}

// offline replays a robot's journal from the start, checking every output.
func offline(t testing.TB, dir, id string) (pose *pb.FloorPose, seq uint64) {
	t.Helper()
	fr, _, err := journal.Replay(dir, id, journal.ReplayOptions{Check: true})
	if err != nil {
		t.Fatal(err)
	}
	p := fr.Pose().Pose
	return &pb.FloorPose{XM: p.X, YM: p.Y, HeadingRad: p.Heading}, fr.Sequence()
}
