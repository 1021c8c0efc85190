package main

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"time"

	"reckon.example/clients/client"
	"reckon.example/clients/review"
	"reckon.example/estimator"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/convert"
	"reckon.example/server/daemon"
)

func parseLayout(s string) (fusiontest.Layout, error) {
	for _, l := range []fusiontest.Layout{fusiontest.FreeWheelTurn, fusiontest.GyroTurn, fusiontest.DriveWheelTurn} {
		if l.String() == s {
			return l, nil
		}
	}
	return 0, fmt.Errorf("unknown layout %q (free-wheel-turn, gyro-turn, drive-wheel-turn)", s)
}

// demoView is what the watcher saw last, shared with the screen.
type demoView struct {
	mu       sync.Mutex // protects the fields below
	pose     *pb.FusedPose
	events   []string
	skipped  uint64
	verdicts map[string]int
	truth    map[int64]estimator.Pose // odometry stamps in the last seconds
	sumSq    float64
	n        int
	maxErr   float64
}

func (v *demoView) errAt(p *pb.FusedPose) (float64, bool) {
	t, ok := v.truth[p.GetStampNs()]
	if !ok {
		return 0, false
	}
	return math.Hypot(p.GetPose().GetXM()-t.X, p.GetPose().GetYM()-t.Y), true
}

// demoRobot is the name of the demo's robot.
const demoRobot = "robots/greenhouse-cart"

// runDemo runs the simulated greenhouse cart and its camera against a real
// service on loopback, shows the watched estimate and sums the run up.
func runDemo(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	opt, err := parseDemoFlags(args, stdout, stderr)
	if err != nil {
		return err
	}
	addr, pageAddr, stopServer, err := startDemoServer(opt.journal, opt.page)
	if err != nil {
		return err
	}
	defer stopServer()
	d, err := openDemo(ctx, addr, opt)
	if err != nil {
		return err
	}
	defer d.close()
	fmt.Fprintf(stdout, "reckon demo: greenhouse cart (%s) and camera feeding %s on %s; journal in %s\n", opt.layout, demoRobot, addr, opt.journal)
	if pageAddr != "" {
		fmt.Fprintf(stdout, "live view: http://%s/\n", pageAddr)
	}
	if !opt.live {
		fmt.Fprintf(stdout, "%7s %8s %8s %8s %7s %7s %7s %8s %7s  %s\n", "t_s", "x_m", "y_m", "head_deg", "sx_m", "sy_m", "sh_deg", "r95_m", "err_m", "trust")
	}
	if err := d.feed(ctx, stdout); err != nil {
		return err
	}
	if err := d.finish(); err != nil {
		return err
	}
	if err := d.summary(ctx, stdout); err != nil {
		return err
	}
	if err := stopServer(); err != nil {
		return err
	}
	fmt.Fprintf(stdout, "\nthe journal (and the simulator's truth.csv and the robot's configuration robot.yaml) is in %s; try:\n  reckon review -journal %s -robot greenhouse-cart\n", opt.journal, opt.journal)
	return nil
}

// demoOptions are the demo's settings, from its flags.
type demoOptions struct {
	layout   fusiontest.Layout
	seed     uint64
	duration float64 // simulated seconds
	speed    float64 // simulated seconds per wall second (0: as fast as possible)
	outliers float64 // fraction of wrong camera fixes
	bumpAtS  float64 // when the cart is lifted aside (0: never)
	lateS    float64 // how long after capture the camera stamps its fixes, unknown to the configuration
	markers  bool
	journal  string
	page     string  // the live view page's address ("": none)
	live     bool    // redraw the screen rather than print lines
	everyS   float64 // simulated seconds between lines
}

