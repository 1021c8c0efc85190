package fusion_test

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// TestSmootherEqualsBatch: on a linear-Gaussian case the Rauch-Tung-
// Striebel smoother equals the batch weighted least-squares solution of the
// whole problem, solved independently with gonum mat normal equations, to
// 1e-9 in the mean and the covariance. The case: a robot standing still
// (the motion model is then the identity) whose heading and IMU offset
// are random walks, with IMU headings (heading + offset), heading fixes and
// position fixes; every measurement is linear.
func TestSmootherEqualsBatch(t *testing.T) { smootherEqualsBatch(t, 0) }

// TestSmootherEqualsBatchGyroScale: the same with a gyro scale g (prior
// standard deviation 0.03) and an IMU whose headings turn 0.04 rad a
// sample: the offset's random walk gains g u, u the IMU's turn summed
// until it reaches the filter's step (estimator.GyroStepSigmas standard
// deviations of a difference of two readings), which the batch's rows
// carry as known coefficients of g (a fixed-interval smoother of a
// linear-Gaussian problem equals its batch least-squares solution; Rauch,
// Tung and Striebel 1965, from memory).
func TestSmootherEqualsBatchGyroScale(t *testing.T) { smootherEqualsBatch(t, 0.03) }

// smootherEqualsBatch is TestSmootherEqualsBatch with a gyro scale of
// prior standard deviation gs (0: none).
func smootherEqualsBatch(t *testing.T, gs float64) {
	const (
		steps = 60
		dtNs  = int64(10e6)
		qh    = 1e-4 // heading random walk, rad^2/s
		qo    = 4e-5 // IMU offset random walk, rad^2/s
		rImu  = 1e-4
		rHead = 4e-3
		rPos  = 1e-2
	)
	cfg := fusion.Config{
		Wheels:   []fusion.Wheel{{YM: 0.1}, {YM: -0.1}, {XM: -0.1, DirectionRad: math.Pi / 2}},
		IMU:      fusion.IMUAbsolute,
		Noise:    fusion.Noise{HeadingVarRad2PerS: qh, IMUOffsetVarRad2PerS: qo, IMUHeadingVarRad2: rImu},
		StartCov: []float64{0.04, 0, 0, 0, 0.09, 0, 0, 0, 0.01},
		WindowNs: int64(steps) * dtNs * 2,
		Sensors:  []fusion.Sensor{{ID: "compass", Kind: fusion.FixHeading}, {ID: "beacon", Kind: fusion.FixPosition}},
	}
	cfg.Calibration.GyroScaleStd = gs
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	r.CollectSteps()
	rng := rand.New(rand.NewPCG(61, 61))
	type meas struct {
		k    int
		kind int // 0 IMU, 1 heading, 2 position
		z    [2]float64
	}
	var ms []meas
	// With a gyro scale, the IMU's turn since the offset last stepped, and
	// each step's coefficient of g (the offset steps before the update).
	var acc, ref float64
	gstep := make([]float64, steps+1)
	// The IMU's first sample at the start initialises the offset.
	for k := 0; k <= steps; k++ {
		stamp := int64(k) * dtNs
		if k > 0 {
			if res := r.AddOdometry(fusion.Odometry{StartNs: stamp - dtNs, StampNs: stamp, TravelM: []float64{0, 0, 0}}); res.Verdict != fusion.VerdictApplied {
				t.Fatal(res.Err)
			}
		}
		if k%2 == 0 {
			z := 0.3 + 0.05*rng.NormFloat64()
			if gs > 0 {
				z = estimator.Wrap(0.3 + 0.02*float64(k) + 0.01*rng.NormFloat64())
				if k > 0 {
					if math.Abs(acc) >= estimator.GyroStepSigmas*math.Sqrt(2*rImu) {
						gstep[k], acc = acc, 0
					}
					acc += estimator.Wrap(z - ref)
				}
				ref = z
			}
			r.AddHeading(fusion.Heading{StampNs: stamp, HeadingRad: z})
			ms = append(ms, meas{k, 0, [2]float64{z}})
		}
		if k%7 == 3 {
			z := 0.02 * rng.NormFloat64()
			r.AddFix(fusion.Fix{SensorID: "compass", StampNs: stamp, Kind: fusion.FixHeading, HeadingRad: z, Cov: []float64{rHead}})
			ms = append(ms, meas{k, 1, [2]float64{z}})
		}
		if k%11 == 5 {
			z := [2]float64{0.1 * rng.NormFloat64(), 0.1 * rng.NormFloat64()}
			r.AddFix(fusion.Fix{SensorID: "beacon", StampNs: stamp, Kind: fusion.FixPosition, XM: z[0], YM: z[1], Cov: []float64{rPos, 0, 0, rPos}})
			ms = append(ms, meas{k, 2, z})
		}
	}
	stepsOut := fusion.MemSteps(r.FinishSteps())
	if len(stepsOut) != steps+1 {
		t.Fatalf("%d steps, want %d", len(stepsOut), steps+1)
	}
	sm := make(fusion.MemStates, len(stepsOut))
	if err := fusion.Smooth(stepsOut, sm); err != nil {
		t.Fatal(err)
	}

	// Batch: unknowns x, y, heading_0..N, offset_0..N (and g).
	N := steps + 1
	nu := 2 + 2*N
	ig := nu
	if gs > 0 {
		nu++
	}
	ih := func(k int) int { return 2 + k }
	io := func(k int) int { return 2 + N + k }
	info := mat.NewSymDense(nu, nil)
	rhs := mat.NewVecDense(nu, nil)
	add := func(row map[int]float64, z, v float64) {
		for i, a := range row {
			for j, b := range row {
				if j >= i {
					info.SetSym(i, j, info.At(i, j)+a*b/v)
				}
			}
			rhs.SetVec(i, rhs.AtVec(i)+a*z/v)
		}
	}
	add(map[int]float64{0: 1}, 0, 0.04)
	add(map[int]float64{1: 1}, 0, 0.09)
	add(map[int]float64{ih(0): 1}, 0, 0.01)
	dt := float64(dtNs) * 1e-9
	if gs > 0 {
		add(map[int]float64{ig: 1}, 0, gs*gs)
	}
	for k := 0; k+1 < N; k++ {
		add(map[int]float64{ih(k + 1): 1, ih(k): -1}, 0, qh*dt)
		row := map[int]float64{io(k + 1): 1, io(k): -1}
		if gstep[k+1] != 0 {
			row[ig] = -gstep[k+1]
		}
		add(row, 0, qo*dt)
	}
	for _, m := range ms {
		switch m.kind {
		case 0:
			add(map[int]float64{ih(m.k): 1, io(m.k): 1}, m.z[0], rImu)
		case 1:
			add(map[int]float64{ih(m.k): 1}, m.z[0], rHead)
		case 2:
			add(map[int]float64{0: 1}, m.z[0], rPos)
			add(map[int]float64{1: 1}, m.z[1], rPos)
		}
	}
	var ch mat.Cholesky
	if !ch.Factorize(info) {
		t.Fatal("batch information matrix is singular")
	}
	var sol mat.VecDense
	if err := ch.SolveVecTo(&sol, rhs); err != nil {
		t.Fatal(err)
	}
	var cov mat.SymDense
	if err := ch.InverseTo(&cov); err != nil {
		t.Fatal(err)
	}
	for k := 0; k < N; k++ {
		s := sm[k]
		idx := []int{0, 1, ih(k), io(k)}
		if gs > 0 {
			idx = append(idx, ig)
		}
		for a := range idx {
			if d := math.Abs(s.MeanAt(a) - sol.AtVec(idx[a])); d > 1e-9 {
				t.Errorf("step %d state %d: smoothed %.12f, batch %.12f", k, a, s.MeanAt(a), sol.AtVec(idx[a]))
			}
			for b := range idx {
				if d := math.Abs(s.At(a, b) - cov.At(idx[a], idx[b])); d > 1e-9 {
					t.Errorf("step %d covariance (%d,%d): smoothed %.3g, batch %.3g", k, a, b, s.At(a, b), cov.At(idx[a], idx[b]))
				}
			}
		}
	}
	// Smoothing never leaves the last step, and shrinks the first.
	if sm[N-1] != stepsOut[N-1].Post {
		t.Errorf("the last step changed")
	}
	if sm[0].Var(2) >= stepsOut[0].Post.Var(2) {
		t.Errorf("smoothing did not shrink the first heading variance")
	}
}

