package calib

import (
	"math"
	"runtime"
	"slices"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// iterationBytes returns the bytes that one Levenberg-Marquardt iteration
// and the covariances of FitSystematic allocate on the run cut into
// segments of segS seconds, from the configured start with its first
// weights and blocks, and the number of segments.
func iterationBytes(t *testing.T, cfg fusion.Config, r sysRun, segS float64) (uint64, int) {
	t.Helper()
	rb, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	cfg = rb.Config()
	opt := SystematicOptions{SegmentS: segS}
	opt.defaults()
	m, err := newSysModel(&cfg, Samples(r.odo), r.fixes, opt)
	if err != nil {
		t.Fatal(err)
	}
	s := newSysSolver(m, opt)
	s.evaluate(s.x, s.e)
	s.reweight(8, true)
	s.buildBlocks(s.x)
	var before, after runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&before)
	s.lm(1)
	if stated, _, _ := s.covariances(); stated == nil {
		t.Fatalf("%g s segments: no covariance", segS)
	}
	runtime.ReadMemStats(&after)
	return after.TotalAlloc - before.TotalAlloc, len(m.segStart)
}

// TestSystematicMemoryBySegments: what an iteration of the fit and its
// covariances allocate grows with the run no faster than the run itself.
// Two minutes and eight minutes of the same cart are cut into segments of
// a second (so that the segments, and the anchors' three parameters each,
// are many: 120 and 480). Before, the normal matrix was dense in the
// globals and every anchor, (7 + 3 S)^2 numbers, and each Levenberg-
// Marquardt try, the factorisation and the covariances held copies of it:
// the longer run's iteration allocated 11.3 times the shorter's (180
// against 16 MB), and the demo's hour (360 segments of 10 s) took 9.4 MB a
// matrix.
// Now the anchors are eliminated segment by segment (arrowNormal), and
// the iteration allocates in proportion to the fixes: the longer run 4.0
// times the shorter (23 against 5.9 MB; the bound: 6).
func TestSystematicMemoryBySegments(t *testing.T) {
	var bytes [2]uint64
	var segs [2]int
	for i, d := range []float64{120, 480} {
		r, cfg := injected(1, d)
		bytes[i], segs[i] = iterationBytes(t, cfg, r, 1)
		t.Logf("%.0f s, %d segments: %.2f MB an iteration and the covariances", d, segs[i], float64(bytes[i])/1e6)
	}
	if ratio := float64(bytes[1]) / float64(bytes[0]); ratio > 6 {
		t.Errorf("%d segments allocated %.1f times what %d did (%d against %d bytes): more than the run's growth", segs[1], ratio, segs[0], bytes[1], bytes[0])
	}
}

// TestSystematicSourceKeepsNothing: FitSystematicFrom's model of a run
// (a cart with encoder counts and an IMU in rotation mode, whose turn
// rows take the heading of the sample before) is the same whether the odometry comes from the slice, from a source that
// hands every sample over in one reused struct (the fit keeps nothing of
// a sample: reckon calibrate reads the journal again and decodes into
// it), or from a source out of stamp order (read again whole and sorted).
func TestSystematicSourceKeepsNothing(t *testing.T) {
	r := simulateSys(fusiontest.Scenario{Layout: fusiontest.GyroTurn, Counts: true, Seed: 3, DurationS: 30})
	rb, err := fusion.New(r.cfg)
	if err != nil {
		t.Fatal(err)
	}
	cfg := rb.Config()
	model := func(src OdometrySource) *sysModel {
		m, err := newSysModel(&cfg, src, r.fixes, SystematicOptions{})
		if err != nil {
			t.Fatal(err)
		}
		return m
	}
	want := model(Samples(r.odo))
	reused := func(yield func(*fusion.Odometry) bool) error {
		var o fusion.Odometry
		counts := make([]int64, len(cfg.Wheels))
		var imu float64
		for _, s := range r.odo {
			o = s
			o.Counts = append(counts[:0], s.Counts...)
			if s.IMUHeadingRad != nil {
				imu = *s.IMUHeadingRad
				o.IMUHeadingRad = &imu
			}
			if !yield(&o) {
				return nil
			}
			clear(counts) // what the fit kept of it would change
			imu = math.NaN()
		}
		return nil
	}
	reads := 0
	reversed := slices.Clone(r.odo)
	slices.Reverse(reversed)
	unsorted := func(yield func(*fusion.Odometry) bool) error {
		reads++
		return Samples(reversed)(yield)
	}
	for name, got := range map[string]*sysModel{"reused": model(reused), "unsorted": model(unsorted)} {
		// Bit for bit (the IMU's turn is NaN without a rotation IMU).
		same := slices.EqualFunc(got.ivs, want.ivs, func(a, b sysInterval) bool {
			return a.t0 == b.t0 && a.t1 == b.t1 && a.off == b.off && a.isStep == b.isStep && math.Float64bits(a.imu) == math.Float64bits(b.imu)
		})
		if !same || !slices.Equal(got.travel, want.travel) || got.counts != want.counts {
			t.Errorf("%s: %d intervals, %d travels, not the slice's %d and %d", name, len(got.ivs), len(got.travel), len(want.ivs), len(want.travel))
		}
	}
	if len(want.ivs) < 1000 || !want.rotation || reads != 2 {
		t.Errorf("%d intervals; the unsorted source read %d times, want 2", len(want.ivs), reads)
	}
}
