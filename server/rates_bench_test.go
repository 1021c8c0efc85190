package server

import (
	"cmp"
	"context"
	"fmt"
	"math/rand/v2"
	"net"
	"slices"
	"sync"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/mem"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
)

// ratesRobots, ratesStart, ratesWarm and ratesSeconds size
// BenchmarkRobotRates: 10 robots, each at its own rates (200 Hz odometry,
// 100 Hz IMU, 10 Hz fixes: 310 samples a second), for 20 s of their time,
// measured twice: the robots' start, ratesSeconds from ratesStart, and
// their rates, ratesSeconds after ratesWarm.
//
// A new robot's first seconds are its start, not its rates: its window
// grows to its length in its first second, and each session's verdicts,
// kept to answer retries (sessionVerdicts, 4,096 of them), fill their
// ring in its first 13 s at these rates, with the slabs that hold their
// bytes. The service's heap grows meanwhile (the garbage collector's goal
// from 23 to 32 MB in a run of 10 robots, GODEBUG=gctrace=1, session 19),
// and every new page of it is a page fault, dear on this virtual machine
// (10 to 25 us): without a journal about 300 a second from 2 to 7 s, under
// 10 a second after 20 s, against 2 a second for the bare service
// (perf stat -I 1000 -e page-faults). So the targets are judged after
// ratesWarm, when the rings are full (the heap's goal settles at about
// 17 s); the start is reported beside them. On this machine the host's
// noise moved the ratios more than the start did (DEVELOPERS.md,
// "RobotRates, session by session": session 19).
const (
	ratesRobots  = 10
	ratesStart   = 2 * time.Second
	ratesWarm    = 15 * time.Second
	ratesSeconds = 5
)

