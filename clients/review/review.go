// Package review turns a recorded run (a robot's journal, or a robot
// configuration and a JSON Lines file of samples) into a review: the
// filtered and the Rauch-Tung-Striebel smoothed tracks with covariance as
// CSV, a plain-text summary, and an HTML report with figures that opens
// without a network. Steps and smoothed states are kept on disk, so an hour
// at 200 Hz fits in little memory.
package review

import (
	"bufio"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"

	"reckon.example/estimator"
	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// Source names a recorded run.
type Source struct {
	// JournalDir and Robot name a journal; or Samples (JSON Lines) with
	// Config.
	JournalDir, Robot string
	Samples           string
	Config            *pb.RobotConfig
	// Override, if set, replays the run with this configuration instead.
	Override *pb.RobotConfig
	// Truth, if set, is a CSV of the true pose (stamp_ns,x_m,y_m,heading_rad),
	// as the simulator writes it.
	Truth string
	// Label names the run in reports (default: the robot or file).
	Label string
}

// Options tune a review. Zero values take the defaults given.
type Options struct {
	// TempDir holds the step files while they are needed (default: the
	// system's).
	TempDir string
	// Progress, if set, is called with the inputs read so far.
	Progress func(inputs int)
	// MaxPoints bounds each plotted series (4000).
	MaxPoints int
	// MemoryBytes bounds the steps and smoothed states kept in memory
	// (1 GiB, about 1.6 million steps: an hour at 200 Hz with its IMU and
	// fixes); past it they go to files in TempDir.
	MemoryBytes int64
}

// Point is one step of a track.
type Point struct {
	StampNs int64
	State   estimator.State
}

// FixPoint is a fix for the track figure: where it put the sensor.
type FixPoint struct {
	StampNs  int64
	SensorID string
	Dim      int
	XM, YM   float64 // NaN for fixes without a position
	Verdict  pb.Verdict
}

// NISPoint is one NIS value.
type NISPoint struct {
	StampNs int64
	NIS     float64
	Dim     int
}

// Interval is a stretch of time.
type Interval struct {
	FromNs, ToNs int64
	Detail       string
}

// Summary holds the figures of a run.
type Summary struct {
	StartNs, EndNs int64
	Inputs         int
	DistanceM      float64
	Fixes          map[string]int // by verdict
	Reasons        map[string]int // refusal reasons
	Max95M         float64
	Max95AtNs      int64
	Final95M       float64
	MaxHeadingStd  float64
	FinalHeadingSt float64
	Sensors        []*pb.SensorConsistency
	Slips          int
	Recoveries     []Interval
	Distrust       []Interval
	Truncated      string
	HasTruth       bool
	FilteredRMSM   float64
	SmoothedRMSM   float64
	FilteredNEES   float64
	SmoothedNEES   float64
	// Medians resist the few points right after the robot was moved.
	FilteredNEESMedian, SmoothedNEESMedian float64
}

// Run is a reviewed run.
type Run struct {
	Label    string
	Robot    string
	Config   fusion.Config
	Summary  Summary
	Filtered []Point // decimated for figures
	Smoothed []Point
	Truth    []estimator.Pose
	Fixes    []FixPoint
	NIS      map[string][]NISPoint
	// FilteredCSV and SmoothedCSV are the exports written.
	FilteredCSV, SmoothedCSV string
}

type truthReader struct {
	r    *csv.Reader
	next int64
	pose estimator.Pose
	done bool
}

func openTruth(path string) (*truthReader, *os.File, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, nil, err
	}
	tr := &truthReader{r: csv.NewReader(bufio.NewReader(f))}
	tr.r.ReuseRecord = true
	tr.advance()
	return tr, f, nil
}

func (t *truthReader) advance() {
	for {
		rec, err := t.r.Read()
		if err != nil {
			t.done = true
			return
		}
		stamp, err := strconv.ParseInt(rec[0], 10, 64)
		if err != nil || len(rec) < 4 {
			continue // the header
		}
		x, _ := strconv.ParseFloat(rec[1], 64)
		y, _ := strconv.ParseFloat(rec[2], 64)
		h, _ := strconv.ParseFloat(rec[3], 64)
		t.next, t.pose = stamp, estimator.Pose{X: x, Y: y, Heading: h}
		return
	}
}

