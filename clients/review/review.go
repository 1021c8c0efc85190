// Package review turns a recorded run (a robot's journal, or a robot
// configuration and a JSON Lines file of samples) into a review: the
// filtered and the Rauch-Tung-Striebel smoothed tracks with covariance as
// CSV, a plain-text summary, and an HTML report with figures that opens
// without a network. Steps and smoothed states are kept on disk, so an hour
// at 200 Hz fits in little memory.
package review

import (
	"bufio"
	"bytes"
	"context"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"slices"
	"sort"
	"strconv"
	"strings"

	"gonum.org/v1/gonum/stat/distuv"

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
	// Run selects one run of the robot (its number, from 1: a controller
	// restart begins the next; DEVELOPERS.md, "Design: Runs"); 0 reviews
	// run 1, and the summary notes the runs left out. Each run has its own
	// clock, so a review covers one.
	Run uint64
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
	// MemoryBytes bounds the steps kept in memory during the replay
	// (32 MiB, about 6,800 steps: 23 s of a cart with 200 Hz odometry, its
	// IMU and fixes, which makes 300 steps a second);
	// past it they go to a file in TempDir (compact records), which the
	// smoother and the report's pass read in chunks. The journal's reader
	// holds a segment (up to 64 MiB) besides, and the collector lets the
	// heap grow to about twice what is live: 32 MiB keeps an hour's review
	// under 256 MiB. The smoothed states, of which the review keeps the
	// numbers of their export rows (96 bytes a step), stay in memory up to
	// four times MemoryBytes (1.4 million steps, 78 minutes of that cart;
	// the replay's memory is given back first), and go to a file in TempDir
	// past it.
	MemoryBytes int64
	// FromNs and ToNs limit the review to a stretch of the run, in
	// nanoseconds from the run's start (the stamp of its first input). The
	// run is replayed from its start all the same, so that the estimate at
	// FromNs is the one the robot had; only the stretch is summarised,
	// exported and drawn. FromNs 0 means the whole run, inputs stamped
	// before its first included; ToNs 0 means the end.
	FromNs, ToNs int64
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
	// Verdict is the final verdict: a held fix's resolution once it came.
	Verdict pb.Verdict
	NIS     float64
	Reason  string
}

// NISPoint is one NIS value.
type NISPoint struct {
	StampNs int64
	NIS     float64
	Dim     int
	// Refused is set for an input the gate refused.
	Refused bool
}

// Interval is a stretch of time.
type Interval struct {
	FromNs, ToNs int64
	Detail       string
}

// Summary holds the figures of a run.
type Summary struct {
	// RunStartNs is the stamp of the run's first input, from which
	// Options.FromNs and ToNs and the report's time axes count; StartNs
	// and EndNs bound the inputs reviewed.
	RunStartNs     int64
	StartNs, EndNs int64
	Inputs         int
	DistanceM      float64
	Fixes          map[string]int // by verdict
	Reasons        map[string]int // refusal reasons
	// Estimates counts the run's estimates reviewed (its steps: one at
	// each odometry stamp); without one the uncertainty figures below
	// are not numbers of the run and the summary says so.
	Estimates      int
	Max95M         float64
	Max95AtNs      int64
	Final95M       float64
	MaxHeadingStd  float64
	FinalHeadingSt float64
	Sensors        []*pb.SensorConsistency
	Slips          int
	// SlipsAt holds the stamps of the first 1000 slips suspected.
	SlipsAt    []int64
	Recoveries []Interval
	Distrust   []Interval
	// InputGaps are stretches of more than a second without an input.
	InputGaps []Interval
	// RefusedStretches are runs of three or more fixes of one sensor
	// refused in a row (Detail names the sensor and the count).
	RefusedStretches []Interval
	Truncated        string
	// Damaged names the journal's damaged byte ranges ("" when none),
	// also those that cost no input.
	Damaged string
	// Run is the run reviewed, of Runs in the recording; RunNote says
	// which runs were left out ("" when there is only one).
	Run, Runs uint64
	RunNote   string
	// Gaps lists the journal's continuity breaks (inputs or segments
	// missing); the review goes on past each. GapsAt holds the stamp of
	// the newest input before each.
	Gaps     []string
	GapsAt   []int64
	HasTruth bool
	// Markers is the map check, with landmark blocks in the configuration
	// (landmark_position_std_m): how many markers the blocks carried
	// (MarkersSeen) and, most significant first, those whose offset from
	// the map the recording shows beyond its 99% region (MarkersOff).
	MarkersSeen int
	MarkersOff  []fusion.LandmarkOffset
	// Markers holds every marker's joined offset, in the order of first
	// visit.
	Markers []fusion.LandmarkOffset
	// TruthMatched counts the estimate's steps the truth was interpolated
	// to, of TruthSteps steps; TruthMaxGapNs is the largest gap between
	// the two truth rows used for one of them.
	TruthMatched, TruthSteps int
	TruthMaxGapNs            int64
	FilteredRMSM             float64
	SmoothedRMSM             float64
	FilteredNEES             float64
	SmoothedNEES             float64
	// Medians resist the few points right after the robot was moved.
	FilteredNEESMedian, SmoothedNEESMedian float64
	// FilteredInside95 and SmoothedInside95 are the fractions of the steps
	// with truth whose true position lies inside the estimate's 95%
	// region: its position NEES (2 degrees of freedom) at most the
	// chi-square 95% quantile, 5.99 (Bar-Shalom, Li and Kirubarajan 2001,
	// sec. 5.4.2; gonum distuv). A consistent filter has about 0.95.
	FilteredInside95, SmoothedInside95 float64
}

// Run is a reviewed run.
type Run struct {
	Label    string
	Robot    string
	Config   fusion.Config
	Summary  Summary
	Filtered []Point // decimated for figures
	Smoothed []Point
	// Truth is the truth at the stamps of Filtered (NaN where it has
	// none), when the review had a truth file.
	Truth []estimator.Pose
	Fixes []FixPoint
	NIS   map[string][]NISPoint
	// FilteredCSV and SmoothedCSV are the exports written, and FixesCSV
	// (every fix with its final verdict).
	FilteredCSV, SmoothedCSV, FixesCSV string
	// MarkersCSV is the map check's export (every marker the landmark
	// blocks carried, its offset and a corrected position), "" without
	// landmark blocks.
	MarkersCSV string
}

// truthReader reads a truth CSV forwards and interpolates it to stamps
// in increasing order. Lines without a quote or a carriage return (but for
// one before the newline) are split at their commas as encoding/csv would
// split them, at a third of its cost; at the first other line, the rest of
// the file is read with encoding/csv.
//
// The first record may be a header (its stamp is no integer); every other
// must be a row of four or more fields: an integer stamp after the row
// before's and three finite numbers. At the first that is not, the reader
// ends as at the end of the file and err says what was wrong and where.
type truthReader struct {
	br                 *bufio.Reader
	r                  *csv.Reader // from the first line that needs it on
	fields             [][]byte
	prev, next         truthRow
	havePrev, haveNext bool
	// lines counts the lines split here; csvBase those before the line
	// handed to encoding/csv; line is the line of the last record; records
	// counts the records.
	lines, csvBase, line, records int
	rows                          int
	err                           error
}

