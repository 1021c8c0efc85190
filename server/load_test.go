package server

import (
	"context"
	"fmt"
	"runtime"
	"sort"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
)

// loadResult is what runLoad measured.
type loadResult struct {
	sent, answered int64
	latencies      []time.Duration // sample sent to pose watched
	heapInuse      uint64
	watchedPoses   int64
}

// runLoad feeds robots in real time (200 Hz odometry, 100 Hz IMU, 10 Hz
// late fixes each) for dur, with watchers per robot of which one never
// reads. Request loops are bounded by dur; everything is on loopback.
func runLoad(t testing.TB, robots, watchers int, dur time.Duration) loadResult {
	srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
	defer srv.stop()
	ctx, cancel := context.WithTimeout(context.Background(), dur+30*time.Second)
	defer cancel()
	var res loadResult
	var mu sync.Mutex
	// Sequence -> time sent. Each robot has one feeder whose samples are all
	// taken, so the robot's sequence equals the client's.
	sentAt := make([]sync.Map, robots)
	var wg, watchWG sync.WaitGroup
	wctx, stopWatch := context.WithCancel(ctx)
	defer stopWatch()
	feeders := dial(t, srv.addr)
	readers := dial(t, srv.addr)
	for r := 0; r < robots; r++ {
		id := fmt.Sprintf("cart-%02d", r)
		samp, _, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: uint64(r), DurationS: dur.Seconds(), OutlierFraction: 0.05})
		if _, err := feeders.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: id, Config: cfg}); err != nil {
			t.Fatal(err)
		}
		name := "robots/" + id
		for w := 0; w < watchers; w++ {
			if w == 0 {
				// A stuck watcher: it takes the first pose and never reads again.
				st, err := readers.Watch(wctx, &pb.WatchRequest{Robot: name})
				if err != nil {
					t.Fatal(err)
				}
				if _, err := st.Recv(); err != nil {
					t.Fatal(err)
				}
				continue
			}
			watchWG.Add(1)
			go func(r int) {
				defer watchWG.Done()
				watch(wctx, readers, name, func(p *pb.FusedPose) {
					atomic.AddInt64(&res.watchedPoses, 1)
					if v, ok := sentAt[r].Load(p.GetSequence()); ok {
						d := time.Since(v.(time.Time))
						mu.Lock()
						res.latencies = append(res.latencies, d)
						mu.Unlock()
					}
				})
			}(r)
		}
		wg.Add(1)
		go func(r int) {
			defer wg.Done()
			sess, err := openFeed(ctx, feeders, name)
			if err != nil {
				t.Error(err)
				return
			}
			ins := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: uint64(r), DurationS: dur.Seconds(), OutlierFraction: 0.05})
			arrival := make([]int64, 0, len(samp))
			for {
				in, ok := ins.Next()
				if !ok {
					break
				}
				arrival = append(arrival, in.ArrivalNs)
			}
			recvDone := make(chan int64)
			go func() {
				var n, want int64
				for {
					resp, err := sess.Recv()
					if err != nil {
						break
					}
					want++
					if resp.GetClientSequence() != uint64(want) {
						t.Errorf("robot %d: verdict for %d, want %d", r, resp.GetClientSequence(), want)
					}
					n++
				}
				recvDone <- n
			}()
			t0 := time.Now()
			for i, s := range samp {
				if d := time.Until(t0.Add(time.Duration(arrival[i]))); d > 0 {
					time.Sleep(d)
				}
				sentAt[r].Store(uint64(i+1), time.Now())
				if err := sess.send(s); err != nil {
					t.Error(err)
					break
				}
				atomic.AddInt64(&res.sent, 1)
			}
			sess.CloseSend()
			atomic.AddInt64(&res.answered, <-recvDone)
		}(r)
	}
	wg.Wait()
	var ms runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&ms)
	res.heapInuse = ms.HeapInuse
	stopWatch()
	watchWG.Wait()
	return res
}

// TestLoad: 20 robots at 200 Hz odometry, 100 Hz IMU and 10 Hz fixes, five
// watchers each (one never reading), for three seconds: every sample gets
// its verdict, watchers see poses, and memory stays bounded. Run with -race
// in CI.
func TestLoad(t *testing.T) {
	if testing.Short() {
		t.Skip("load test")
	}
	res := runLoad(t, 20, 5, 3*time.Second)
	if res.sent == 0 || res.answered != res.sent {
		t.Errorf("%d samples sent, %d verdicts", res.sent, res.answered)
	}
	if res.watchedPoses == 0 {
		t.Errorf("no pose watched")
	}
	// Bounded: the robots' windows, journals' buffers and one pose per
	// watcher, not the history of everything sent.
	if res.heapInuse > 256<<20 {
		t.Errorf("heap in use %d MiB", res.heapInuse>>20)
	}
	t.Logf("%d samples, %d verdicts, %d poses watched, heap %d MiB", res.sent, res.answered, res.watchedPoses, res.heapInuse>>20)
}

// BenchmarkWatchLatency reports the sample-to-watcher latency, from the
// feeder sending a sample to a watcher receiving the pose that includes it,
// under the load of TestLoad (20 robots, 5 watchers each), as p50 and p99.
func BenchmarkWatchLatency(b *testing.B) {
	for b.Loop() {
		res := runLoad(b, 20, 5, 5*time.Second)
		sort.Slice(res.latencies, func(i, j int) bool { return res.latencies[i] < res.latencies[j] })
		if n := len(res.latencies); n > 0 {
			b.ReportMetric(float64(res.latencies[n/2].Microseconds()), "p50-us")
			b.ReportMetric(float64(res.latencies[n*99/100].Microseconds()), "p99-us")
			b.ReportMetric(float64(n), "poses")
		}
	}
}