// at returns the truth at exactly stamp, reading forwards.
func (t *truthReader) at(stamp int64) (estimator.Pose, bool) {
	for !t.done && t.next < stamp {
		t.advance()
	}
	return t.pose, !t.done && t.next == stamp
}

// Analyze replays a recorded run with the smoother and writes the track
// exports into outDir as <label>-filtered.csv and <label>-smoothed.csv.
func Analyze(src Source, outDir string, opt Options) (*Run, error) {
	if opt.MaxPoints <= 0 {
		opt.MaxPoints = 4000
	}
	if opt.MemoryBytes <= 0 {
		opt.MemoryBytes = 1 << 30
	}
	run := &Run{NIS: map[string][]NISPoint{}}
	run.Summary.Fixes, run.Summary.Reasons = map[string]int{}, map[string]int{}
	steps := newStepStore(opt.TempDir, opt.MemoryBytes)
	defer steps.close()
	var fr *fusion.Robot
	makeRobot := func(c *pb.RobotConfig) error {
		if src.Override != nil {
			c = src.Override
		}
		cfg, err := convert.ConfigFromProto(c)
		if err != nil {
			return err
		}
		run.Config = cfg
		if fr, err = fusion.New(cfg); err != nil {
			return err
		}
		fr.CollectSteps()
		return nil
	}
	a := &accumulator{run: run, fixAt: map[uint64]int{}}
	// A second goroutine stores the steps and writes the filtered track
	// while the replay goes on.
	if err := os.MkdirAll(outDir, 0o755); err != nil {
		return nil, err
	}
	label := src.Label
	if label == "" {
		label = Label(src)
	}
	run.FilteredCSV = filepath.Join(outDir, label+"-filtered.csv")
	ff, err := os.Create(run.FilteredCSV)
	if err != nil {
		return nil, err
	}
	defer ff.Close()
	batches := make(chan []fusion.Step, 64)
	written := make(chan error, 1)
	go func(batches <-chan []fusion.Step) {
		w := bufio.NewWriterSize(ff, 1<<20)
		_, err := w.WriteString(strings.Join(csvHeader, ",") + "\n")
		var row []byte
		for b := range batches {
			for i := range b {
				if err == nil {
					err = steps.add(&b[i])
				}
				row = appendRow(row[:0], b[i].StampNs, &b[i].Post)
				if _, werr := w.Write(row); err == nil {
					err = werr
				}
			}
		}
		if ferr := w.Flush(); err == nil {
			err = ferr
		}
		written <- err
	}(batches)
	var pending []fusion.Step
	flushSteps := func(force bool) {
		if len(pending) >= 4096 || (force && len(pending) > 0) {
			batches <- pending
			pending = nil
		}
	}
	closed := false
	defer func() {
		if !closed {
			close(batches)
			<-written
		}
	}()
	take := func(s *pb.Sample) error {
		resp, _ := convert.Take(fr, s, 0)
		a.input(s, resp)
		pending = append(pending, fr.TakeSteps()...)
		flushSteps(false)
		if opt.Progress != nil && run.Summary.Inputs%10000 == 0 {
			opt.Progress(run.Summary.Inputs)
		}
		return nil
	}
	switch {
	case src.JournalDir != "":
		id := src.Robot
		if n, err := journal.ID(src.Robot); err == nil {
			id = n
		}
		run.Robot, run.Label = "robots/"+id, label
		// The journal is read and decoded in a goroutine of its own, while
		// this one replays; the robot is made from the opening first.
		opened := make(chan error, 1)
		inputs := make(chan *pb.Sample, 1024)
		stop := make(chan struct{})
		var scan journal.Scan
		var scanErr error
		go func() {
			defer close(inputs)
			scan, scanErr = journal.Read(src.JournalDir, id, journal.Visitor{
				Opening: func(op *pb.JournalOpening) error {
					err := makeRobot(op.GetConfig())
					opened <- err
					return err
				},
				Input: func(in *pb.JournalInput) error {
					select {
					case inputs <- in.GetSample():
						return nil
					case <-stop:
						return errors.New("review stopped")
					}
				},
			})
			if scan.Opening == nil {
				opened <- scanErr
			}
		}()
		if err := <-opened; err != nil {
			close(stop)
			for range inputs {
			}
			return nil, err
		}
		var takeErr error
		for s := range inputs {
			if takeErr == nil {
				if takeErr = take(s); takeErr != nil {
					close(stop)
				}
			}
		}
		if takeErr != nil {
			return nil, takeErr
		}
		if scanErr != nil {
			return nil, scanErr
		}
		if scan.Torn != nil {
			run.Summary.Truncated = fmt.Sprintf("the journal is truncated: %v in %s; this report covers the %d inputs before it", scan.Torn, filepath.Base(scan.TornSegment), scan.Pairs)
		}
	case src.Samples != "":
		if src.Config == nil && src.Override == nil {
			return nil, errors.New("review of samples needs a configuration")
		}
		run.Robot, run.Label = "robots/replay", label
		if err := makeRobot(src.Config); err != nil {
			return nil, err
		}
		f, err := os.Open(src.Samples)
		if err != nil {
			return nil, err
		}
		defer f.Close()
		sr := convert.NewSampleReader(f)
		for {
			s, err := sr.Next()
			if errors.Is(err, io.EOF) {
				break
			}
			if err != nil {
				run.Summary.Truncated = fmt.Sprintf("the samples file stops being readable: %v; this report covers the %d samples before it", err, run.Summary.Inputs)
				break
			}
			if err := take(s); err != nil {
				return nil, err
			}
		}
	default:
		return nil, errors.New("review needs a journal or a samples file")
	}
	if fr == nil {
		return nil, errors.New("the run has no configuration")
	}
	pending = append(pending, fr.FinishSteps()...)
	flushSteps(true)
	close(batches)
	closed = true
	if err := <-written; err != nil {
		return nil, err
	}
	run.Config = fr.Config()
	a.finish(fr)
	smoothed, err := newStateStore(opt.TempDir, steps.Len(), steps.onDisk())
	if err != nil {
		return nil, err
	}
	defer smoothed.close()
	if err := fusion.Smooth(steps, smoothed); err != nil {
		return nil, err
	}
	if err := smoothed.flush(); err != nil {
		return nil, err
	}
	if err := a.tracks(steps, smoothed, src.Truth, outDir, opt.MaxPoints); err != nil {
		return nil, err
	}
	return run, nil
}