func parseDemoFlags(args []string, stdout, stderr io.Writer) (demoOptions, error) {
	fs := newFlagSet("demo", "[flags]", `
Starts a service on loopback, a simulated greenhouse cart and its camera as two
gRPC clients, and shows the live estimate; leaves the journal for review.`)
	fs.SetOutput(stderr)
	var o demoOptions
	layout := fs.String("layout", "free-wheel-turn", "wheel layout: free-wheel-turn, gyro-turn or drive-wheel-turn")
	fs.Uint64Var(&o.seed, "seed", 1, "simulator seed")
	fs.Float64Var(&o.duration, "duration", 70, "simulated seconds")
	fs.Float64Var(&o.speed, "speed", 2, "simulated seconds per wall second (0: as fast as possible)")
	fs.Float64Var(&o.outliers, "outliers", 0.05, "fraction of camera fixes that are wrong by metres")
	fs.Float64Var(&o.bumpAtS, "bump-at", 45, "lift the cart a metre aside at this simulated second (0: never)")
	fs.Float64Var(&o.lateS, "camera-late", 0, "the camera stamps its fixes this many seconds after capture, which its configuration does not say (for reckon calibrate to find)")
	fs.BoolVar(&o.markers, "markers", false, "camera reports range and bearing to post markers instead of its pose")
	fs.StringVar(&o.journal, "journal", "", "journal directory (default reckon-demo/run-<time>)")
	view := fs.String("view", "auto", "live (redraw), lines (one line every -every seconds) or auto (live on a terminal)")
	fs.Float64Var(&o.everyS, "every", 5, "simulated seconds between lines in the lines view")
	fs.StringVar(&o.page, "page", "", "also serve the live view page on this loopback address (\"127.0.0.1:7470\" or \":7470\")")
	pos, err := parseArgs(fs, args, stdout, stderr)
	if err != nil {
		return o, err
	}
	if len(pos) != 0 {
		return o, usagef(fs, "takes no arguments")
	}
	if o.layout, err = parseLayout(*layout); err != nil {
		return o, &usageError{err: err}
	}
	if o.journal == "" {
		o.journal = filepath.Join("reckon-demo", time.Now().Format("run-20060102-150405"))
	}
	o.live = *view == "live" || (*view == "auto" && isTerminal(stdout))
	return o, nil
}

// scenario is the simulated run the options ask for.
func (o demoOptions) scenario() fusiontest.Scenario {
	sc := fusiontest.Scenario{Layout: o.layout, Seed: o.seed, DurationS: o.duration, OutlierFraction: o.outliers, SlipPerS: 0.02,
		IMU: o.layout != fusiontest.GyroTurn, Counts: true, Markers: o.markers, NamePoseMarkers: !o.markers}
	sc.CameraStampLateNs = int64(math.Round(o.lateS * 1e9))
	if o.bumpAtS > 0 {
		sc.Bump = &fusiontest.Bump{AtS: o.bumpAtS, DXM: 0.8, DYM: 0.6, DRad: 0.35}
	}
	return sc
}

// startDemoServer runs the service on a loopback port with its journal in
// dir, and the live view page on page unless it is empty, until stop,
// which returns the service's error; stop may be called more than once.
func startDemoServer(dir, page string) (addr, pageAddr string, stop func() error, err error) {
	ctx, cancel := context.WithCancel(context.Background())
	addrc := make(chan [2]string, 1)
	done := make(chan error, 1)
	go func() { done <- serveDemo(ctx, dir, page, func(a, p string) { addrc <- [2]string{a, p} }) }()
	select {
	case a := <-addrc:
		addr, pageAddr = a[0], a[1]
	case err := <-done:
		cancel()
		return "", "", nil, fmt.Errorf("server stopped before it listened: %w", err)
	}
	stop = sync.OnceValue(func() error {
		cancel()
		if err := <-done; err != nil && !errors.Is(err, context.Canceled) {
			return fmt.Errorf("server: %w", err)
		}
		return nil
	})
	return addr, pageAddr, stop, nil
}

// serveDemo is the demo's service: on loopback, with a journal, silent;
// with the live view on page unless it is empty (the daemon refuses an
// address that is not loopback, since the demo has no -insecure).
func serveDemo(ctx context.Context, dir, page string, ready func(addr, pageAddr string)) error {
	var pageAddr string
	return daemon.Serve(ctx, daemon.Config{Listen: "127.0.0.1:0", ViewListen: page, Options: server.Options{JournalDir: dir,
		Logger: slog.New(slog.NewTextHandler(io.Discard, nil))}, ViewReady: func(p string) { pageAddr = p }, Ready: func(a, _ string) { ready(a, pageAddr) }})
}

// demoRun is one run of the demo: the simulated cart's odometry bridge and
// its camera, each a client of its own with its own ingest session, and a
// third client that watches the fused pose.
type demoRun struct {
	opt                   demoOptions
	sim                   *fusiontest.Sim
	cart, camera, watcher *client.Client
	odo, cam              *client.Session
	view                  *demoView
	stopWatch             context.CancelFunc
	watchDone             chan struct{}
	held                  map[uint64]bool // fixes held, by sequence number, until resolved
	truthFile             *os.File
	truth                 *bufio.Writer // the simulator's truth as CSV, beside the journal
}

