package server

import (
	"context"
	"fmt"
	"testing"
	"net"
	"google.golang.org/grpc"

	pb "reckon.example/proto/reckon/v1"
)

func BenchmarkTmpFull(b *testing.B) {
	samp, cfg := cartRun(31, ratesSeconds)
	stampNs := make([]int64, len(samp))
	for i, s := range samp {
		switch {
		case s.GetOdometry() != nil:
			stampNs[i] = s.GetOdometry().GetStampNs()
		case s.GetHeading() != nil:
			stampNs[i] = s.GetHeading().GetStampNs()
		default:
			stampNs[i] = stampNs[max(i-1, 0)]
		}
	}
	for b.Loop() {
		srv := start(b, testConfig{Options: Options{JournalDir: b.TempDir()}})
		api := stub(b, srv.addr)
		for k := range ratesRobots {
			if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: fmt.Sprintf("cart-%d", k), Config: cfg}); err != nil {
				b.Fatal(err)
			}
		}
		c, l := ratesRun(b, srv.addr, samp, stampNs)
		b.ReportMetric(float64(c.Nanoseconds())/float64(len(l)), "cpu-ns/sample")
		srv.stop()
	}
}

func BenchmarkTmpBare(b *testing.B) {
	samp, _ := cartRun(31, ratesSeconds)
	stampNs := make([]int64, len(samp))
	for i, s := range samp {
		switch {
		case s.GetOdometry() != nil:
			stampNs[i] = s.GetOdometry().GetStampNs()
		case s.GetHeading() != nil:
			stampNs[i] = s.GetHeading().GetStampNs()
		default:
			stampNs[i] = stampNs[max(i-1, 0)]
		}
	}
	lis, _ := net.Listen("tcp", "127.0.0.1:0")
	gs := grpc.NewServer()
	pb.RegisterFusionServiceServer(gs, bare{})
	go gs.Serve(lis)
	defer gs.Stop()
	for b.Loop() {
		c, l := ratesRun(b, lis.Addr().String(), samp, stampNs)
		b.ReportMetric(float64(c.Nanoseconds())/float64(len(l)), "cpu-ns/sample")
	}
}

