package fusion_test

import (
	"cmp"
	"errors"
	"flag"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"strconv"
	"strings"
	"testing"
	"time"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// The -rewrite flag is shared by every golden-file test of this test binary;
// whichever file initialises first defines it.
func init() {
	if flag.Lookup("rewrite") == nil {
		flag.Bool("rewrite", false, "rewrite the expected outputs in testdata")
	}
}

func rewriting() bool {
	f := flag.Lookup("rewrite")
	return f != nil && f.Value.String() == "true"
}

// TestScripts runs the robot scripts in testdata/scripts, in the manner of
// etcd-io/raft's interaction tests. A script is a sequence of commands, each
// followed by a line "----" and the output it must give, up to a blank line;
// lines starting with # are comments. With -rewrite
//
//	go test ./fusion -run TestScripts -args -rewrite
//
// the expected outputs are rewritten from what the robot gives. Times are
// Go durations on the robot's time base ("150ms"); lengths in metres,
// angles in radians; a covariance of n values is diagonal, of n*n values
// row-major. The commands:
//
//	robot NAME diff|diff-imu|steps [recovery=N] [window=DUR]  make a robot and use it
//	use NAME                                       send what follows to that robot
//	odometry T0 T1 step FORWARD LEFT TURN [imu=RAD]   a body step over [T0, T1]
//	odometry T0 T1 travel W1 W2 [imu=RAD]          each wheel's travel over [T0, T1]
//	heading T RAD [VAR]                            an absolute IMU heading
//	fix T pose X Y H cov C... [sensor=ID] [mount=X,Y,H]  (also position X Y, heading H;
//	                                               the sensor defaults to camera, beacon or compass by kind)
//	reseed T X Y H cov C...
//	pose | pose-at T | stats                       read the estimate or the statistics
//	mark LABEL | unchanged LABEL                   remember, then compare bit for bit
//	same-pose A B                                  compare two robots bit for bit
//
// An input prints its sequence number and verdict (and NIS), then its
// error, resolutions of held inputs and events, one a line.
func TestScripts(t *testing.T) {
	files, err := filepath.Glob(filepath.Join("testdata", "scripts", "*.txt"))
	if err != nil {
		t.Fatal(err)
	}
	if len(files) < 5 {
		t.Fatalf("found %d scripts in testdata/scripts", len(files))
	}
	for _, f := range files {
		t.Run(strings.TrimSuffix(filepath.Base(f), ".txt"), func(t *testing.T) { runScript(t, f) })
	}
}

// scriptCmd is one command of a script and the lines of its expected output
// (lines[from:to] of the file).
type scriptCmd struct {
	line     int // 1-based line of the command
	text     string
	from, to int
}

func parseScript(t *testing.T, lines []string) []scriptCmd {
	var cmds []scriptCmd
	for i := 0; i < len(lines); i++ {
		s := strings.TrimSpace(lines[i])
		if s == "" || strings.HasPrefix(s, "#") {
			continue
		}
		if i+1 >= len(lines) || lines[i+1] != "----" {
			t.Fatalf("line %d: %q is not followed by ----", i+1, s)
		}
		c := scriptCmd{line: i + 1, text: s, from: i + 2}
		j := c.from
		for j < len(lines) && lines[j] != "" {
			j++
		}
		c.to = j
		cmds = append(cmds, c)
		i = j
	}
	return cmds
}

func runScript(t *testing.T, path string) {
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimRight(string(data), "\n"), "\n")
	cmds := parseScript(t, lines)
	w := &world{robots: map[string]*fusion.Robot{}, marks: map[string]mark{}}
	var out []string // the rewritten file
	last := 0
	for _, c := range cmds {
		got, err := w.do(c.text)
		if err != nil {
			t.Fatalf("%s:%d: %s: %v", path, c.line, c.text, err)
		}
		want := lines[c.from:c.to]
		if rewriting() {
			out = append(append(out, lines[last:c.from]...), got...)
			last = c.to
			continue
		}
		if !reflect.DeepEqual(got, want) && !(len(got) == 0 && len(want) == 0) {
			t.Errorf("%s:%d: %s\n%s", path, c.line, c.text, lineDiff(want, got))
		}
	}
	if rewriting() {
		out = append(out, lines[last:]...)
		if err := os.WriteFile(path, []byte(strings.Join(out, "\n")+"\n"), 0o644); err != nil {
			t.Fatal(err)
		}
	}
}