// openDemo connects the three clients, creates the robot, opens the two
// ingest sessions, starts watching and opens the truth file.
func openDemo(ctx context.Context, addr string, opt demoOptions) (d *demoRun, err error) {
	d = &demoRun{opt: opt, sim: fusiontest.New(opt.scenario()), held: map[uint64]bool{},
		view: &demoView{verdicts: map[string]int{}, truth: map[int64]estimator.Pose{}}}
	defer func() {
		if err != nil {
			d.close()
		}
	}()
	for _, c := range []**client.Client{&d.cart, &d.camera, &d.watcher} {
		if *c, err = client.Dial(addr, client.Options{}); err != nil {
			return nil, err
		}
	}
	cfg := convert.ConfigToProto(d.sim.Config())
	if _, err := d.cart.CreateRobot(ctx, strings.TrimPrefix(demoRobot, "robots/"), cfg); err != nil {
		return nil, err
	}
	if d.odo, err = d.cart.OpenIngest(ctx, demoRobot); err != nil {
		return nil, err
	}
	if d.cam, err = d.camera.OpenIngest(ctx, demoRobot); err != nil {
		return nil, err
	}
	var wctx context.Context
	wctx, d.stopWatch = context.WithCancel(ctx)
	d.watchDone = make(chan struct{})
	go d.view.watch(wctx, d.watcher, d.watchDone)
	if err := os.MkdirAll(opt.journal, 0o755); err != nil {
		return nil, err
	}
	yml, err := configYAML(cfg, fmt.Sprintf("# The configuration reckon demo gave %s (layout %s, seed %d).", demoRobot, opt.layout, opt.seed))
	if err != nil {
		return nil, err
	}
	if err := os.WriteFile(filepath.Join(opt.journal, "robot.yaml"), yml, 0o644); err != nil {
		return nil, err
	}
	if d.truthFile, err = os.Create(filepath.Join(opt.journal, "truth.csv")); err != nil {
		return nil, err
	}
	d.truth = bufio.NewWriter(d.truthFile)
	fmt.Fprintln(d.truth, "stamp_ns,x_m,y_m,heading_rad")
	return d, nil
}

// close stops watching and closes the truth file and the clients.
func (d *demoRun) close() {
	if d.stopWatch != nil {
		d.stopWatch()
		<-d.watchDone
	}
	if d.truthFile != nil {
		d.truth.Flush()
		d.truthFile.Close()
	}
	for _, c := range []*client.Client{d.cart, d.camera, d.watcher} {
		if c != nil {
			c.Close()
		}
	}
}

// feed sends the simulated run at the chosen speed and shows the estimate
// as it goes.
func (d *demoRun) feed(ctx context.Context, stdout io.Writer) error {
	start := time.Now()
	var nextLine, nextDraw int64
	for {
		in, ok := d.sim.Next()
		if !ok {
			return nil
		}
		if err := pace(ctx, start, in.ArrivalNs, d.opt.speed); err != nil {
			return err
		}
		resp, err := d.send(&in)
		if err != nil {
			return err
		}
		d.view.tally(&in, resp, d.held)
		if d.opt.live && time.Since(start).Nanoseconds() >= nextDraw {
			nextDraw = time.Since(start).Nanoseconds() + 200e6
			drawLive(stdout, d.view, in.ArrivalNs, d.opt.duration)
		}
		if !d.opt.live && in.Odometry != nil && in.Odometry.StampNs >= nextLine {
			nextLine += int64(d.opt.everyS * 1e9)
			if p, err := d.cart.PoseAt(ctx, demoRobot, in.Odometry.StampNs); err == nil {
				printLine(stdout, p, in.Truth)
			}
		}
	}
}