// TestSmootherBeatsFilter: on the simulated cart with ground truth the
// smoothed error is below the filtered error, and the smoothed estimate is
// consistent: its average NEES over Monte Carlo runs lies in the 95% band
// (Bar-Shalom, Li and Kirubarajan, 2001, section 5.4.2).
func TestSmootherBeatsFilter(t *testing.T) {
	for _, c := range []struct {
		name string
		sc   fusiontest.Scenario
	}{
		{"pose-camera", fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, DurationS: 20, CameraHz: 2}},
		// Markers 3 cm off the map, which landmark blocks carry: at each
		// new marker the smoother starts its block afresh.
		{"landmark-survey", fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, MarkerCount: 16, DurationS: 20, CameraHz: 2,
			Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}}},
	} {
		t.Run(c.name, func(t *testing.T) { smootherBeatsFilter(t, c.sc) })
	}
}

func smootherBeatsFilter(t *testing.T, base fusiontest.Scenario) {
	const runs = 20
	var filtSq, smSq float64
	var count int
	nees := map[int64]float64{} // checkpoint stamp -> sum over runs
	for run := 0; run < runs; run++ {
		sc := base
		sc.Seed = uint64(300 + run)
		s := fusiontest.New(sc)
		r, _ := fusion.New(s.TrueModelConfig())
		r.CollectSteps()
		truth := map[int64]estimator.Pose{}
		var all []fusion.Step
		for {
			in, ok := s.Next()
			if !ok {
				break
			}
			fusiontest.Feed(r, &in)
			if in.Odometry != nil {
				truth[in.Odometry.StampNs] = in.Truth
			}
			all = append(all, r.TakeSteps()...)
		}
		all = append(all, r.FinishSteps()...)
		sm := make(fusion.MemStates, len(all))
		if err := fusion.Smooth(fusion.MemSteps(all), sm); err != nil {
			t.Fatal(err)
		}
		for i, st := range all {
			tr, ok := truth[st.StampNs]
			if !ok || st.StampNs%int64(500e6) != 0 {
				continue
			}
			filtSq += sq(st.Post.MeanAt(0)-tr.X) + sq(st.Post.MeanAt(1)-tr.Y)
			smSq += sq(sm[i].MeanAt(0)-tr.X) + sq(sm[i].MeanAt(1)-tr.Y)
			fp := fusion.FusedPose{Pose: sm[i].Pose()}
			for a := 0; a < 3; a++ {
				for b := 0; b < 3; b++ {
					fp.Cov[a*3+b] = sm[i].At(a, b)
				}
			}
			nees[st.StampNs] += poseNEES(t, fp, tr)
			count++
		}
	}
	filt, smooth := math.Sqrt(filtSq/float64(count)), math.Sqrt(smSq/float64(count))
	if smooth >= filt {
		t.Errorf("smoothed error %.4f m is not below filtered %.4f m", smooth, filt)
	}
	// At each checkpoint the average NEES over the runs lies in the band of
	// the chi-square with 3*runs degrees of freedom, for about 95% of them.
	lo, hi := chiBand(3*runs, runs)
	inside := 0
	var total float64
	for _, sum := range nees {
		avg := sum / runs
		total += avg
		if avg >= lo && avg <= hi {
			inside++
		}
	}
	mean := total / float64(len(nees))
	t.Logf("RMS position error: filtered %.4f m, smoothed %.4f m; smoothed NEES mean %.2f, %d of %d checkpoints in [%.2f, %.2f]",
		filt, smooth, mean, inside, len(nees), lo, hi)
	if len(nees) < 30 || float64(inside) < 0.85*float64(len(nees)) || mean < lo || mean > hi {
		t.Errorf("smoothed estimate inconsistent: mean NEES %.2f, %d of %d checkpoints in [%.2f, %.2f]", mean, inside, len(nees), lo, hi)
	}
}

