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
	// Gaps lists the journal's continuity breaks (inputs or segments
	// missing); the review goes on past each.
	Gaps         []string
	HasTruth     bool
	FilteredRMSM float64
	SmoothedRMSM float64
	FilteredNEES float64
	SmoothedNEES float64
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
	run := &Run{Label: src.Label, NIS: map[string][]NISPoint{}}
	if run.Label == "" {
		run.Label = Label(src)
	}
	run.Summary.Fixes, run.Summary.Reasons = map[string]int{}, map[string]int{}
	steps := newStepStore(opt.TempDir, opt.MemoryBytes)
	defer steps.close()
	if err := os.MkdirAll(outDir, 0o755); err != nil {
		return nil, err
	}
	run.FilteredCSV = filepath.Join(outDir, run.Label+"-filtered.csv")
	fw, err := newFilteredWriter(run.FilteredCSV, steps)
	if err != nil {
		return nil, err
	}
	defer fw.close()
	rc := &recorder{run: run, a: &accumulator{run: run, fixAt: map[uint64]int{}}, fw: fw, progress: opt.Progress}
	fr, err := rc.replay(src)
	if err != nil {
		return nil, err
	}
	fw.add(fr.FinishSteps(), true)
	if err := fw.close(); err != nil {
		return nil, err
	}
	run.Config = fr.Config()
	rc.a.finish(fr)
	smoothed, err := smooth(steps, opt.TempDir)
	if err != nil {
		return nil, err
	}
	defer smoothed.close()
	if err := rc.a.tracks(steps, smoothed, src.Truth, outDir, opt.MaxPoints); err != nil {
		return nil, err
	}
	return run, nil
}

// smooth runs the smoother over the steps into a state store of its own.
func smooth(steps *stepStore, tempDir string) (*stateStore, error) {
	k := 0
	if steps.onDisk() {
		k = steps.file.k
	}
	smoothed, err := newStateStore(tempDir, steps.Len(), k, steps.onDisk())
	if err != nil {
		return nil, err
	}
	if err := fusion.Smooth(steps, smoothed); err != nil {
		smoothed.close()
		return nil, err
	}
	if err := smoothed.flush(); err != nil {
		smoothed.close()
		return nil, err
	}
	return smoothed, nil
}

// filteredWriter stores the steps and writes the filtered track in a
// goroutine of its own, while the replay goes on.
type filteredWriter struct {
	batches chan []fusion.Step
	written chan error
	pending []fusion.Step
	closed  bool
	err     error
}

func newFilteredWriter(path string, steps *stepStore) (*filteredWriter, error) {
	f, err := os.Create(path)
	if err != nil {
		return nil, err
	}
	fw := &filteredWriter{batches: make(chan []fusion.Step, 64), written: make(chan error, 1)}
	go func() {
		err := writeSteps(f, steps, fw.batches)
		if cerr := f.Close(); err == nil {
			err = cerr
		}
		fw.written <- err
	}()
	return fw, nil
}

// writeSteps stores every step of the batches and writes it as a CSV row.
func writeSteps(f io.Writer, steps *stepStore, batches <-chan []fusion.Step) error {
	w := bufio.NewWriterSize(f, 1<<20)
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
	return err
}

// add queues steps, handing them over in batches of 4096 (or all at once
// when flush is set).
func (fw *filteredWriter) add(steps []fusion.Step, flush bool) {
	fw.pending = append(fw.pending, steps...)
	if len(fw.pending) >= 4096 || (flush && len(fw.pending) > 0) {
		fw.batches <- fw.pending
		fw.pending = nil
	}
}

// close waits for the writer to finish and returns its error; it may be
// called again.
func (fw *filteredWriter) close() error {
	if !fw.closed {
		fw.closed = true
		close(fw.batches)
		fw.err = <-fw.written
	}
	return fw.err
}

// recorder runs the inputs of a recorded run through a robot and gathers
// the summary and the steps.
type recorder struct {
	run      *Run
	a        *accumulator
	fw       *filteredWriter
	progress func(inputs int)
}

// replay replays the source and returns the robot after its last input.
func (rc *recorder) replay(src Source) (*fusion.Robot, error) {
	switch {
	case src.JournalDir != "":
		return rc.replayJournal(src)
	case src.Samples != "":
		return rc.replaySamples(src)
	}
	return nil, errors.New("review needs a journal or a samples file")
}