// accumulator gathers the summary while inputs are replayed.
type accumulator struct {
	run       *Run
	fixAt     map[uint64]int // held fix sequence -> index in run.Fixes
	lostAt    int64
	lostWhy   string
	lost      bool
	lastStamp int64
}

func (a *accumulator) input(s *pb.Sample, resp *pb.IngestResponse) {
	sum := &a.run.Summary
	sum.Inputs++
	stamp := sampleStamp(s)
	if sum.Inputs == 1 || stamp < sum.StartNs {
		sum.StartNs = stamp
	}
	sum.EndNs = max(sum.EndNs, stamp)
	if f := s.GetFix(); f != nil {
		fp := FixPoint{StampNs: f.GetStampNs(), SensorID: f.GetSensorId(), Dim: int(f.GetCovariance().GetDimension()), Verdict: resp.GetVerdict()}
		if fp.SensorID == "" {
			fp.SensorID = "fix"
		}
		switch m := f.GetMeasurement().(type) {
		case *pb.Fix_Pose:
			fp.XM, fp.YM = m.Pose.GetXM(), m.Pose.GetYM()
		case *pb.Fix_Position:
			fp.XM, fp.YM = m.Position.GetXM(), m.Position.GetYM()
		default:
			fp.XM, fp.YM = math.NaN(), math.NaN()
		}
		a.run.Fixes = append(a.run.Fixes, fp)
		if resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
			a.fixAt[resp.GetSequence()] = len(a.run.Fixes) - 1
		} else {
			a.fixVerdict(&a.run.Fixes[len(a.run.Fixes)-1], resp.GetVerdict(), resp.GetNis(), resp.GetReason())
		}
	}
	if h := s.GetHeading(); h != nil && resp.GetVerdict() == pb.Verdict_VERDICT_APPLIED && resp.GetNis() > 0 {
		a.run.NIS["imu"] = append(a.run.NIS["imu"], NISPoint{h.GetStampNs(), resp.GetNis(), 1})
	}
	for _, r := range resp.GetResolved() {
		if i, ok := a.fixAt[r.GetSequence()]; ok {
			delete(a.fixAt, r.GetSequence())
			a.run.Fixes[i].Verdict = r.GetVerdict()
			a.fixVerdict(&a.run.Fixes[i], r.GetVerdict(), r.GetNis(), r.GetReason())
		}
	}
	for _, e := range resp.GetEvents() {
		switch e.GetKind() {
		case pb.EventKind_EVENT_KIND_SLIP_SUSPECTED:
			sum.Slips++
		case pb.EventKind_EVENT_KIND_MOVE_RECOVERED:
			sum.Recoveries = append(sum.Recoveries, Interval{e.GetStampNs(), e.GetStampNs(), e.GetDetail()})
		case pb.EventKind_EVENT_KIND_TRUST_LOST:
			if !a.lost {
				a.lost, a.lostAt = true, e.GetStampNs()
			}
			a.lostWhy = e.GetDetail()
		case pb.EventKind_EVENT_KIND_TRUST_REGAINED:
			if a.lost {
				sum.Distrust = append(sum.Distrust, Interval{a.lostAt, e.GetStampNs(), a.lostWhy})
				a.lost = false
			}
		}
	}
}