func sq(v float64) float64 { return v * v }

// TestAppendStepsEqualsTakeSteps: collecting a run's steps with
// AppendSteps into one reused buffer, or with SwapSteps passing two buffers
// back and forth, gives the same steps, bit for bit, as TakeSteps.
func TestAppendStepsEqualsTakeSteps(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 76, DurationS: 30, OutlierFraction: 0.05}
	s := fusiontest.New(sc)
	taken, _ := fusion.New(s.Config())
	appended, _ := fusion.New(s.Config())
	swapped, _ := fusion.New(s.Config())
	taken.CollectSteps()
	appended.CollectSteps()
	swapped.CollectSteps()
	var want, got, gotSwapped []fusion.Step
	buf := make([]fusion.Step, 0, 64)
	spare := make([]fusion.Step, 0, 64)
	for i := 0; ; i++ {
		in, ok := s.Next()
		if !ok {
			break
		}
		fusiontest.Feed(taken, &in)
		want = append(want, taken.TakeSteps()...)
		fusiontest.Feed(appended, &in)
		buf = appended.AppendSteps(buf[:0])
		got = append(got, buf...)
		fusiontest.Feed(swapped, &in)
		if i%7 == 0 || swapped.ReadySteps() > 40 {
			spare = swapped.SwapSteps(spare)
			gotSwapped = append(gotSwapped, spare...)
		}
	}
	want = append(want, taken.FinishSteps()...)
	got = append(got, appended.FinishSteps()...)
	gotSwapped = append(gotSwapped, swapped.FinishSteps()...)
	if len(got) != len(want) || len(gotSwapped) != len(want) || len(want) < 5000 {
		t.Fatalf("%d steps appended, %d swapped, %d taken", len(got), len(gotSwapped), len(want))
	}
	for i := range want {
		if got[i] != want[i] {
			t.Fatalf("step %d differs: appended %+v, taken %+v", i, got[i].Post, want[i].Post)
		}
		if gotSwapped[i] != want[i] {
			t.Fatalf("step %d differs: swapped %+v, taken %+v", i, gotSwapped[i].Post, want[i].Post)
		}
	}
}