type truthRow struct {
	stamp int64
	pose  estimator.Pose
}

func openTruth(path string) (*truthReader, *os.File, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, nil, err
	}
	return newTruthReader(f), f, nil
}

func newTruthReader(r io.Reader) *truthReader {
	tr := &truthReader{br: bufio.NewReaderSize(r, 64<<10)}
	tr.advance()
	return tr
}

// record returns the next record's fields, as encoding/csv (fields may
// vary in number) would give them, or false at the end or at an error.
func (t *truthReader) record() ([][]byte, bool) {
	for t.r == nil {
		line, err := t.br.ReadSlice('\n')
		if err == bufio.ErrBufferFull {
			// A line longer than the buffer: encoding/csv from here.
			t.useCSV(line, t.lines)
			break
		}
		if err != nil && len(line) == 0 {
			if !errors.Is(err, io.EOF) {
				t.err = err // a directory, say
			}
			return nil, false
		}
		t.lines++
		t.line = t.lines
		body := bytes.TrimSuffix(line, []byte{'\n'})
		body = bytes.TrimSuffix(body, []byte{'\r'})
		if bytes.IndexByte(body, '"') >= 0 || bytes.IndexByte(body, '\r') >= 0 {
			t.useCSV(line, t.lines-1)
			break
		}
		if len(body) == 0 {
			continue // encoding/csv skips empty lines
		}
		t.fields = t.fields[:0]
		for {
			i := bytes.IndexByte(body, ',')
			if i < 0 {
				break
			}
			t.fields = append(t.fields, body[:i])
			body = body[i+1:]
		}
		return append(t.fields, body), true
	}
	rec, err := t.r.Read()
	if errors.Is(err, io.EOF) {
		return nil, false
	}
	if err != nil {
		var pe *csv.ParseError
		if errors.As(err, &pe) {
			// Its lines count from the line handed to encoding/csv.
			pe.StartLine += t.csvBase
			pe.Line += t.csvBase
		}
		t.err = err
		return nil, false
	}
	t.line, _ = t.r.FieldPos(0)
	t.line += t.csvBase
	t.fields = t.fields[:0]
	for _, f := range rec {
		t.fields = append(t.fields, []byte(f))
	}
	return t.fields, true
}

// useCSV reads the rest of the file, from line on, with encoding/csv.
// csvBase is the number of lines before line.
func (t *truthReader) useCSV(line []byte, csvBase int) {
	t.csvBase = csvBase
	t.r = csv.NewReader(io.MultiReader(bytes.NewReader(bytes.Clone(line)), t.br))
	t.r.ReuseRecord = true
	t.r.FieldsPerRecord = -1
}

// advance moves next to prev and reads the next row.
func (t *truthReader) advance() {
	if t.haveNext {
		t.prev, t.havePrev = t.next, true
	}
	t.haveNext = false
	for t.err == nil {
		rec, ok := t.record()
		if !ok {
			return
		}
		t.records++
		if t.records == 1 {
			rec[0] = bytes.TrimPrefix(rec[0], []byte("\xef\xbb\xbf"))
		}
		stamp, err := strconv.ParseInt(string(rec[0]), 10, 64)
		if err != nil && t.records == 1 {
			continue // the header
		}
		if err != nil {
			t.err = fmt.Errorf("line %d: stamp_ns %q is not an integer (nanoseconds)", t.line, rec[0])
			return
		}
		if len(rec) < 4 {
			t.err = fmt.Errorf("line %d: %d fields, want stamp_ns,x_m,y_m,heading_rad", t.line, len(rec))
			return
		}
		var v [3]float64
		for i, name := range []string{"x_m", "y_m", "heading_rad"} {
			if v[i], err = strconv.ParseFloat(string(rec[i+1]), 64); err != nil || math.IsNaN(v[i]) || math.IsInf(v[i], 0) {
				t.err = fmt.Errorf("line %d: %s %q is not a finite number", t.line, name, rec[i+1])
				return
			}
		}
		if t.rows > 0 && stamp <= t.next.stamp {
			t.err = fmt.Errorf("line %d: stamp_ns %d is not after the row before's %d: the rows must be in time order", t.line, stamp, t.next.stamp)
			return
		}
		t.rows++
		t.next, t.haveNext = truthRow{stamp, estimator.Pose{X: v[0], Y: v[1], Heading: v[2]}}, true
		return
	}
}

// at returns the truth at stamp, interpolated linearly in x, y and the
// wrapped heading difference between the two rows that bracket it, and the
// gap between those rows (0 for an exact match); ok is false outside the
// truth's span. Stamps must not decrease from call to call.
func (t *truthReader) at(stamp int64) (p estimator.Pose, gapNs int64, ok bool) {
	for t.haveNext && t.next.stamp < stamp {
		t.advance()
	}
	switch {
	case t.haveNext && t.next.stamp == stamp:
		return t.next.pose, 0, true
	case t.havePrev && t.prev.stamp == stamp:
		return t.prev.pose, 0, true
	case !t.haveNext || !t.havePrev:
		return p, 0, false
	}
	a, b := t.prev, t.next
	f := float64(stamp-a.stamp) / float64(b.stamp-a.stamp)
	p.X = a.pose.X + f*(b.pose.X-a.pose.X)
	p.Y = a.pose.Y + f*(b.pose.Y-a.pose.Y)
	p.Heading = wrap(a.pose.Heading + f*wrap(b.pose.Heading-a.pose.Heading))
	return p, b.stamp - a.stamp, true
}

// wrap returns the angle in [-pi, pi).
func wrap(a float64) float64 {
	a = math.Mod(a+math.Pi, 2*math.Pi)
	if a < 0 {
		a += 2 * math.Pi
	}
	return a - math.Pi
}

// Analyze replays a recorded run with the smoother and writes the track
// exports into outDir as <label>-filtered.csv and <label>-smoothed.csv.
func Analyze(src Source, outDir string, opt Options) (*Run, error) {
	return AnalyzeContext(context.Background(), src, outDir, opt)
}