// lineDiff shows want and got line by line: "  " same, "- " expected,
// "+ " given.
func lineDiff(want, got []string) string {
	var b strings.Builder
	for i := 0; i < max(len(want), len(got)); i++ {
		switch {
		case i < len(want) && i < len(got) && want[i] == got[i]:
			fmt.Fprintf(&b, "  %s\n", want[i])
		default:
			if i < len(want) {
				fmt.Fprintf(&b, "- %s\n", want[i])
			}
			if i < len(got) {
				fmt.Fprintf(&b, "+ %s\n", got[i])
			}
		}
	}
	return b.String()
}

// world is a script's robots, the one commands go to, and saved marks.
type world struct {
	robots map[string]*fusion.Robot
	cur    *fusion.Robot
	marks  map[string]mark
}

// mark is a robot's estimate and statistics at one point of a script.
type mark struct {
	pose  fusion.FusedPose
	stats fusion.Stats
	text  []string
}

func (w *world) do(cmd string) ([]string, error) {
	args, opts := splitArgs(cmd)
	name := args[0]
	args = args[1:]
	if name == "robot" {
		return w.newRobot(args, opts)
	}
	if w.cur == nil {
		return nil, errors.New("no robot yet")
	}
	switch name {
	case "use":
		return w.use(args)
	case "odometry":
		return w.odometry(args, opts)
	case "heading":
		return w.heading(args)
	case "fix":
		return w.fix(args, opts)
	case "reseed":
		return w.reseed(args)
	case "pose":
		return poseLines(w.cur.Pose()), nil
	case "pose-at":
		return w.poseAt(args)
	case "stats":
		return statsLines(w.cur.Stats()), nil
	case "mark":
		return w.mark(args)
	case "unchanged":
		return w.unchanged(args)
	case "same-pose":
		return w.samePose(args)
	}
	return nil, fmt.Errorf("unknown command %q", name)
}

// splitArgs splits a command into its words and its key=value options.
func splitArgs(cmd string) (args []string, opts map[string]string) {
	opts = map[string]string{}
	for _, f := range strings.Fields(cmd) {
		if k, v, ok := strings.Cut(f, "="); ok {
			opts[k] = v
		} else {
			args = append(args, f)
		}
	}
	return args, opts
}

// variants are the robots a script can make.
var variants = map[string]func() fusion.Config{
	// diff: a differential-drive cart, wheels 0.4 m apart, no side slip.
	"diff": func() fusion.Config {
		return fusion.Config{NoSideSlip: true, Wheels: []fusion.Wheel{{Name: "left", YM: 0.2}, {Name: "right", YM: -0.2}}}
	},
	// diff-imu: the same cart with an IMU whose heading is absolute.
	"diff-imu": func() fusion.Config {
		return fusion.Config{NoSideSlip: true, IMU: fusion.IMUAbsolute, Wheels: []fusion.Wheel{{Name: "left", YM: 0.2}, {Name: "right", YM: -0.2}}}
	},
	// steps: a robot whose controller sends body steps.
	"steps": func() fusion.Config { return fusion.Config{} },
}

// scriptSensors are every script robot's sensors: a fix without sensor=
// comes from the one of its kind.
var scriptSensors = []fusion.Sensor{
	{ID: "camera", Kind: fusion.FixPose},
	{ID: "beacon", Kind: fusion.FixPosition},
	{ID: "compass", Kind: fusion.FixHeading},
}

// robot NAME VARIANT [recovery=N] [window=DUR]
func (w *world) newRobot(args []string, opts map[string]string) ([]string, error) {
	if len(args) != 2 || variants[args[1]] == nil {
		return nil, errors.New("want: robot NAME diff|diff-imu|steps [recovery=N] [window=DUR]")
	}
	cfg := variants[args[1]]()
	cfg.Sensors = scriptSensors
	if v, ok := opts["recovery"]; ok {
		n, err := strconv.Atoi(v)
		if err != nil {
			return nil, err
		}
		cfg.Recovery = fusion.Recovery{Enabled: true, Count: n}
	}
	if v, ok := opts["window"]; ok {
		d, err := time.ParseDuration(v)
		if err != nil {
			return nil, err
		}
		cfg.WindowNs = d.Nanoseconds()
	}
	r, err := fusion.New(cfg)
	if err != nil {
		return []string{"error: " + err.Error()}, nil
	}
	w.robots[args[0]], w.cur = r, r
	return []string{fmt.Sprintf("robot %s: %d states", args[0], r.StateSize())}, nil
}