// TestStepCopyFrom: CopyFrom onto a step that held another of the same
// size, or of another size, or nothing, gives the step itself.
func TestStepCopyFrom(t *testing.T) {
	collect := func(sc fusiontest.Scenario) []fusion.Step {
		s := fusiontest.New(sc)
		r, _ := fusion.New(s.Config())
		r.CollectSteps()
		for i := 0; i < 400; i++ {
			in, ok := s.Next()
			if !ok {
				break
			}
			fusiontest.Feed(r, &in)
		}
		return r.FinishSteps()
	}
	four := collect(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 3, DurationS: 5})
	three := collect(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 3, DurationS: 5})
	if four[0].Pred.Size() != 4 || three[0].Pred.Size() != 3 {
		t.Fatalf("state sizes %d and %d, want 4 and 3", four[0].Pred.Size(), three[0].Pred.Size())
	}
	for _, c := range []struct {
		name     string
		dst, src fusion.Step
	}{
		{"same size", four[10], four[len(four)-1]},
		{"start step", four[len(four)-1], four[0]},
		{"smaller onto larger", four[10], three[20]},
		{"larger onto smaller", three[20], four[10]},
		{"onto the zero step", fusion.Step{}, four[10]},
	} {
		dst := c.dst
		dst.CopyFrom(&c.src)
		if dst != c.src {
			t.Errorf("%s: the copy differs", c.name)
		}
	}
}

// gainedMem is fusion.MemSteps with the smoother's gains worked out
// beforehand, as a store that computes them elsewhere gives them.
type gainedMem struct {
	fusion.MemSteps
	gains []*[estimator.MaxStates * estimator.MaxStates]float64
	errs  []error
	asked int
}

func (g *gainedMem) Gain(k int) (*[estimator.MaxStates * estimator.MaxStates]float64, error) {
	g.asked++
	return g.gains[k], g.errs[k]
}

// TestSmoothWithGainsEqualsSmooth: the smoother given its gains from the
// store (estimator.RTSGain, worked out beforehand; every third left to the
// smoother) gives the same smoothed estimates, bit for bit, as the
// smoother working them out itself, across a Start step too; and a gain's
// error stops it as RTSStep's does.
func TestSmoothWithGainsEqualsSmooth(t *testing.T) {
	s := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 77, DurationS: 20, OutlierFraction: 0.05})
	r, _ := fusion.New(s.Config())
	r.CollectSteps()
	var all []fusion.Step
	for in, ok := s.Next(); ok; in, ok = s.Next() {
		fusiontest.Feed(r, &in)
		all = append(all, r.TakeSteps()...)
	}
	all = append(all, r.FinishSteps()...)
	all[len(all)/2].Start = true
	g := &gainedMem{MemSteps: all, gains: make([]*[estimator.MaxStates * estimator.MaxStates]float64, len(all)), errs: make([]error, len(all))}
	starts := 0
	for k := 0; k+1 < len(all); k++ {
		if all[k+1].Start {
			starts++
			continue
		}
		if k%3 == 0 {
			continue
		}
		g.gains[k] = new([estimator.MaxStates * estimator.MaxStates]float64)
		g.errs[k] = estimator.RTSGain(g.gains[k], &all[k].Post, &all[k+1].Pred, &all[k+1].F)
	}
	want := make(fusion.MemStates, len(all))
	if err := fusion.Smooth(fusion.MemSteps(all), want); err != nil {
		t.Fatal(err)
	}
	got := make(fusion.MemStates, len(all))
	if err := fusion.Smooth(g, got); err != nil {
		t.Fatal(err)
	}
	if len(all) < 1000 || starts < 1 || g.asked != len(all)-1-starts {
		t.Fatalf("%d steps, %d starts, %d gains asked for", len(all), starts, g.asked)
	}
	for i := range want {
		if want[i] != got[i] {
			t.Fatalf("smoothed state %d differs with the gains given", i)
		}
	}
	// A gain that failed stops the smoother at its step.
	k := len(all)/12*3 + 1
	g.errs[k] = estimator.ErrNotPositiveDefinite
	if err := fusion.Smooth(g, got); !errors.Is(err, estimator.ErrNotPositiveDefinite) || !strings.Contains(err.Error(), fmt.Sprintf("step %d ", k)) {
		t.Errorf("a failed gain at step %d gave %v", k, err)
	}
}