// AnalyzeContext is Analyze stopping once ctx is done, with its error:
// the replay at its next input, the smoother and the walk of the smoothed
// track at their next run of steps. Exports it began are left in outDir
// as they are: the caller removes them (reckon review writes into a
// staging directory that it removes).
func AnalyzeContext(ctx context.Context, src Source, outDir string, opt Options) (*Run, error) {
	if opt.MaxPoints <= 0 {
		opt.MaxPoints = 4000
	}
	if opt.MemoryBytes <= 0 {
		opt.MemoryBytes = 32 << 20
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
	walk, err := newFilteredWalk(run, src.Truth, opt.TempDir)
	if err != nil {
		return nil, err
	}
	defer walk.close()
	fw := newStepWriter(steps, run.FilteredCSV, walk)
	defer fw.close()
	a := &accumulator{run: run, fixAt: map[uint64]int{}, nis: map[string]*nisSeries{}, maxPoints: opt.MaxPoints}
	rc := &recorder{run: run, a: a, fw: fw, progress: opt.Progress, fromNs: opt.FromNs, toNs: opt.ToNs, keep: true, want: max(src.Run, 1)}
	// An input refused leaves no export of a track behind.
	discard := func(err error) (*Run, error) {
		fw.close()
		os.Remove(run.FilteredCSV)
		return nil, err
	}
	fr, err := rc.replay(ctx, src)
	if err != nil {
		return discard(err)
	}
	if err := rc.runs(fr, src.Run); err != nil {
		return discard(err)
	}
	if (opt.FromNs > 0 || opt.ToNs > 0) && run.Summary.Inputs == 0 {
		return discard(EmptyStretch(opt.FromNs, opt.ToNs, rc.endNewestNs-run.Summary.RunStartNs))
	}
	rc.add(fr, true, fr.Run() == rc.want)
	run.Summary.markers(fr.FinishLandmarkOffsets())
	if err := fw.close(); err != nil {
		return nil, err
	}
	if err := walk.truthErr(); err != nil {
		return nil, err
	}
	run.Config = fr.Config()
	if run.Summary.MarkersSeen > 0 {
		run.MarkersCSV = filepath.Join(outDir, run.Label+"-markers.csv")
		if err := writeMarkers(run.MarkersCSV, &run.Config, run.Summary.Markers); err != nil {
			return nil, err
		}
	}
	rc.a.finish(rc.ending(fr))
	// The fixes are final now: their export is written while the smoother
	// runs.
	run.FixesCSV = filepath.Join(outDir, run.Label+"-fixes.csv")
	fixesDone := make(chan error, 1)
	go func() { fixesDone <- writeFixes(run.FixesCSV, run.Fixes) }()
	err = smoothAndTrack(ctx, rc.a, steps, walk, src.Truth, opt)
	if ferr := <-fixesDone; err == nil {
		err = ferr
	}
	if err != nil {
		return nil, err
	}
	run.Fixes = thinFixes(run.Fixes, opt.MaxPoints)
	return run, nil
}

// smoothAndTrack smooths the steps and walks the smoothed track forwards.
func smoothAndTrack(ctx context.Context, a *accumulator, steps *stepStore, walk *filteredWalk, truth string, opt Options) error {
	every := thinEvery(steps.Len(), opt.MaxPoints)
	smoothed, err := smooth(ctx, steps, opt.TempDir, every, rowBudget(opt.MemoryBytes))
	if err != nil {
		return err
	}
	defer smoothed.close()
	return a.tracks(ctx, smoothed, walk, truth)
}

// thinEvery returns the stride of the tracks' points drawn: every
// every-th step of n, and the last, for about maxPoints.
func thinEvery(n, maxPoints int) int { return max(1, (n+maxPoints-1)/maxPoints) }

// rowBudget is the memory the smoothed rows may take (smoothedRows): by
// the time the smoother runs, the journal's segment and the steps kept in
// memory during the replay are garbage, and the rows are kept outside the
// heap, so that they cost their size once.
func rowBudget(memoryBytes int64) int64 { return 4 * memoryBytes }

// smooth runs the smoother over the steps into a store of its own, which
// keeps whole the states at every every-th step.
func smooth(ctx context.Context, steps *stepStore, tempDir string, every int, budget int64) (*smoothedRows, error) {
	k := estimator.MaxStates
	if steps.onDisk() {
		k = steps.file.k
	}
	smoothed, err := newSmoothedRows(tempDir, steps.Len(), k, every, budget)
	if err != nil {
		return nil, err
	}
	src := prefetchSteps(ctx, steps, every)
	err = fusion.Smooth(src, smoothed)
	src.p.close()
	// The steps are read: their file goes now, before the walk writes the
	// smoothed track's export, whose pages the system then takes from
	// those it just freed (on a virtual machine, pages the system has not
	// touched for a while cost several times more to fill).
	steps.close()
	smoothed.filtered = src.posts
	if err != nil {
		smoothed.close()
		return nil, err
	}
	if err := smoothed.flush(); err != nil {
		smoothed.close()
		return nil, err
	}
	return smoothed, nil
}

// stepWriter stores the steps, and writes the filtered track's export,
// in a goroutine of its own while the replay goes on. The replay fills
// batches of steps and hands them over; the writer hands them back empty
// for reuse, so that an hour's 720,000 steps of 3.7 kB cost no garbage.
// The replay's robot keeps its core busy, where the writer's has time to
// spare: when no other batch waits, the writer works out the smoother's
// gains of the batch's steps as well (estimator.RTSGain, which needs only
// the filtered steps) and stores them with the steps on disk, for the
// smoother to take instead of working them out (an hour's take about 0.6
// s of CPU).
type stepWriter struct {
	full    chan []fusion.Step
	pool    *batchPool[fusion.Step]
	written chan error
	closed  bool
	err     error
}

// writerGains tells the step writer whether to work out the gains of the
// batch it takes, with queued batches waiting behind it: when none waits.
var writerGains = func(queued int) bool { return queued == 0 }

// stepBatch is the number of steps handed over at once (0.9 MB at 12
// states); a batch has room for a quarter more, since an input may hand out
// several steps when the batch is nearly full.
const stepBatch = 256

func newStepWriter(steps *stepStore, trackPath string, walk *filteredWalk) *stepWriter {
	// Four batches at most: one being filled, two sent, one being written.
	fw := &stepWriter{full: make(chan []fusion.Step, 2), pool: newBatchPool[fusion.Step](4, stepBatch+stepBatch/4), written: make(chan error, 1)}
	go func() {
		tw, err := newTrackWriter(trackPath)
		// prev is the step stored last, in the batch or, for the first of
		// a batch, copied from the batch before.
		var prev *estimator.State
		var last estimator.State
		var gain gainMatrix
		for b := range fw.full {
			gains := steps.onDisk() && writerGains(len(fw.full))
			for i := range b {
				if err == nil {
					var g *gainMatrix
					if s := &b[i]; gains && prev != nil && !s.Start && prev.Size() == s.Pred.Size() && estimator.RTSGain(&gain, prev, &s.Pred, &s.F) == nil {
						g = &gain
					}
					err = steps.add(&b[i], g)
					prev = &b[i].Post
				}
				if err == nil {
					row := rowOf(b[i].StampNs, &b[i].Post)
					err = tw.addRow(&row)
					walk.step(&b[i], &row)
				}
			}
			if prev != nil {
				copyState(&last, prev)
				prev = &last
			}
			fw.pool.put(b)
		}
		if err == nil {
			err = steps.flush()
		}
		if cerr := tw.close(); err == nil {
			err = cerr
		}
		fw.written <- err
	}()
	return fw
}

// batch returns the first batch to fill.
func (fw *stepWriter) batch() []fusion.Step {
	b, _ := fw.pool.get(nil)
	return b
}

// close waits for the writer to finish and returns its error; it may be
// called again.
func (fw *stepWriter) close() error {
	if !fw.closed {
		fw.closed = true
		close(fw.full)
		fw.err = <-fw.written
	}
	return fw.err
}

// recorder runs the inputs of a recorded run through a robot and gathers
// the summary and the steps.
type recorder struct {
	run      *Run
	a        *accumulator
	fw       *stepWriter
	progress func(inputs int)
	// fromNs and toNs are Options.FromNs and ToNs; seen counts the inputs.
	fromNs, toNs int64
	seen         int
	// keep is add's keep for the steps the robot holds, pending of them
	// (the others came with the input being taken).
	keep    bool
	pending int
	// want is the run reviewed; last is the robot's run before the input
	// being taken, the run whose steps that input hands out.
	want, last uint64
	// The robot's statistics (which go on over its life) when the run
	// reviewed began and, once a run start ended it, when it ended, with
	// its newest odometry then.
	startStats, endStats fusion.Stats
	ended                bool
	endNewestNs          int64
	// With a stretch (fromNs, toNs), stretch adds up what each input of
	// the run stamped inside it added to the sensors' records (a held
	// fix's verdict counts with the input that resolved it); prevStats
	// are the statistics after the run's input before.
	stretch   []fusion.SensorStats
	prevStats fusion.Stats
}

// add takes the steps that became final with the input just taken (all of
// them when finish is set), keeps those inside the stretch reviewed when
// they are of the run reviewed (keep) and none otherwise, and hands them
// over in batches. The steps stay in the robot's buffer until a batch is
// full, the replay is done or keep changes; the robot then fills an empty
// batch while the full one goes to the writer, so that no step is copied
// on the way.
func (rc *recorder) add(fr *fusion.Robot, finish, keep bool) {
	n := fr.ReadySteps()
	if !finish && keep == rc.keep && n < stepBatch {
		rc.pending = n
		return
	}
	var b []fusion.Step
	if finish {
		b = fr.FinishSteps()
	} else {
		b = fr.SwapSteps(rc.fw.batch())
	}
	// The first rc.pending steps came with inputs taken as rc.keep says,
	// the others with this one.
	kept := 0
	for i := range b {
		k := keep
		if i < rc.pending {
			k = rc.keep
		}
		if !k || !rc.a.in(b[i].StampNs) {
			continue
		}
		if kept != i {
			b[kept] = b[i]
		}
		kept++
	}
	rc.keep, rc.pending = keep, 0
	switch {
	case kept > 0:
		rc.fw.full <- b[:kept]
	case b != nil:
		rc.fw.pool.put(b)
	}
}

// ending returns the newest odometry and the sensors' statistics of the
// run reviewed: its own, without those of the runs before or after it.
func (rc *recorder) ending(fr *fusion.Robot) (int64, []fusion.SensorStats) {
	end, newest := fr.Stats(), fr.NewestNs()
	if rc.ended {
		end, newest = rc.endStats, rc.endNewestNs
	}
	if rc.fromNs > 0 || rc.toNs > 0 {
		return newest, rc.stretch
	}
	return newest, sensorDelta(end, rc.startStats)
}

// sensorDelta returns the sensors' records in end less those in start,
// leaving out the sensors without a verdict between them.
func sensorDelta(end, start fusion.Stats) []fusion.SensorStats {
	before := map[string]fusion.SensorStats{}
	for _, s := range start.Sensors {
		before[s.ID] = s
	}
	var out []fusion.SensorStats
	for _, s := range end.Sensors {
		b := before[s.ID]
		c, d := &s.VerdictCounts, &b.VerdictCounts
		c.Applied, c.Held, c.Gated, c.TooOld, c.Invalid = c.Applied-d.Applied, c.Held-d.Held, c.Gated-d.Gated, c.TooOld-d.TooOld, c.Invalid-d.Invalid
		s.NISSum, s.DOFSum = s.NISSum-b.NISSum, s.DOFSum-b.DOFSum
		if s.VerdictCounts != (fusion.VerdictCounts{}) {
			out = append(out, s)
		}
	}
	return out
}

// addSensors adds the records d to sum, sensor by sensor, in the order
// the sensors first appear.
func addSensors(sum, d []fusion.SensorStats) []fusion.SensorStats {
	for _, s := range d {
		i := slices.IndexFunc(sum, func(x fusion.SensorStats) bool { return x.ID == s.ID })
		if i < 0 {
			sum = append(sum, s)
			continue
		}
		c, e := &sum[i].VerdictCounts, &s.VerdictCounts
		c.Applied, c.Held, c.Gated, c.TooOld, c.Invalid = c.Applied+e.Applied, c.Held+e.Held, c.Gated+e.Gated, c.TooOld+e.TooOld, c.Invalid+e.Invalid
		sum[i].NISSum += s.NISSum
		sum[i].DOFSum += s.DOFSum
	}
	return sum
}

// runs notes which run was reviewed of how many, and refuses a run the
// recording does not hold.
func (rc *recorder) runs(fr *fusion.Robot, asked uint64) error {
	sum := &rc.run.Summary
	sum.Run, sum.Runs = rc.want, fr.Run()
	if rc.want > fr.Run() {
		return NoRun(rc.want, fr.Run())
	}
	if fr.Run() > 1 {
		sum.RunNote = fmt.Sprintf("this report covers run %d of the %d runs recorded (a controller restart begins a run, on a clock of its own); review another with -run N", rc.want, fr.Run())
		if asked == 0 {
			sum.RunNote += " (run 1 is the default)"
		}
	}
	return nil
}

// NoRun is the journal.ErrNoRun of run want asked of a recording that
// holds runs 1 to runs.
func NoRun(want, runs uint64) error {
	return fmt.Errorf("%w: run %d asked for; the recording holds runs 1 to %d", journal.ErrNoRun, want, runs)
}

// ErrEmptyStretch is returned when no input of the run is stamped inside
// the stretch asked for (Options.FromNs, ToNs).
var ErrEmptyStretch = errors.New("an empty stretch")

// EmptyStretch is the ErrEmptyStretch of the stretch from fromNs to toNs
// (0: the end) after the run's start, of a run whose inputs reach lastNs
// after it.
func EmptyStretch(fromNs, toNs, lastNs int64) error {
	to := "its end"
	if toNs > 0 {
		to = fmt.Sprintf("%.3f s", secs(toNs))
	}
	return fmt.Errorf("%w: no input is stamped from %.3f s to %s after the run's start; the inputs reach %.3f s", ErrEmptyStretch, secs(fromNs), to, secs(lastNs))
}

// ErrTruth is wrapped by the errors of a truth file that is not a time
// ordered table of stamp_ns,x_m,y_m,heading_rad rows.
var ErrTruth = errors.New("truth file")

// replay replays the source and returns the robot after its last input.
func (rc *recorder) replay(ctx context.Context, src Source) (*fusion.Robot, error) {
	switch {
	case src.JournalDir != "":
		return rc.replayJournal(ctx, src)
	case src.Samples != "":
		return rc.replaySamples(ctx, src)
	}
	return nil, errors.New("review needs a journal or a samples file")
}

// opened readies a new robot: its configuration, and its steps kept.
func (rc *recorder) opened(fr *fusion.Robot) {
	rc.run.Config = fr.Config()
	fr.CollectSteps()
	fr.CollectLandmarkOffsets()
	fr.SwapSteps(rc.fw.batch())
	rc.last = fr.Run()
}

// took records one input the robot was given and its response: an input
// of the run reviewed, or one outside it, whose steps (a run start hands
// out the ended run's last ones) and resolutions may still be of that run.
func (rc *recorder) took(fr *fusion.Robot, s *pb.Sample, resp *pb.IngestResponse) {
	stepsOf := rc.last
	rc.last = fr.Run()
	if fr.Run() != stepsOf {
		// A run start: it ends the run before (its held inputs resolved)
		// and begins this one.
		if stepsOf == rc.want {
			rc.endStats, rc.ended = fr.Stats(), true
		}
		if fr.Run() == rc.want {
			rc.startStats = fr.Stats()
		}
	}
	if fr.Run() == rc.want {
		rc.endNewestNs = fr.NewestNs()
	}
	if fr.Run() != rc.want || s.GetRunStart() != nil {
		rc.add(fr, false, stepsOf == rc.want)
		rc.a.resolve(resp)
		return
	}
	if rc.seen == 0 {
		// The run's start is its first input's stamp.
		start := convert.SampleStamp(s)
		rc.run.Summary.RunStartNs = start
		rc.a.fromNs, rc.a.toNs = start+rc.fromNs, math.MaxInt64
		if rc.fromNs == 0 {
			// Inputs stamped before the first (a late fix that arrived
			// first) belong to the run too.
			rc.a.fromNs = math.MinInt64
		}
		if rc.toNs > 0 {
			rc.a.toNs = start + rc.toNs
		}
	}
	if rc.fromNs > 0 || rc.toNs > 0 {
		if rc.seen == 0 {
			rc.prevStats = rc.startStats
		}
		cur := fr.Stats()
		if rc.a.in(convert.SampleStamp(s)) {
			rc.stretch = addSensors(rc.stretch, sensorDelta(cur, rc.prevStats))
		}
		rc.prevStats = cur
	}
	rc.seen++
	rc.a.input(s, resp)
	rc.add(fr, false, true)
	if rc.progress != nil && rc.seen%10000 == 0 {
		rc.progress(rc.seen)
	}
}

func (rc *recorder) replayJournal(ctx context.Context, src Source) (*fusion.Robot, error) {
	id := robotID(src.Robot)
	rc.run.Robot = "robots/" + id
	var gaps []string
	fr, scan, err := journal.Replay(src.JournalDir, id, journal.ReplayOptions{Config: src.Override, SkipOutputs: true, ReadOnly: true,
		Gap: func(err error) error {
			gaps = append(gaps, err.Error())
			rc.run.Summary.GapsAt = append(rc.run.Summary.GapsAt, rc.a.newest)
			return nil
		},
		Opened: func(fr *fusion.Robot) error {
			rc.opened(fr)
			return nil
		},
		Input: func(r *journal.Replayed) error {
			if err := ctx.Err(); err != nil {
				return err
			}
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
	if note := scan.DamageNote(); note != "" {
		rc.run.Summary.Damaged = note + "; the review read every intact record around it"
	}
	return fr, nil
}

func (rc *recorder) replaySamples(ctx context.Context, src Source) (*fusion.Robot, error) {
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
	for n := 0; ; n++ {
		if err := ctx.Err(); err != nil {
			return nil, err
		}
		s, err := sr.Next()
		switch {
		case errors.Is(err, io.EOF) && n == 0:
			return nil, fmt.Errorf("%s: %w: no samples", src.Samples, convert.ErrJSONL)
		case errors.Is(err, io.EOF):
			return fr, nil
		case err != nil && n == 0:
			// Nothing to review: not a samples file, or not yet one.
			return nil, fmt.Errorf("%s: %w", src.Samples, err)
		case err != nil:
			rc.run.Summary.Truncated = fmt.Sprintf("the samples file stops being readable: %v; this report covers the %d samples before it", err, rc.run.Summary.Inputs)
			return fr, nil
		}
		resp, _ := convert.Take(fr, s, 0)
		rc.took(fr, s, resp)
	}
}

// robotID returns the id of a robot given by id or by name ("robots/{id}").
func robotID(robot string) string { return strings.TrimPrefix(robot, "robots/") }

// longGapNs is the shortest stretch without an input that the review
// reports as a gap.
const longGapNs = 1e9

// accumulator gathers the summary while inputs are replayed.
type accumulator struct {
	run       *Run
	fixAt     map[uint64]int // held fix sequence -> index in run.Fixes
	nis       map[string]*nisSeries
	maxPoints int
	lostAt    int64
	lostWhy   string
	lost      bool
	// newest is the newest input stamp so far; fromNs and toNs bound the
	// stretch reviewed (absolute stamps).
	newest, fromNs, toNs int64
}

func (a *accumulator) in(stamp int64) bool { return stamp >= a.fromNs && stamp <= a.toNs }

// resolve gives the held fixes that resp resolves their final verdict.
func (a *accumulator) resolve(resp *pb.IngestResponse) {
	for _, r := range resp.GetResolved() {
		if i, ok := a.fixAt[r.GetSequence()]; ok {
			delete(a.fixAt, r.GetSequence())
			a.fixVerdict(&a.run.Fixes[i], r.GetVerdict(), r.GetNis(), r.GetRefusal(), r.GetReason())
		}
	}
}

// nisSeries keeps a bounded, evenly thinned series as it grows: past twice
// its bound it drops every other point and keeps one in twice as many from
// then on.
type nisSeries struct {
	pts    []NISPoint
	stride int
	seen   int
}

func (ns *nisSeries) add(p NISPoint, bound int) {
	if ns.stride == 0 {
		ns.stride = 1
	}
	if ns.seen%ns.stride == 0 || p.Refused {
		ns.pts = append(ns.pts, p)
		if len(ns.pts) >= 2*bound {
			kept := ns.pts[:0]
			for i, q := range ns.pts {
				if i%2 == 0 || q.Refused {
					kept = append(kept, q)
				}
			}
			ns.pts = kept
			ns.stride *= 2
		}
	}
	ns.seen++
}

func (a *accumulator) addNIS(sensor string, p NISPoint) {
	ns := a.nis[sensor]
	if ns == nil {
		ns = &nisSeries{}
		a.nis[sensor] = ns
	}
	ns.add(p, a.maxPoints)
}

func (a *accumulator) input(s *pb.Sample, resp *pb.IngestResponse) {
	sum := &a.run.Summary
	stamp := convert.SampleStamp(s)
	a.resolve(resp)
	if !a.in(stamp) {
		a.newest = max(a.newest, stamp)
		return
	}
	sum.Inputs++
	if sum.Inputs == 1 || stamp < sum.StartNs {
		sum.StartNs = stamp
	}
	sum.EndNs = max(sum.EndNs, stamp)
	if sum.Inputs > 1 && stamp-a.newest > longGapNs {
		sum.InputGaps = append(sum.InputGaps, Interval{a.newest, stamp, fmt.Sprintf("no input for %.1f s", secs(stamp-a.newest))})
	}
	a.newest = max(a.newest, stamp)
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
			a.fixVerdict(&a.run.Fixes[len(a.run.Fixes)-1], resp.GetVerdict(), resp.GetNis(), resp.GetRefusal(), resp.GetReason())
		}
	}
	if h := s.GetHeading(); h != nil && resp.GetNis() > 0 {
		switch resp.GetVerdict() {
		case pb.Verdict_VERDICT_APPLIED:
			a.addNIS("imu", NISPoint{h.GetStampNs(), resp.GetNis(), 1, false})
		case pb.Verdict_VERDICT_GATED:
			a.addNIS("imu", NISPoint{h.GetStampNs(), resp.GetNis(), 1, true})
		}
	}
	for _, e := range resp.GetEvents() {
		if !a.in(e.GetStampNs()) {
			continue
		}
		switch e.GetKind() {
		case pb.EventKind_EVENT_KIND_SLIP_SUSPECTED:
			sum.Slips++
			if len(sum.SlipsAt) < 1000 {
				sum.SlipsAt = append(sum.SlipsAt, e.GetStampNs())
			}
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

// fixVerdict records a fix's final verdict; refusals are grouped by their
// value (refusal), the text (reason) is kept for the fixes' export.
func (a *accumulator) fixVerdict(fp *FixPoint, v pb.Verdict, nis float64, refusal pb.Refusal, reason string) {
	sum := &a.run.Summary
	fp.Verdict, fp.NIS, fp.Reason = v, nis, reason
	sum.Fixes[convert.VerdictName(v)]++
	switch {
	case refusal != pb.Refusal_REFUSAL_UNSPECIFIED:
		sum.Reasons[convert.RefusalName(refusal)]++
	case v == pb.Verdict_VERDICT_GATED:
		sum.Reasons["gated"]++
	}
	if (v == pb.Verdict_VERDICT_APPLIED || v == pb.Verdict_VERDICT_GATED) && nis > 0 {
		a.addNIS(fp.SensorID, NISPoint{fp.StampNs, nis, fp.Dim, v == pb.Verdict_VERDICT_GATED})
	}
}

// finish completes the summary at the end of the run reviewed: its newest
// odometry and its sensors' statistics.
func (a *accumulator) finish(newestNs int64, sensors []fusion.SensorStats) {
	sum := &a.run.Summary
	if a.lost {
		end := newestNs
		if a.toNs < end {
			end = a.toNs
		}
		sum.Distrust = append(sum.Distrust, Interval{a.lostAt, end, a.lostWhy + " (until the end)"})
	}
	sum.Sensors = convert.StatsToProto(fusion.Stats{Sensors: sensors}).GetSensors()
	// Held fixes that never resolved.
	sum.Fixes["held"] += len(a.fixAt)
	for id, ns := range a.nis {
		sort.Slice(ns.pts, func(i, j int) bool { return ns.pts[i].StampNs < ns.pts[j].StampNs })
		a.run.NIS[id] = ns.pts
	}
	sum.RefusedStretches = refusedStretches(a.run.Fixes)
}

// refusedStretches finds runs of three or more fixes of one sensor refused
// in a row (in stamp order; held fixes that never resolved break no run).
func refusedStretches(fixes []FixPoint) []Interval {
	idx := make([]int, len(fixes))
	for i := range idx {
		idx[i] = i
	}
	sort.SliceStable(idx, func(i, j int) bool {
		a, b := &fixes[idx[i]], &fixes[idx[j]]
		if a.SensorID != b.SensorID {
			return a.SensorID < b.SensorID
		}
		return a.StampNs < b.StampNs
	})
	var out []Interval
	run := 0
	flush := func(end int) {
		if run >= 3 {
			first, last := &fixes[idx[end-run]], &fixes[idx[end-1]]
			out = append(out, Interval{first.StampNs, last.StampNs, fmt.Sprintf("%d fixes of %s refused in a row", run, first.SensorID)})
		}
		run = 0
	}
	for k, i := range idx {
		if k > 0 && fixes[idx[k-1]].SensorID != fixes[i].SensorID {
			flush(k)
		}
		switch fixes[i].Verdict {
		case pb.Verdict_VERDICT_APPLIED:
			flush(k)
		case pb.Verdict_VERDICT_HELD:
		default:
			run++
		}
	}
	flush(len(idx))
	sort.Slice(out, func(i, j int) bool { return out[i].FromNs < out[j].FromNs })
	return out
}

// writeFixes writes every fix with its final verdict as CSV.
func writeFixes(path string, fixes []FixPoint) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	w := csv.NewWriter(f)
	w.Write([]string{"stamp_ns", "sensor_id", "x_m", "y_m", "verdict", "nis", "reason"})
	for _, fp := range fixes {
		w.Write([]string{strconv.FormatInt(fp.StampNs, 10), fp.SensorID, strconv.FormatFloat(fp.XM, 'g', -1, 64), strconv.FormatFloat(fp.YM, 'g', -1, 64),
			convert.VerdictName(fp.Verdict), strconv.FormatFloat(fp.NIS, 'g', -1, 64), fp.Reason})
	}
	w.Flush()
	err = w.Error()
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	return err
}

// thinFixes thins the accepted fixes kept for the figures evenly to about
// bound, and keeps every refused one.
func thinFixes(fixes []FixPoint, bound int) []FixPoint {
	if len(fixes) <= bound {
		return fixes
	}
	step := (len(fixes) + bound - 1) / bound
	var out []FixPoint
	for i, fp := range fixes {
		if i%step == 0 || fp.Verdict != pb.Verdict_VERDICT_APPLIED {
			out = append(out, fp)
		}
	}
	return out
}

// Label is the name a run gets in reports and export file names unless
// Source.Label says otherwise: the robot's id, or the samples file's name
// without its extension (both of a .jsonl.gz), with "-run{N}" when
// Source.Run selects a run.
func Label(src Source) string {
	base := strings.TrimSuffix(filepath.Base(src.Samples), ".gz")
	label := strings.TrimSuffix(base, filepath.Ext(base))
	if src.JournalDir != "" {
		label = robotID(src.Robot)
	}
	if src.Run > 0 {
		label += fmt.Sprintf("-run%d", src.Run)
	}
	return label
}

// nees3 is the pose NEES of s against the truth, NaN if its covariance is
// not positive definite.
func nees3(s *estimator.State, tr estimator.Pose) float64 {
	var c [9]float64
	s.PoseCovarianceInto(&c)
	return neesOf(s.Pose(), &c, tr)
}

// neesOf is the pose NEES of a pose with covariance c (row-major) against
// the truth, NaN if c is not positive definite.
func neesOf(p estimator.Pose, c *[9]float64, tr estimator.Pose) float64 {
	q, err := estimator.PoseNEES(p, c, tr)
	if err != nil {
		return math.NaN()
	}
	return q
}

// filteredWalk walks the filtered states forwards as the step writer
// stores them during the replay, where the robot's goroutine is the
// bottleneck and the writer's core has room: the distance, the
// uncertainty figures and, with a truth file, the filtered errors, and for
// the walk after the smoother each step's stamp and filtered pose NEES
// (in chunks: an hour's take 12 MB). It writes those fields of the run
// and nothing else until the step writer is closed.
type filteredWalk struct {
	run       *Run
	truth     *truthReader
	truthPath string
	// tape keeps the truth at each step's stamp for the walk after the
	// smoother, which reads it instead of the truth file (parsing the
	// file's numbers is most of the cost of reading it).
	tape   *truthTape
	f      *os.File
	n      int
	stamps [][]int64
	nees   [][]float64
	prevX  float64
	prevY  float64
	fSq    float64
	fIn    int
	nTruth int
}

// walkChunk is the number of steps of a chunk of the walk's stamps and
// NEES.
const walkChunk = 1 << 14

func newFilteredWalk(run *Run, truthPath, tempDir string) (*filteredWalk, error) {
	w := &filteredWalk{run: run}
	if truthPath != "" {
		tr, f, err := openTruth(truthPath)
		if err != nil {
			return nil, fmt.Errorf("truth: %w", err)
		}
		w.truth, w.f, w.truthPath = tr, f, truthPath
		w.tape = newTruthTape(tempDir)
	}
	return w, nil
}

// truthErr returns what was wrong with the truth file, as far as the walk
// read it: a row that is not one, or no row at all.
func (w *filteredWalk) truthErr() error {
	switch {
	case w.truth == nil:
		return nil
	case w.truth.err != nil:
		return fmt.Errorf("%w %s: %w", ErrTruth, w.truthPath, w.truth.err)
	case w.truth.rows == 0:
		return fmt.Errorf("%w %s: no rows (stamp_ns,x_m,y_m,heading_rad)", ErrTruth, w.truthPath)
	}
	return nil
}

func (w *filteredWalk) close() {
	if w.f != nil {
		w.f.Close()
	}
	w.tape.close()
}

// stamp returns the stamp of step i; nees its filtered pose NEES (with
// truth at its stamp).
func (w *filteredWalk) stamp(i int) int64   { return w.stamps[i/walkChunk][i%walkChunk] }
func (w *filteredWalk) nees3(i int) float64 { return w.nees[i/walkChunk][i%walkChunk] }

// step takes the next step stored, with its filtered export row.
func (w *filteredWalk) step(s *fusion.Step, row *trackRow) {
	sum := &w.run.Summary
	p, stamp, i := &s.Post, s.StampNs, w.n
	w.n++
	if i%walkChunk == 0 {
		w.stamps = append(w.stamps, make([]int64, 0, walkChunk))
		w.nees = append(w.nees, make([]float64, 0, walkChunk))
	}
	c := len(w.stamps) - 1
	w.stamps[c] = append(w.stamps[c], stamp)
	if i > 0 && !s.Start {
		sum.DistanceM += math.Hypot(p.MeanAt(0)-w.prevX, p.MeanAt(1)-w.prevY)
	}
	w.prevX, w.prevY = p.MeanAt(0), p.MeanAt(1)
	r95 := row.v[9] // p.Position95()
	if r95 > sum.Max95M {
		sum.Max95M, sum.Max95AtNs = r95, stamp
	}
	sum.Final95M = r95
	sum.Estimates = w.n
	hs := math.Sqrt(p.Var(2))
	sum.MaxHeadingStd = max(sum.MaxHeadingStd, hs)
	sum.FinalHeadingSt = hs
	nees := math.NaN()
	var tp estimator.Pose
	var haveTruth bool
	if w.truth != nil {
		var gapNs int64
		tp, gapNs, haveTruth = w.truth.at(stamp)
		sum.TruthSteps++
		if haveTruth {
			sum.TruthMatched++
			sum.TruthMaxGapNs = max(sum.TruthMaxGapNs, gapNs)
			w.fSq += sq(p.MeanAt(0)-tp.X) + sq(p.MeanAt(1)-tp.Y)
			w.nTruth++
			if positionNEES(p, tp) <= position95 {
				w.fIn++
			}
			nees = nees3(p, tp)
		}
	}
	w.nees[c] = append(w.nees[c], nees)
	w.tape.add(&tp, haveTruth)
}

// tracks walks the smoothed states forwards once the smoother and the
// filtered walk are done: the smoothed track's export, its decimated
// series and, with a truth file, the smoothed errors.
func (a *accumulator) tracks(ctx context.Context, sm *smoothedRows, fw *filteredWalk, truthPath string) error {
	run, sum := a.run, &a.run.Summary
	run.SmoothedCSV = strings.TrimSuffix(run.FilteredCSV, "-filtered.csv") + "-smoothed.csv"
	// The smoothed track's rows are formatted and written by a goroutine
	// of their own.
	rows := newRowWriter(run.SmoothedCSV)
	defer rows.close()
	// The truth at each step: from the filtered walk's tape, or read
	// again if the tape could not be kept.
	var truth truthSource
	if truthPath != "" {
		if tr, err := fw.tape.reader(fw.n); err == nil {
			truth = tr
		} else {
			tr, f, err := openTruth(truthPath)
			if err != nil {
				return fmt.Errorf("truth: %w", err)
			}
			defer f.Close()
			truth = tr
		}
	}
	n := fw.n
	every := sm.every
	pf := prefetchTrack(ctx, sm, fw, truth)
	defer pf.close()
	var sSq, fNees, sNees float64
	var fAll, sAll logHistogram
	var nNees, sIn int
	for i := 0; i < n; i++ {
		it, err := pf.at(i)
		if err != nil {
			return err
		}
		srow, stamp := &it.smoothed, it.stampNs
		srow.stampNs = stamp
		rows.addRow(srow)
		if tp := it.truth; it.haveTruth {
			sSq += sq(srow.v[0]-tp.X) + sq(srow.v[1]-tp.Y)
			if rowPositionNEES(srow, tp) <= position95 {
				sIn++
			}
			if fn, sn := fw.nees3(i), it.nees; !math.IsNaN(fn) && !math.IsNaN(sn) {
				fNees += fn
				sNees += sn
				nNees++
				fAll.add(fn)
				sAll.add(sn)
			}
		}
		if i%every == 0 || i == n-1 {
			run.Filtered = append(run.Filtered, Point{stamp, *sm.filtered[i]})
			run.Smoothed = append(run.Smoothed, Point{stamp, *sm.state(i)})
			if truth != nil {
				tp := it.truth
				if !it.haveTruth {
					tp = estimator.Pose{X: math.NaN(), Y: math.NaN(), Heading: math.NaN()}
				}
				run.Truth = append(run.Truth, tp)
			}
		}
	}
	if err := rows.close(); err != nil {
		return err
	}
	if nTruth := fw.nTruth; nTruth > 0 {
		sum.HasTruth = true
		sum.FilteredRMSM, sum.SmoothedRMSM = math.Sqrt(fw.fSq/float64(nTruth)), math.Sqrt(sSq/float64(nTruth))
		sum.FilteredInside95, sum.SmoothedInside95 = float64(fw.fIn)/float64(nTruth), float64(sIn)/float64(nTruth)
		if nNees > 0 {
			sum.FilteredNEES, sum.SmoothedNEES = fNees/float64(nNees), sNees/float64(nNees)
			sum.FilteredNEESMedian, sum.SmoothedNEESMedian = fAll.median(), sAll.median()
		}
	}
	return nil
}

func sq(v float64) float64 { return v * v }

// position95 is the chi-square quantile of 2 degrees of freedom at 0.95,
// the boundary of a position's 95% region in its NEES (gonum distuv).
var position95 = distuv.ChiSquared{K: 2}.Quantile(0.95)

// positionNEES is the NEES of the true position tr under the state's
// position mean and 2x2 covariance; +Inf when that covariance is not
// positive definite.
func positionNEES(s *estimator.State, tr estimator.Pose) float64 {
	var c [9]float64
	s.PoseCovarianceInto(&c)
	return nees2(c[0], c[1], c[4], tr.X-s.MeanAt(0), tr.Y-s.MeanAt(1))
}

// rowPositionNEES is positionNEES for a track row (the covariance's upper
// entries).
func rowPositionNEES(r *trackRow, tr estimator.Pose) float64 {
	return nees2(r.v[3], r.v[4], r.v[6], tr.X-r.v[0], tr.Y-r.v[1])
}

// nees2 is e^T C^-1 e for C = [a b; b d], infinite when C is not positive
// definite.
func nees2(a, b, d, ex, ey float64) float64 {
	det := a*d - b*b
	if !(a > 0) || !(det > 0) {
		return math.Inf(1)
	}
	return (d*ex*ex - 2*b*ex*ey + a*ey*ey) / det
}

// logHistogram counts positive values in bins a thousandth wide on a log
// scale, for a median in bounded memory (within 0.05%). The bins of values
// from 6e-15 to 1.6e14 are counted in an array (a map cost a third of a
// second an hour), the others in a map.
type logHistogram struct {
	dense  []int // bin denseLo+i in dense[i]
	counts map[int32]int
	n      int
}

var logBin = math.Log1p(1e-3)

const (
	denseLo   = -1 << 15
	denseBins = 1 << 16
)

func (h *logHistogram) add(v float64) {
	k := int32(math.MinInt32)
	if v > 0 {
		k = int32(math.Floor(math.Log(v) / logBin))
	}
	h.n++
	if d := int(k) - denseLo; d >= 0 && d < denseBins {
		if h.dense == nil {
			h.dense = make([]int, denseBins)
		}
		h.dense[d]++
		return
	}
	if h.counts == nil {
		h.counts = map[int32]int{}
	}
	h.counts[k]++
}

// median returns the middle of the bin that holds the value of rank n/2
// (counting from 0), as sort.Float64s(v)[len(v)/2] would pick it.
func (h *logHistogram) median() float64 {
	keys := make([]int32, 0, len(h.counts))
	for k := range h.counts {
		keys = append(keys, k)
	}
	sort.Slice(keys, func(i, j int) bool { return keys[i] < keys[j] })
	seen := 0
	found := func(count int) bool {
		seen += count
		return seen > h.n/2
	}
	mid := func(k int32) float64 {
		if k == math.MinInt32 {
			return 0
		}
		return math.Exp((float64(k) + 0.5) * logBin)
	}
	// The map's bins below the array's, the array's, the map's above.
	i := 0
	for ; i < len(keys) && keys[i] < denseLo; i++ {
		if found(h.counts[keys[i]]) {
			return mid(keys[i])
		}
	}
	for d, c := range h.dense {
		if c > 0 && found(c) {
			return mid(int32(d + denseLo))
		}
	}
	for ; i < len(keys); i++ {
		if found(h.counts[keys[i]]) {
			return mid(keys[i])
		}
	}
	return math.NaN()
}

// markerOffGate is the 99% quantile of the chi-square with 2 degrees of
// freedom (the estimator's gate): an offset beyond it is a marker off its
// map.
var markerOffGate, _ = estimator.GateThreshold(0.99, 2)

// offMap returns the squared Mahalanobis length of a marker's offset and
// whether it lies beyond markerOffGate.
func offMap(o *fusion.LandmarkOffset) (float64, bool) {
	q, ok := o.Mahalanobis(0, 0)
	return q, ok && q > markerOffGate
}

// markers sets the map check from the visits the robot's landmark blocks
// made (fusion.Robot.FinishLandmarkOffsets), every run of the recording
// replayed: the markers' offsets joined over their visits, and those
// beyond markerOffGate, most significant first.
func (s *Summary) markers(visits []fusion.LandmarkOffset) {
	offs := fusion.CombineOffsets(visits)
	s.MarkersSeen, s.Markers = len(offs), offs
	type scored struct {
		o fusion.LandmarkOffset
		q float64
	}
	var off []scored
	for _, o := range offs {
		if q, ok := offMap(&o); ok {
			off = append(off, scored{o, q})
		}
	}
	sort.SliceStable(off, func(i, j int) bool { return off[i].q > off[j].q })
	s.MarkersOff = s.MarkersOff[:0]
	for _, x := range off {
		s.MarkersOff = append(s.MarkersOff, x.o)
	}
}

// writeMarkers writes the map check's export: per marker its mapped
// position, the offset the recording shows with its standard deviations
// and correlation, the position corrected by it, and whether it lies
// beyond the 99% region (off_map).
func writeMarkers(path string, cfg *fusion.Config, offs []fusion.LandmarkOffset) error {
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	w := csv.NewWriter(f)
	w.Write([]string{"id", "mapped_x_m", "mapped_y_m", "offset_x_m", "offset_y_m", "sd_x_m", "sd_y_m", "corr_xy", "corrected_x_m", "corrected_y_m", "off_map"})
	at := map[string]fusion.Landmark{}
	for _, l := range cfg.Landmarks {
		at[l.ID] = l
	}
	num := func(v float64) string { return strconv.FormatFloat(v, 'f', 4, 64) }
	for _, o := range offs {
		l := at[o.ID]
		sx, sy := math.Sqrt(o.Cov[0]), math.Sqrt(o.Cov[3])
		_, off := offMap(&o)
		w.Write([]string{o.ID, num(l.XM), num(l.YM), num(o.DXM), num(o.DYM), num(sx), num(sy), num(o.Cov[1] / (sx * sy)),
			num(l.XM + o.DXM), num(l.YM + o.DYM), strconv.FormatBool(off)})
	}
	w.Flush()
	if err := w.Error(); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}