// use NAME
func (w *world) use(args []string) ([]string, error) {
	if len(args) != 1 || w.robots[args[0]] == nil {
		return nil, errors.New("want: use NAME (of a robot made before)")
	}
	w.cur = w.robots[args[0]]
	return nil, nil
}

// odometry T0 T1 step FORWARD LEFT TURN [imu=RAD]
// odometry T0 T1 travel W1 W2 ... [imu=RAD]
func (w *world) odometry(args []string, opts map[string]string) ([]string, error) {
	if len(args) < 4 {
		return nil, errors.New("want: odometry T0 T1 step|travel VALUES...")
	}
	t0, err0 := stamp(args[0])
	t1, err1 := stamp(args[1])
	vals, err2 := floats(args[3:])
	if err := errors.Join(err0, err1, err2); err != nil {
		return nil, err
	}
	o := fusion.Odometry{StartNs: t0, StampNs: t1}
	switch {
	case args[2] == "step" && len(vals) == 3:
		o.Step = &estimator.Step{ForwardM: vals[0], LeftM: vals[1], TurnRad: vals[2]}
	case args[2] == "travel":
		o.TravelM = vals
	default:
		return nil, errors.New("want: step FORWARD LEFT TURN or travel W1 W2 ...")
	}
	if v, ok := opts["imu"]; ok {
		h, err := strconv.ParseFloat(v, 64)
		if err != nil {
			return nil, err
		}
		o.IMUHeadingRad = &h
	}
	before := w.cur.Pose()
	return append(resultLines(w.cur.AddOdometry(o)), w.offsetLines(before, 0)...), nil
}

// heading T RAD [VAR]
func (w *world) heading(args []string) ([]string, error) {
	if len(args) < 2 || len(args) > 3 {
		return nil, errors.New("want: heading T RAD [VAR]")
	}
	t, err0 := stamp(args[0])
	v, err1 := floats(args[1:])
	if err := errors.Join(err0, err1); err != nil {
		return nil, err
	}
	h := fusion.Heading{StampNs: t, HeadingRad: v[0]}
	if len(v) == 2 {
		h.VarRad2 = v[1]
	}
	before := w.cur.Pose()
	return append(resultLines(w.cur.AddHeading(h)), w.offsetLines(before, h.VarRad2)...), nil
}

// offsetLines reports the IMU offset's initialisation, if the last input
// initialised it, with its variance against P_thth + R: the offset is
// o = z - theta, so by linear covariance propagation (common practice) its
// variance is the heading's variance before plus the reading's. The reading
// must be stamped at the newest odometry for "before" to be that heading's.
func (w *world) offsetLines(before fusion.FusedPose, r float64) []string {
	after := w.cur.Pose()
	if before.IMUOffsetReady || !after.IMUOffsetReady {
		return nil
	}
	if r == 0 {
		r = w.cur.Config().Noise.IMUHeadingVarRad2
	}
	sum := before.Cov[8] + r
	return []string{fmt.Sprintf("imu offset initialised: offset %.9f, variance %.6e; P_thth %.6e + R %.6e = %.6e (equal: %v)",
		after.IMUOffsetRad, after.IMUOffsetVarRad2, before.Cov[8], r, sum, after.IMUOffsetVarRad2 == sum)}
}

// fix T pose X Y H cov C... [sensor=ID] [mount=X,Y,H]
// fix T position X Y cov C... ; fix T heading H cov C...
// A covariance of n values is diagonal, of n*n values full.
func (w *world) fix(args []string, opts map[string]string) ([]string, error) {
	kinds := map[string]struct {
		kind fusion.FixKind
		dim  int
	}{"pose": {fusion.FixPose, 3}, "position": {fusion.FixPosition, 2}, "heading": {fusion.FixHeading, 1}}
	if len(args) < 2 {
		return nil, errors.New("want: fix T pose|position|heading VALUES cov VALUES")
	}
	k, ok := kinds[args[1]]
	if !ok || len(args) < 3+k.dim || args[2+k.dim] != "cov" {
		return nil, fmt.Errorf("want: fix T %s %d values cov VALUES", args[1], k.dim)
	}
	t, err0 := stamp(args[0])
	v, err1 := floats(args[2 : 2+k.dim])
	cov, err2 := covariance(args[3+k.dim:], k.dim)
	mount, err3 := floats(strings.Split(cmp.Or(opts["mount"], "0,0,0"), ","))
	if err := errors.Join(err0, err1, err2, err3); err != nil {
		return nil, err
	}
	if len(mount) != 3 {
		return nil, errors.New("want: mount=X,Y,H")
	}
	fx := fusion.Fix{StampNs: t, SensorID: opts["sensor"], Kind: k.kind, Cov: cov}
	if _, ok := opts["mount"]; ok {
		fx.Mount = &estimator.Pose{X: mount[0], Y: mount[1], Heading: mount[2]}
	}
	for _, s := range scriptSensors {
		if fx.SensorID == "" && s.Kind == k.kind {
			fx.SensorID = s.ID
		}
	}
	switch k.kind {
	case fusion.FixPose:
		fx.XM, fx.YM, fx.HeadingRad = v[0], v[1], v[2]
	case fusion.FixPosition:
		fx.XM, fx.YM = v[0], v[1]
	case fusion.FixHeading:
		fx.HeadingRad = v[0]
	}
	return resultLines(w.cur.AddFix(fx)), nil
}