func (a *accumulator) fixVerdict(fp *FixPoint, v pb.Verdict, nis float64, reason string) {
	sum := &a.run.Summary
	sum.Fixes[convert.VerdictName(v)]++
	if reason != "" {
		r := reason
		if i := strings.Index(r, ": "); i > 0 && (v == pb.Verdict_VERDICT_INVALID || v == pb.Verdict_VERDICT_TOO_OLD) {
			r = r[:i]
		}
		sum.Reasons[r]++
	}
	if v == pb.Verdict_VERDICT_GATED {
		sum.Reasons["gated by NIS"]++
	}
	if (v == pb.Verdict_VERDICT_APPLIED || v == pb.Verdict_VERDICT_GATED) && nis > 0 {
		a.run.NIS[fp.SensorID] = append(a.run.NIS[fp.SensorID], NISPoint{fp.StampNs, nis, fp.Dim})
	}
}

func (a *accumulator) finish(fr *fusion.Robot) {
	sum := &a.run.Summary
	if a.lost {
		sum.Distrust = append(sum.Distrust, Interval{a.lostAt, fr.NewestNs(), a.lostWhy + " (until the end)"})
	}
	sum.Sensors = convert.StatsToProto(fr.Stats()).GetSensors()
	// Held fixes that never resolved.
	sum.Fixes["held"] += len(a.fixAt)
}

// Label is the name a run gets in reports and export file names unless
// Source.Label says otherwise: the robot's id, or the samples file's name.
func Label(src Source) string {
	if src.JournalDir != "" {
		if id, err := journal.ID(src.Robot); err == nil {
			return id
		}
		return src.Robot
	}
	return strings.TrimSuffix(filepath.Base(src.Samples), filepath.Ext(src.Samples))
}

func sampleStamp(s *pb.Sample) int64 {
	switch v := s.GetSample().(type) {
	case *pb.Sample_Odometry:
		return v.Odometry.GetStampNs()
	case *pb.Sample_Heading:
		return v.Heading.GetStampNs()
	case *pb.Sample_Fix:
		return v.Fix.GetStampNs()
	case *pb.Sample_Reseed:
		return v.Reseed.GetStampNs()
	}
	return 0
}

var csvHeader = []string{"stamp_ns", "x_m", "y_m", "heading_rad", "cov_xx_m2", "cov_xy_m2", "cov_xh_m_rad", "cov_yy_m2", "cov_yh_m_rad", "cov_hh_rad2", "position95_m", "imu_offset_rad", "imu_offset_var_rad2"}

// appendRow appends one CSV row of the track (numbers only: no quoting).
func appendRow(b []byte, stamp int64, s *estimator.State) []byte {
	b = strconv.AppendInt(b, stamp, 10)
	for _, v := range [...]float64{s.MeanAt(0), s.MeanAt(1), s.MeanAt(2), s.At(0, 0), s.At(0, 1), s.At(0, 2), s.At(1, 1), s.At(1, 2), s.At(2, 2), s.Position95()} {
		b = append(b, ',')
		b = strconv.AppendFloat(b, v, 'g', -1, 64)
	}
	b = append(b, ',')
	if s.Size() == 4 {
		b = strconv.AppendFloat(b, s.MeanAt(3), 'g', -1, 64)
		b = append(b, ',')
		b = strconv.AppendFloat(b, s.At(3, 3), 'g', -1, 64)
	} else {
		b = append(b, ',')
	}
	return append(b, '\n')
}

