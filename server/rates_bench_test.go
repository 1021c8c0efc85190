package server

import (
	"context"
	"fmt"
	"net"
	"slices"
	"sync"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"

	pb "reckon.example/proto/reckon/v1"
)

// ratesRobots and ratesSeconds size BenchmarkRobotRates: 10 robots, each
// at its own rates (200 Hz odometry, 100 Hz IMU, 10 Hz fixes: 310 samples
// a second), for 5 s of their time.
const (
	ratesRobots  = 10
	ratesSeconds = 5
)

// cpuTime returns the process's user and system CPU time.
func cpuTime() time.Duration {
	var ru syscall.Rusage
	syscall.Getrusage(syscall.RUSAGE_SELF, &ru)
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// paced feeds one robot's samples on one stream at the times their stamps
// say, with a session id as the client library sends, and returns each
// sample's time from send to verdict.
func paced(b *testing.B, api pb.FusionServiceClient, robot string, samp []*pb.Sample, stampNs []int64) []time.Duration {
	st, err := api.Ingest(context.Background())
	if err != nil {
		b.Fatal(err)
	}
	sent := make([]time.Time, len(samp))
	var mu sync.Mutex
	go func() {
		t0 := time.Now()
		for i, s := range samp {
			if d := time.Duration(stampNs[i]-stampNs[0]) - time.Since(t0); d > 0 {
				time.Sleep(d)
			}
			mu.Lock()
			sent[i] = time.Now()
			mu.Unlock()
			if st.Send(&pb.IngestRequest{Robot: robot, ClientSequence: uint64(i + 1), Sample: s, SessionId: "rates-" + robot}) != nil {
				return
			}
		}
		st.CloseSend()
	}()
	lat := make([]time.Duration, 0, len(samp))
	for range samp {
		resp, err := st.Recv()
		if err != nil {
			b.Fatal(err)
		}
		mu.Lock()
		lat = append(lat, time.Since(sent[resp.GetClientSequence()-1]))
		mu.Unlock()
	}
	return lat
}

// ratesRun feeds ratesRobots robots at their rates into the service at
// addr and returns the CPU time it took and every verdict's latency.
func ratesRun(b *testing.B, addr string, samp []*pb.Sample, stampNs []int64) (time.Duration, []time.Duration) {
	api := stub(b, addr)
	var wg sync.WaitGroup
	lats := make([][]time.Duration, ratesRobots)
	cpu0 := cpuTime()
	for k := range ratesRobots {
		wg.Add(1)
		go func() {
			defer wg.Done()
			lats[k] = paced(b, api, fmt.Sprintf("robots/cart-%d", k), samp, stampNs)
		}()
	}
	wg.Wait()
	return cpuTime() - cpu0, slices.Concat(lats...)
}

func p99(d []time.Duration) time.Duration {
	slices.Sort(d)
	return d[len(d)*99/100]
}

// BenchmarkRobotRates feeds 10 robots at robot rates over loopback, each on
// its own stream, into the service with its journal (fsync every 100 ms),
// and the same messages into a bare gRPC service that answers without
// work (bare, above); it reports the process's CPU time per sample (client
// included, the same in both) and the verdict p99 of each, and their
// ratios (targets 1.15 and 1.5).
func BenchmarkRobotRates(b *testing.B) {
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
	lis, _ := net.Listen("tcp", "127.0.0.1:0")
	gs := grpc.NewServer()
	pb.RegisterFusionServiceServer(gs, bare{})
	go gs.Serve(lis)
	defer gs.Stop()
	var bareCPU, fullCPU time.Duration
	var bareLat, fullLat []time.Duration
	for b.Loop() {
		c, l := ratesRun(b, lis.Addr().String(), samp, stampNs)
		bareCPU, bareLat = bareCPU+c, append(bareLat, l...)
		srv := start(b, testConfig{Options: Options{JournalDir: b.TempDir()}})
		api := stub(b, srv.addr)
		for k := range ratesRobots {
			if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: fmt.Sprintf("cart-%d", k), Config: cfg}); err != nil {
				b.Fatal(err)
			}
		}
		c, l = ratesRun(b, srv.addr, samp, stampNs)
		fullCPU, fullLat = fullCPU+c, append(fullLat, l...)
		srv.stop()
	}
	n := float64(len(bareLat))
	bp, fp := p99(bareLat), p99(fullLat)
	b.ReportMetric(float64(bareCPU.Nanoseconds())/n, "bare-cpu-ns/sample")
	b.ReportMetric(float64(fullCPU.Nanoseconds())/n, "cpu-ns/sample")
	b.ReportMetric(float64(fullCPU)/float64(bareCPU), "cpu-ratio")
	b.ReportMetric(float64(bp.Microseconds()), "bare-p99-us")
	b.ReportMetric(float64(fp.Microseconds()), "p99-us")
	b.ReportMetric(float64(fp)/float64(bp), "p99-ratio")
}