// reseed T X Y H cov C...
func (w *world) reseed(args []string) ([]string, error) {
	if len(args) < 6 || args[4] != "cov" {
		return nil, errors.New("want: reseed T X Y H cov VALUES")
	}
	t, err0 := stamp(args[0])
	v, err1 := floats(args[1:4])
	cov, err2 := covariance(args[5:], 3)
	if err := errors.Join(err0, err1, err2); err != nil {
		return nil, err
	}
	return resultLines(w.cur.Reseed(t, estimator.Pose{X: v[0], Y: v[1], Heading: v[2]}, cov)), nil
}

// pose-at T
func (w *world) poseAt(args []string) ([]string, error) {
	if len(args) != 1 {
		return nil, errors.New("want: pose-at T")
	}
	t, err := stamp(args[0])
	if err != nil {
		return nil, err
	}
	p, err := w.cur.PoseAt(t)
	if err != nil {
		return []string{"error: " + err.Error()}, nil
	}
	return poseLines(p), nil
}

// mark LABEL: remember the robot's pose and statistics.
func (w *world) mark(args []string) ([]string, error) {
	if len(args) != 1 {
		return nil, errors.New("want: mark LABEL")
	}
	p, s := w.cur.Pose(), w.cur.Stats()
	w.marks[args[0]] = mark{pose: p, stats: s, text: append(poseLines(p), statsLines(s)...)}
	return nil, nil
}

// unchanged LABEL: compare the robot's pose and statistics, bit for bit,
// with the mark; a change is shown as the lines that differ.
func (w *world) unchanged(args []string) ([]string, error) {
	m, ok := w.marks[strings.Join(args, " ")]
	if len(args) != 1 || !ok {
		return nil, errors.New("want: unchanged LABEL (of a mark made before)")
	}
	p, s := w.cur.Pose(), w.cur.Stats()
	if p == m.pose && reflect.DeepEqual(s, m.stats) {
		return []string{"pose and statistics unchanged since " + args[0]}, nil
	}
	out := []string{"changed since " + args[0] + ":"}
	now := append(poseLines(p), statsLines(s)...)
	for i := range max(len(now), len(m.text)) {
		if i >= len(now) || i >= len(m.text) || now[i] != m.text[i] {
			if i < len(m.text) {
				out = append(out, "- "+m.text[i])
			}
			if i < len(now) {
				out = append(out, "+ "+now[i])
			}
		}
	}
	if len(out) == 1 {
		out = append(out, "(beyond the printed precision)")
	}
	return out, nil
}

// same-pose A B: compare two robots' estimates bit for bit.
func (w *world) samePose(args []string) ([]string, error) {
	if len(args) != 2 || w.robots[args[0]] == nil || w.robots[args[1]] == nil {
		return nil, errors.New("want: same-pose ROBOT ROBOT")
	}
	a, b := w.robots[args[0]].Pose(), w.robots[args[1]].Pose()
	if a == b {
		return []string{fmt.Sprintf("%s and %s: the same estimate, bit for bit", args[0], args[1])}, nil
	}
	d := max(math.Abs(a.Pose.X-b.Pose.X), math.Abs(a.Pose.Y-b.Pose.Y), math.Abs(a.Pose.Heading-b.Pose.Heading))
	for i := range a.Cov {
		d = max(d, math.Abs(a.Cov[i]-b.Cov[i]))
	}
	return []string{fmt.Sprintf("%s and %s differ: largest difference of pose or covariance %.1e", args[0], args[1], d)}, nil
}