// nees3 is the pose NEES of s against the truth, NaN if its covariance is
// not positive definite.
func nees3(s *estimator.State, tr estimator.Pose) float64 {
	var c [9]float64
	s.PoseCovarianceInto(&c)
	q, err := estimator.PoseNEES(s.Pose(), &c, tr)
	if err != nil {
		return math.NaN()
	}
	return q
}

// tracks walks the steps and smoothed states forwards: the CSV exports, the
// decimated series, the distance, the uncertainty figures and, with a truth
// file, the errors.
func (a *accumulator) tracks(steps *stepStore, sm *stateStore, truthPath, outDir string, maxPoints int) error {
	run, sum := a.run, &a.run.Summary
	run.SmoothedCSV = strings.TrimSuffix(run.FilteredCSV, "-filtered.csv") + "-smoothed.csv"
	fs, err := os.Create(run.SmoothedCSV)
	if err != nil {
		return err
	}
	defer fs.Close()
	ws := bufio.NewWriterSize(fs, 1<<20)
	ws.WriteString(strings.Join(csvHeader, ",") + "\n")
	var row []byte
	var truth *truthReader
	if truthPath != "" {
		tr, f, err := openTruth(truthPath)
		if err != nil {
			return fmt.Errorf("truth: %w", err)
		}
		defer f.Close()
		truth = tr
	}
	n := steps.Len()
	every := max(1, (n+maxPoints-1)/maxPoints)
	var st fusion.Step
	var smoothed estimator.State
	var fSq, sSq, fNees, sNees float64
	var fAll, sAll []float64
	var nTruth, nNees int
	var prevX, prevY float64
	for i := 0; i < n; i++ {
		if err := steps.read(i, &st, false); err != nil {
			return err
		}
		if err := sm.get(i, &smoothed); err != nil {
			return err
		}
		p := &st.Post
		if i > 0 && !st.Start {
			sum.DistanceM += math.Hypot(p.MeanAt(0)-prevX, p.MeanAt(1)-prevY)
		}
		prevX, prevY = p.MeanAt(0), p.MeanAt(1)
		if r95 := p.Position95(); r95 > sum.Max95M {
			sum.Max95M, sum.Max95AtNs = r95, st.StampNs
		}
		sum.Final95M = p.Position95()
		hs := math.Sqrt(p.Var(2))
		sum.MaxHeadingStd = max(sum.MaxHeadingStd, hs)
		sum.FinalHeadingSt = hs
		row = appendRow(row[:0], st.StampNs, &smoothed)
		ws.Write(row)
		var tp estimator.Pose
		haveTruth := false
		if truth != nil {
			tp, haveTruth = truth.at(st.StampNs)
		}
		if haveTruth {
			fSq += sq(p.MeanAt(0)-tp.X) + sq(p.MeanAt(1)-tp.Y)
			sSq += sq(smoothed.MeanAt(0)-tp.X) + sq(smoothed.MeanAt(1)-tp.Y)
			nTruth++
			if fn, sn := nees3(p, tp), nees3(&smoothed, tp); !math.IsNaN(fn) && !math.IsNaN(sn) {
				fNees += fn
				sNees += sn
				nNees++
				fAll, sAll = append(fAll, fn), append(sAll, sn)
			}
		}
		if i%every == 0 || i == n-1 {
			run.Filtered = append(run.Filtered, Point{st.StampNs, *p})
			run.Smoothed = append(run.Smoothed, Point{st.StampNs, smoothed})
			if haveTruth {
				run.Truth = append(run.Truth, tp)
			}
		}
	}
	if err := ws.Flush(); err != nil {
		return err
	}
	if nTruth > 0 {
		sum.HasTruth = true
		sum.FilteredRMSM, sum.SmoothedRMSM = math.Sqrt(fSq/float64(nTruth)), math.Sqrt(sSq/float64(nTruth))
		if nNees > 0 {
			sum.FilteredNEES, sum.SmoothedNEES = fNees/float64(nNees), sNees/float64(nNees)
			sort.Float64s(fAll)
			sort.Float64s(sAll)
			sum.FilteredNEESMedian, sum.SmoothedNEESMedian = fAll[len(fAll)/2], sAll[len(sAll)/2]
		}
	}
	for k, v := range run.NIS {
		if len(v) > maxPoints {
			step := (len(v) + maxPoints - 1) / maxPoints
			var d []NISPoint
			for i := 0; i < len(v); i += step {
				d = append(d, v[i])
			}
			run.NIS[k] = d
		}
	}
	return nil
}

func sq(v float64) float64 { return v * v }