// cpuTime returns the process's user and system CPU time.
func cpuTime() time.Duration {
	var ru syscall.Rusage
	syscall.Getrusage(syscall.RUSAGE_SELF, &ru)
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// ratesWindow is a measured stretch of RobotRates' runs: from from to
// from+ratesSeconds, of the robots' time and of the run's.
type ratesWindow struct{ from time.Duration }

func (w ratesWindow) holds(d time.Duration) bool {
	return d >= w.from && d < w.from+ratesSeconds*time.Second
}

// ratesWindows are the two stretches RobotRates measures: the robots'
// start and their rates.
var ratesWindows = [2]ratesWindow{{ratesStart}, {ratesWarm}}

// paced feeds one robot's samples on one stream at the times their stamps
// say, starting phase late, with a session id as the client library
// sends, and returns the time from send to verdict of each sample of each
// of ratesWindows.
func paced(b testing.TB, api pb.FusionServiceClient, robot string, samp []*pb.Sample, stampNs []int64, phase time.Duration) [2][]time.Duration {
	st, err := api.Ingest(context.Background())
	if err != nil {
		b.Fatal(err)
	}
	sent := make([]time.Time, len(samp))
	var mu sync.Mutex
	go func() {
		time.Sleep(phase)
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
	var lat [2][]time.Duration
	for range samp {
		resp, err := st.Recv()
		if err != nil {
			b.Fatal(err)
		}
		k := resp.GetClientSequence() - 1
		mu.Lock()
		for w, win := range ratesWindows {
			if win.holds(time.Duration(stampNs[k] - stampNs[0])) {
				lat[w] = append(lat[w], time.Since(sent[k]))
			}
		}
		mu.Unlock()
	}
	return lat
}

// pathTotal adds up what Options.afterTake reports: the time of the
// service's takes, from their start to their verdicts sent, in
// nanoseconds.
type pathTotal struct{ ns atomic.Int64 }

func (p *pathTotal) took(_ int, d time.Duration) { p.ns.Add(int64(d)) }

// ratesRun feeds ratesRobots robots at their rates into the service at
// addr, robot k starting phases[k] late (nil: all at once), and returns
// for each of ratesWindows the CPU time the process took in it, the
// latency of every verdict of a sample it holds, and the time of the
// service's takes in it (path, nil for the bare service: zero).
func ratesRun(b testing.TB, addr string, samp []*pb.Sample, stampNs []int64, phases []time.Duration, path *pathTotal) (cpu [2]time.Duration, lat [2][]time.Duration, took [2]time.Duration) {
	api := stub(b, addr)
	var wg sync.WaitGroup
	lats := make([][2][]time.Duration, ratesRobots)
	t0 := time.Now()
	for k := range ratesRobots {
		wg.Add(1)
		go func() {
			defer wg.Done()
			var phase time.Duration
			if phases != nil {
				phase = phases[k]
			}
			lats[k] = paced(b, api, fmt.Sprintf("robots/cart-%d", k), samp, stampNs, phase)
		}()
	}
	for w, win := range ratesWindows {
		time.Sleep(win.from - time.Since(t0))
		c0 := cpuTime()
		var p0 int64
		if path != nil {
			p0 = path.ns.Load()
		}
		time.Sleep(win.from + ratesSeconds*time.Second - time.Since(t0))
		cpu[w] = cpuTime() - c0
		if path != nil {
			took[w] = time.Duration(path.ns.Load() - p0)
		}
	}
	wg.Wait()
	for w := range ratesWindows {
		for k := range lats {
			lat[w] = append(lat[w], lats[k][w]...)
		}
	}
	return cpu, lat, took
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
// ratios (targets 1.15 and 1.5). Each iteration is a pair of runs, in
// turns bare first and service first; the CPU figures are the medians of
// the runs (on this virtual machine one run of either side may cost half
// as much again as the next, whatever runs in it), cpu-ratio the ratio of
// the medians and pair-ratio the median of the pairs' ratios; likewise the
// p99s are the medians of the runs' p99s (a run whose machine stalled for
// a moment sets the p99 of all the runs' verdicts pooled: pooled-p99-ratio).
// A third run in each iteration, of the service without a journal (memory
// only, a mode of its own), gives memory-only-cpu-ratio and
// memory-only-p99-ratio: the journal's share is the difference.
//
// The service's runs also time their own path where it runs, among the
// transport's work and with the caches that work leaves it (Options.
// afterTake: from the start of a take to its verdicts sent, the robot,
// the journal, the sessions and the send; not the decoding, which the
// receive does): path-ns/sample, and path-of-bare and
// memory-only-path-of-bare, that time a sample as a share of the bare
// service's CPU a sample. A path-of-bare over 0.15 is a CPU ratio over
// the target whatever the transport does beside it. The timing adds a
// clock read a take to the service's CPU.
//
// Each run is 20 s, measured twice (ratesWindows): the robots' rates, 5 s
// after the first 15, which the targets are judged on, and their start,
// 5 s after the first 2, reported as the same figures with start- before
// their names (the heap's growth in a robot's first seconds: see
// ratesWarm).
//
// independent: each robot starts at a phase of its own, drawn (seeded)
// from the fixes' 100 ms period, as robots with clocks of their own do;
// the targets are judged here. aligned: every robot starts at once, so
// that all ten send their odometry in the same instant every 5 ms and
// their fixes, each replaying the window since its stamp, in the same
// instant every 100 ms: the worst case of the rates, whose p99 is that
// burst's.
func BenchmarkRobotRates(b *testing.B) {
	b.Run("independent", func(b *testing.B) { benchRates(b, ratesPhases()) })
	b.Run("aligned", func(b *testing.B) { benchRates(b, nil) })
}

// ratesPhases returns the robots' phases of RobotRates/independent.
func ratesPhases() []time.Duration {
	rng := rand.New(rand.NewPCG(31, 7))
	phases := make([]time.Duration, ratesRobots)
	for k := range phases {
		phases[k] = time.Duration(rng.Int64N(int64(100 * time.Millisecond)))
	}
	return phases
}

// ratesSamples returns one robot's run of RobotRates (ratesWarm and the
// measured seconds after it), the stamp each sample is sent at (its own; a fix's,
// which comes late, that of the sample before it), and the robot's
// configuration.
func ratesSamples() ([]*pb.Sample, []int64, *pb.RobotConfig) {
	samp, cfg := cartRun(31, ratesWarm.Seconds()+ratesSeconds)
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
	return samp, stampNs, cfg
}

func benchRates(b *testing.B, phases []time.Duration) {
	samp, stampNs, cfg := ratesSamples()
	lis, _ := net.Listen("tcp", "127.0.0.1:0")
	gs := grpc.NewServer()
	pb.RegisterFusionServiceServer(gs, bare{})
	go gs.Serve(lis)
	defer gs.Stop()
	// A run's CPU a sample and verdicts, for each of ratesWindows.
	type run struct {
		cpu, path [2]float64
		lat       [2][]time.Duration
	}
	measured := func(cpu [2]time.Duration, lat [2][]time.Duration, took [2]time.Duration) run {
		var r run
		for w := range ratesWindows {
			r.cpu[w] = float64(cpu[w].Nanoseconds()) / float64(len(lat[w]))
			r.path[w] = float64(took[w].Nanoseconds()) / float64(len(lat[w]))
		}
		r.lat = lat
		return r
	}
	bareRun := func() run {
		return measured(ratesRun(b, lis.Addr().String(), samp, stampNs, phases, nil))
	}
	serviceRun := func(journalDir string) run {
		path := &pathTotal{}
		srv := start(b, testConfig{Options: Options{JournalDir: journalDir, afterTake: path.took}})
		defer srv.stop()
		api := stub(b, srv.addr)
		for k := range ratesRobots {
			if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: fmt.Sprintf("cart-%d", k), Config: cfg}); err != nil {
				b.Fatal(err)
			}
		}
		return measured(ratesRun(b, srv.addr, samp, stampNs, phases, path))
	}
	fullRun := func() run { return serviceRun(b.TempDir()) }
	// The figures of each window, over the iterations.
	type figures struct {
		bareCPU, fullCPU, memCPU, pairs, bareP99, fullP99, memP99 []float64
		fullPath, memPath                                         []float64
		bareLat, fullLat                                          []time.Duration
	}
	var fig [2]figures
	for b.Loop() {
		var br, fr run
		if len(fig[0].pairs)%2 == 0 {
			br = bareRun()
			fr = fullRun()
		} else {
			fr = fullRun()
			br = bareRun()
		}
		mr := serviceRun("")
		for w := range ratesWindows {
			f := &fig[w]
			f.bareCPU, f.fullCPU, f.memCPU = append(f.bareCPU, br.cpu[w]), append(f.fullCPU, fr.cpu[w]), append(f.memCPU, mr.cpu[w])
			f.fullPath, f.memPath = append(f.fullPath, fr.path[w]), append(f.memPath, mr.path[w])
			f.pairs = append(f.pairs, fr.cpu[w]/br.cpu[w])
			f.memP99 = append(f.memP99, float64(p99(mr.lat[w])))
			f.bareLat, f.fullLat = append(f.bareLat, br.lat[w]...), append(f.fullLat, fr.lat[w]...)
			f.bareP99, f.fullP99 = append(f.bareP99, float64(p99(br.lat[w]))), append(f.fullP99, float64(p99(fr.lat[w])))
		}
	}
	// The rates' figures (the targets') under their own names, the
	// start's with start- before them.
	for w, prefix := range [2]string{"start-", ""} {
		f := &fig[w]
		bm, fm := median(f.bareCPU), median(f.fullCPU)
		bp, fp := median(f.bareP99), median(f.fullP99)
		b.ReportMetric(bm, prefix+"bare-cpu-ns/sample")
		b.ReportMetric(fm, prefix+"cpu-ns/sample")
		b.ReportMetric(fm/bm, prefix+"cpu-ratio")
		b.ReportMetric(median(f.pairs), prefix+"pair-ratio")
		b.ReportMetric(median(f.memCPU)/bm, prefix+"memory-only-cpu-ratio")
		b.ReportMetric(median(f.fullPath), prefix+"path-ns/sample")
		b.ReportMetric(median(f.fullPath)/bm, prefix+"path-of-bare")
		b.ReportMetric(median(f.memPath)/bm, prefix+"memory-only-path-of-bare")
		b.ReportMetric(bp/1e3, prefix+"bare-p99-us")
		b.ReportMetric(fp/1e3, prefix+"p99-us")
		b.ReportMetric(fp/bp, prefix+"p99-ratio")
		b.ReportMetric(median(f.memP99)/bp, prefix+"memory-only-p99-ratio")
		b.ReportMetric(float64(p99(f.fullLat))/float64(p99(f.bareLat)), prefix+"pooled-p99-ratio")
	}
}

// median returns the median of v (the mean of the middle two when their
// number is even); it sorts v.
func median(v []float64) float64 {
	slices.Sort(v)
	n := len(v)
	if n%2 == 1 {
		return v[n/2]
	}
	return (v[n/2-1] + v[n/2]) / 2
}

// BenchmarkRatesPath feeds RobotRates/independent's requests, as they are
// encoded on the wire, to the service without the transport: one at a
// time, each robot's in its order, as paced sends them (a sample whose
// stamp is before the one sent last goes right after it), merged across
// the robots by send time, through the
// service's codec and the path of a request taken where it was received
// (ingestStream, charged to the budget of pending bytes around it), each
// robot on a stream of its own, the service in memory only. It reports the time and the allocations of a sample, warm: it is
// for what the service's own path does, which RobotRates' CPU figure,
// moved by the host, cannot show. Its instruction count does not move
// with the host: run it under callgrind (DEVELOPERS.md, "Benchmarks").
func BenchmarkRatesPath(b *testing.B) { ratesPath(b, nil) }

// BenchmarkRatesPathCold is BenchmarkRatesPath with the caches made cold
// before each sample, as the transport's work between two samples of a
// robot leaves them in RobotRates: 2 MB written, a 64-byte line at a
// time. Its figure is cold-ns/sample, the samples' own time (a clock read
// on either side of each); ns/op includes the writing. Under callgrind's
// cache simulation (DEVELOPERS.md, "Benchmarks") it counts the cache
// lines, of code and of data, that a sample's path touches: what the path
// costs where it runs, as no warm figure shows.
func BenchmarkRatesPathCold(b *testing.B) { ratesPath(b, make([]byte, 2<<20)) }

// evictSink keeps evictCaches' loads from being optimised away.
var evictSink byte

// evictCaches writes every 64-byte line of buf.
//
//go:noinline
func evictCaches(buf []byte) {
	var x byte
	for i := 0; i < len(buf); i += 64 {
		x += buf[i]
		buf[i] = x
	}
	evictSink = x
}

// ratesPath is BenchmarkRatesPath; with evict (not nil), each sample is
// taken after evictCaches(evict) and timed alone (cold-ns/sample).
func ratesPath(b *testing.B, evict []byte) {
	samp, stampNs, cfg := ratesSamples()
	phases := ratesPhases()
	type item struct {
		at    time.Duration
		robot int
		req   mem.BufferSlice
	}
	var items []item
	for k := range ratesRobots {
		robot := fmt.Sprintf("robots/cart-%d", k)
		var at time.Duration
		for i, sm := range samp {
			enc, _ := proto.Marshal(&pb.IngestRequest{Robot: robot, ClientSequence: uint64(i + 1), Sample: sm, SessionId: "rates-" + robot})
			at = max(at, time.Duration(stampNs[i]-stampNs[0])+phases[k])
			items = append(items, item{at, k, mem.BufferSlice{mem.SliceBuffer(enc)}})
		}
	}
	slices.SortStableFunc(items, func(x, y item) int { return cmp.Compare(x.at, y.at) })
	// A stream's own: its slab and decoder of requests, its outbox and
	// its scratch, as Ingest makes them.
	type stream struct {
		sl   *slab
		dec  *requestDecoder
		ob   *outbox
		sc   *scratch
		reqs []arrivedRequest
	}
	var s *Server
	var streams []stream
	fresh := func() {
		if s != nil {
			s.Close()
		}
		var err error
		if s, err = New(Options{}); err != nil {
			b.Fatal(err)
		}
		streams = streams[:0]
		for k := range ratesRobots {
			if _, err := s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: fmt.Sprintf("cart-%d", k), Config: cfg}); err != nil {
				b.Fatal(err)
			}
			streams = append(streams, stream{&slab{}, &requestDecoder{}, newOutbox(), &scratch{verdicts: slab{next: verdictSlabStart}}, nil})
		}
	}
	fresh()
	defer func() { s.Close() }()
	cd := newCodec()
	batch := make([]*arrivedRequest, 1)
	i := 0
	var took time.Duration
	b.ReportAllocs()
	for b.Loop() {
		var t0 time.Time
		if evict != nil {
			evictCaches(evict)
			t0 = time.Now()
		}
		st := &streams[items[i].robot]
		if len(st.reqs) == 0 {
			st.reqs = make([]arrivedRequest, requestBlock) // as receive does
		}
		req := &st.reqs[0]
		st.reqs = st.reqs[1:]
		out := ratesPathTake(s, cd, items[i].req, req, st.sl, st.dec, st.ob, st.sc, batch)
		if evict != nil {
			took += time.Since(t0)
		}
		if out.Verdict == pb.Verdict_VERDICT_INVALID {
			b.Fatalf("sample %d refused: %s", i, out.Reason)
		}
		i++
		if i == len(items) {
			b.StopTimer()
			fresh()
			i = 0
			b.StartTimer()
		}
	}
	if evict != nil {
		b.ReportMetric(float64(took.Nanoseconds())/float64(b.N), "cold-ns/sample")
	}
}

// ratesPathTake decodes one request and takes it as a request taken where
// it was received is; a function of its own, so that callgrind can count
// it alone (--toggle-collect='*ratesPathTake*').
//
//go:noinline
func ratesPathTake(s *Server, cd codec, wire mem.BufferSlice, req *arrivedRequest, sl *slab, dec *requestDecoder, ob *outbox, sc *scratch, batch []*arrivedRequest) *encodedResponse {
	req.slab, req.dec = sl, dec
	if err := cd.Unmarshal(wire, req); err != nil {
		panic(err)
	}
	// Charged and released as inbox.put and inbox.release do.
	req.charged = chargeOf(req)
	s.pending.charge(req.charged)
	batch[0] = req
	out := s.ingestStream(batch, ob, sc)
	s.pending.release(req.charged)
	sc.out = out
	ob.drain()
	return &out[0]
}