// opened readies a new robot: its configuration, and its steps kept.
func (rc *recorder) opened(fr *fusion.Robot) {
	rc.run.Config = fr.Config()
	fr.CollectSteps()
}

// took records one input the robot was given and its response.
func (rc *recorder) took(fr *fusion.Robot, s *pb.Sample, resp *pb.IngestResponse) {
	rc.a.input(s, resp)
	rc.fw.add(fr.TakeSteps(), false)
	if rc.progress != nil && rc.run.Summary.Inputs%10000 == 0 {
		rc.progress(rc.run.Summary.Inputs)
	}
}

func (rc *recorder) replayJournal(src Source) (*fusion.Robot, error) {
	id := robotID(src.Robot)
	rc.run.Robot = "robots/" + id
	var gaps []string
	fr, scan, err := journal.Replay(src.JournalDir, id, journal.ReplayOptions{Config: src.Override, SkipOutputs: true, ReadOnly: true,
		Gap: func(err error) error {
			gaps = append(gaps, err.Error())
			return nil
		},
		Opened: func(fr *fusion.Robot) error {
			rc.opened(fr)
			return nil
		},
		Input: func(r *journal.Replayed) error {
			rc.took(r.Robot, r.Input.GetSample(), r.Response)
			return nil
		}})
	if err != nil && (fr == nil || !errors.Is(err, journal.ErrGap)) {
		return nil, err
	}
	if len(gaps) > 0 {
		rc.run.Summary.Gaps = gaps
	}
	if scan.Torn != nil {
		rc.run.Summary.Truncated = fmt.Sprintf("the journal is truncated: %v in %s; this report covers the %d inputs before it", scan.Torn, filepath.Base(scan.TornSegment), scan.Pairs)
	}
	return fr, nil
}

func (rc *recorder) replaySamples(src Source) (*fusion.Robot, error) {
	c := src.Config
	if src.Override != nil {
		c = src.Override
	}
	if c == nil {
		return nil, errors.New("review of samples needs a configuration")
	}
	rc.run.Robot = "robots/replay"
	cfg, err := convert.ConfigFromProto(c)
	if err != nil {
		return nil, err
	}
	fr, err := fusion.New(cfg)
	if err != nil {
		return nil, err
	}
	rc.opened(fr)
	f, err := os.Open(src.Samples)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	sr := convert.NewSampleReader(f)
	for {
		s, err := sr.Next()
		if errors.Is(err, io.EOF) {
			return fr, nil
		}
		if err != nil {
			rc.run.Summary.Truncated = fmt.Sprintf("the samples file stops being readable: %v; this report covers the %d samples before it", err, rc.run.Summary.Inputs)
			return fr, nil
		}
		resp, _ := convert.Take(fr, s, 0)
		rc.took(fr, s, resp)
	}
}

// robotID returns the id of a robot given by id or by name ("robots/{id}").
func robotID(robot string) string { return strings.TrimPrefix(robot, "robots/") }

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
			a.fixVerdict(&a.run.Fixes[len(a.run.Fixes)-1], resp.GetVerdict(), resp.GetNis(), resp.GetRefusal())
		}
	}
	if h := s.GetHeading(); h != nil && resp.GetVerdict() == pb.Verdict_VERDICT_APPLIED && resp.GetNis() > 0 {
		a.run.NIS["imu"] = append(a.run.NIS["imu"], NISPoint{h.GetStampNs(), resp.GetNis(), 1})
	}
	for _, r := range resp.GetResolved() {
		if i, ok := a.fixAt[r.GetSequence()]; ok {
			delete(a.fixAt, r.GetSequence())
			a.run.Fixes[i].Verdict = r.GetVerdict()
			a.fixVerdict(&a.run.Fixes[i], r.GetVerdict(), r.GetNis(), r.GetRefusal())
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

func (a *accumulator) fixVerdict(fp *FixPoint, v pb.Verdict, nis float64, refusal pb.Refusal) {
	sum := &a.run.Summary
	sum.Fixes[convert.VerdictName(v)]++
	switch {
	case refusal != pb.Refusal_REFUSAL_UNSPECIFIED:
		sum.Reasons[convert.RefusalName(refusal)]++
	case v == pb.Verdict_VERDICT_GATED:
		sum.Reasons["gated"]++
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
		return robotID(src.Robot)
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