// pace waits until an input that arrives arrivalNs into the run is due at
// speed simulated seconds per wall second (0: at once).
func pace(ctx context.Context, start time.Time, arrivalNs int64, speed float64) error {
	if err := ctx.Err(); err != nil || speed <= 0 {
		return err
	}
	d := time.Until(start.Add(time.Duration(float64(arrivalNs) / speed)))
	if d <= 0 {
		return nil
	}
	select {
	case <-time.After(d):
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}

// send sends one simulated input through the cart's session (odometry and
// IMU) or the camera's (fixes), writing the truth at odometry stamps.
func (d *demoRun) send(in *fusiontest.Input) (*pb.IngestResponse, error) {
	switch {
	case in.Odometry != nil:
		fmt.Fprintf(d.truth, "%d,%g,%g,%g\n", in.Odometry.StampNs, in.Truth.X, in.Truth.Y, in.Truth.Heading)
		d.view.mu.Lock()
		d.view.truth[in.Odometry.StampNs] = in.Truth
		delete(d.view.truth, in.Odometry.StampNs-3e9)
		d.view.mu.Unlock()
		return d.odo.Apply(convert.OdometryToProto(in.Odometry))
	case in.Heading != nil:
		return d.odo.Apply(convert.HeadingToProto(in.Heading))
	}
	return d.cam.Apply(convert.FixToProto(in.Fix))
}

// finish ends both ingest sessions and lets the watcher take the last pose.
func (d *demoRun) finish() error {
	if err := d.odo.Close(); err != nil {
		return err
	}
	if err := d.cam.Close(); err != nil {
		return err
	}
	time.Sleep(100 * time.Millisecond) // let the watcher take the last pose
	d.stopWatch()
	<-d.watchDone
	d.stopWatch = nil
	return nil
}

// summary prints the error against truth, the fix verdicts, the robot's
// statistics and, in the lines view, the events.
func (d *demoRun) summary(ctx context.Context, stdout io.Writer) error {
	if d.opt.live {
		drawLive(stdout, d.view, int64(d.opt.duration*1e9), d.opt.duration)
	}
	stats, err := d.cart.Statistics(ctx, demoRobot)
	if err != nil {
		return err
	}
	v := d.view
	v.mu.Lock()
	defer v.mu.Unlock()
	fmt.Fprintf(stdout, "\nRMS position error of the watched estimate against truth: %.3f m (largest %.3f m) over %d poses; watcher skipped %d\n",
		math.Sqrt(v.sumSq/float64(max(v.n, 1))), v.maxErr, v.n, v.skipped)
	fmt.Fprintf(stdout, "fix verdicts: %s\n", review.FormatCounts(v.verdicts))
	fmt.Fprintf(stdout, "recoveries %d, slips suspected %d, odometry gaps %d\n", stats.GetRecoveries(), stats.GetSlips(), stats.GetGaps())
	for _, ss := range stats.GetSensors() {
		fmt.Fprintf(stdout, "sensor %-7s applied %5d gated %4d  mean NIS %.2f (95%% band %.2f-%.2f): %s%s\n", ss.GetSensorId(),
			ss.GetCounts().GetApplied(), ss.GetCounts().GetGated(), ss.GetMeanNis(), ss.GetBandLow(), ss.GetBandHigh(), convert.ConsistencyName(ss.GetVerdict()), gatedWhy(ss))
	}
	if b := d.opt.bumpAtS; b > 0 && b < d.opt.duration {
		fmt.Fprintf(stdout, "(the cart was lifted aside and turned by hand at %g s: the means include the moments the IMU saw it turn and the wheels did not)\n", b)
	}
	if !d.opt.live && len(v.events) > 0 {
		fmt.Fprintln(stdout, "\nevents:")
		for _, l := range v.events {
			fmt.Fprintln(stdout, l)
		}
	}
	return nil
}

// watch keeps v up to date with c's watched poses of the demo's robot until
// ctx is done, then closes done.
func (v *demoView) watch(ctx context.Context, c *client.Client, done chan<- struct{}) {
	defer close(done)
	for resp, err := range c.Watch(ctx, demoRobot, 50*time.Millisecond) {
		if err != nil {
			return
		}
		v.take(resp)
	}
}

// take records one watched pose: its events (but refused fixes, which the
// verdicts count) and its error against truth.
func (v *demoView) take(resp *pb.WatchResponse) {
	v.mu.Lock()
	defer v.mu.Unlock()
	v.pose = resp.GetPose()
	v.skipped += resp.GetSkipped()
	for _, e := range resp.GetEvents() {
		if e.GetKind() != pb.EventKind_EVENT_KIND_FIX_REFUSED {
			v.events = append(v.events, fmt.Sprintf("%7.2f s  %s %s", float64(e.GetStampNs())*1e-9,
				convert.EventName(e.GetKind()), e.GetDetail()))
		}
	}
	if e, ok := v.errAt(v.pose); ok {
		v.sumSq += e * e
		v.n++
		v.maxErr = math.Max(v.maxErr, e)
	}
}

// tally counts a fix's verdict, or remembers a held fix until a later
// response resolves it.
func (v *demoView) tally(in *fusiontest.Input, resp *pb.IngestResponse, held map[uint64]bool) {
	v.mu.Lock()
	defer v.mu.Unlock()
	if in.Fix != nil {
		if resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
			held[resp.GetSequence()] = true
		} else {
			v.verdicts[convert.VerdictName(resp.GetVerdict())]++
		}
	}
	for _, r := range resp.GetResolved() {
		if held[r.GetSequence()] {
			delete(held, r.GetSequence())
			v.verdicts[convert.VerdictName(r.GetVerdict())]++
		}
	}
}