// resultLines renders a Result: its sequence number and verdict, then
// each resolution, event and error on a line of its own.
func resultLines(res fusion.Result) []string {
	s := fmt.Sprintf("seq %d: %s", res.Seq, res.Verdict)
	if res.Dim > 0 {
		s += fmt.Sprintf(", nis %.6f (dim %d)", res.NIS, res.Dim)
	}
	out := []string{s}
	if res.Err != nil {
		out = append(out, "  error: "+res.Err.Error())
	}
	for _, r := range res.Resolved {
		s := fmt.Sprintf("resolved seq %d: %s, nis %.6f", r.Seq, r.Verdict, r.NIS)
		if r.Err != nil {
			s += ", error: " + r.Err.Error()
		}
		out = append(out, s)
	}
	for _, e := range res.Events {
		s := fmt.Sprintf("event %s at %v: value %.6g", e.Kind, time.Duration(e.StampNs), e.Value)
		if e.SensorID != "" {
			s += ", sensor " + e.SensorID
		}
		if e.Detail != "" {
			s += ", " + e.Detail
		}
		out = append(out, s)
	}
	return out
}

// poseLines renders an estimate: the pose to 1e-9 (m, rad), the
// covariance's upper triangle to 7 significant digits, the IMU offset,
// the velocity and the trust.
func poseLines(p fusion.FusedPose) []string {
	out := []string{
		fmt.Sprintf("pose at %v: x %.9f, y %.9f, heading %.9f", time.Duration(p.StampNs), p.Pose.X, p.Pose.Y, p.Pose.Heading),
		fmt.Sprintf("  cov xx %.6e xy %.6e xh %.6e yy %.6e yh %.6e hh %.6e", p.Cov[0], p.Cov[1], p.Cov[2], p.Cov[4], p.Cov[5], p.Cov[8]),
	}
	if p.IMUOffsetReady {
		out = append(out, fmt.Sprintf("  imu offset %.9f, variance %.6e", p.IMUOffsetRad, p.IMUOffsetVarRad2))
	}
	v := p.Velocity
	out = append(out, fmt.Sprintf("  velocity forward %.6f, left %.6f, turn %.6f", v.ForwardMPerS, v.LeftMPerS, v.TurnRadPerS))
	s := "  " + p.Distrust.String()
	if p.Extrapolated {
		s += ", extrapolated"
	}
	return append(out, s)
}

// statsLines renders the statistics, verdicts by their labels.
func statsLines(s fusion.Stats) []string {
	out := []string{
		"odometry " + countsLine(s.Odometry),
		"measurements " + countsLine(s.Measurements),
	}
	for _, ss := range s.Sensors {
		out = append(out, fmt.Sprintf("sensor %s %s, nis sum %.6f over %d dof, gate %g", ss.ID, countsLine(ss.VerdictCounts), ss.NISSum, ss.DOFSum, ss.GateProbability))
	}
	return append(out, fmt.Sprintf("slips %d, gaps %d, recoveries %d, %s, held %d, window %d",
		s.Slips, s.Gaps, s.Recoveries, s.Distrust, s.Held, s.WindowEntries))
}

func countsLine(c fusion.VerdictCounts) string {
	n := []uint64{c.Applied, c.Held, c.Gated, c.TooOld, c.Invalid}
	v := []fusion.Verdict{fusion.VerdictApplied, fusion.VerdictHeld, fusion.VerdictGated, fusion.VerdictTooOld, fusion.VerdictInvalid}
	parts := make([]string, len(v))
	for i := range v {
		parts[i] = fmt.Sprintf("%s %d", v[i], n[i])
	}
	return strings.Join(parts, ", ")
}

// stamp reads a time such as "150ms" or "1.2s" as nanoseconds.
func stamp(s string) (int64, error) {
	d, err := time.ParseDuration(s)
	return d.Nanoseconds(), err
}

func floats(ss []string) ([]float64, error) {
	v := make([]float64, len(ss))
	for i, s := range ss {
		var err error
		if v[i], err = strconv.ParseFloat(s, 64); err != nil {
			return nil, err
		}
	}
	return v, nil
}

// covariance reads n diagonal or n*n row-major values.
func covariance(ss []string, n int) ([]float64, error) {
	v, err := floats(ss)
	switch {
	case err != nil:
		return nil, err
	case len(v) == n*n:
		return v, nil
	case len(v) == n:
		c := make([]float64, n*n)
		for i := range n {
			c[i*n+i] = v[i]
		}
		return c, nil
	}
	return nil, fmt.Errorf("covariance: %d values, want %d or %d", len(v), n, n*n)
}