func printLine(w io.Writer, p *pb.FusedPose, truth estimator.Pose) {
	c := p.GetCovariance().GetValues()
	trust := "trusted"
	if !p.GetTrusted() {
		trust = distrust(p)
	}
	fmt.Fprintf(w, "%7.2f %8.3f %8.3f %8.1f %7.3f %7.3f %7.2f %8.3f %7.3f  %s\n",
		float64(p.GetStampNs())*1e-9, p.GetPose().GetXM(), p.GetPose().GetYM(), p.GetPose().GetHeadingRad()*180/math.Pi,
		math.Sqrt(c[0]), math.Sqrt(c[4]), math.Sqrt(c[8])*180/math.Pi, p.GetPosition95M(),
		math.Hypot(p.GetPose().GetXM()-truth.X, p.GetPose().GetYM()-truth.Y), trust)
}

// drawLive redraws the terminal with the newest watched estimate.
func drawLive(w io.Writer, v *demoView, nowNs int64, duration float64) {
	v.mu.Lock()
	defer v.mu.Unlock()
	var b strings.Builder
	b.WriteString("\033[H\033[2J")
	fmt.Fprintf(&b, "reckon demo: greenhouse cart   simulated %5.1f of %.0f s   (Ctrl-C stops)\n\n", float64(nowNs)*1e-9, duration)
	if p := v.pose; p != nil {
		c := p.GetCovariance().GetValues()
		e, _ := v.errAt(p)
		trust := "TRUSTED"
		if !p.GetTrusted() {
			trust = "DO NOT TRUST: " + distrust(p)
		}
		fmt.Fprintf(&b, "  pose        x %8.3f m   y %8.3f m   heading %7.1f deg\n", p.GetPose().GetXM(), p.GetPose().GetYM(), p.GetPose().GetHeadingRad()*180/math.Pi)
		fmt.Fprintf(&b, "  std dev     x %8.3f m   y %8.3f m   heading %7.2f deg   95%% radius %.3f m\n", math.Sqrt(c[0]), math.Sqrt(c[4]), math.Sqrt(c[8])*180/math.Pi, p.GetPosition95M())
		fmt.Fprintf(&b, "  velocity    %6.2f m/s forward  %6.2f m/s left  %6.1f deg/s\n", p.GetVelocity().GetForwardMPerS(), p.GetVelocity().GetLeftMPerS(), p.GetVelocity().GetTurnRadPerS()*180/math.Pi)
		fmt.Fprintf(&b, "  IMU offset  %7.2f deg\n", p.GetImuOffsetRad()*180/math.Pi)
		fmt.Fprintf(&b, "  error       %.3f m against the simulator's truth\n", e)
		fmt.Fprintf(&b, "  trust       %s\n\n", trust)
	}
	fmt.Fprintf(&b, "  camera fixes: %s\n\n  recent events:\n", review.FormatCounts(v.verdicts))
	for _, l := range v.events[max(0, len(v.events)-8):] {
		if len(l) > 100 {
			l = l[:97] + "..."
		}
		fmt.Fprintf(&b, "  %s\n", l)
	}
	io.WriteString(w, b.String())
}

func isTerminal(w io.Writer) bool {
	f, ok := w.(*os.File)
	if !ok {
		return false
	}
	st, err := f.Stat()
	return err == nil && st.Mode()&os.ModeCharDevice != 0
}
