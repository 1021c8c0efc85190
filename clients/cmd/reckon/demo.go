package main

import (
	"bufio"
	"context"
	"errors"
	"flag"
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

func runDemo(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("demo", flag.ContinueOnError)
	fs.SetOutput(stderr)
	layout := fs.String("layout", "free-wheel-turn", "wheel layout: free-wheel-turn, gyro-turn or drive-wheel-turn")
	seed := fs.Uint64("seed", 1, "simulator seed")
	duration := fs.Float64("duration", 70, "simulated seconds")
	speed := fs.Float64("speed", 2, "simulated seconds per wall second (0: as fast as possible)")
	outliers := fs.Float64("outliers", 0.05, "fraction of camera fixes that are wrong by metres")
	bump := fs.Float64("bump-at", 45, "lift the cart a metre aside at this simulated second (0: never)")
	markers := fs.Bool("markers", false, "camera reports range and bearing to post markers instead of its pose")
	journal := fs.String("journal", "", "journal directory (default reckon-demo/run-<time>)")
	view := fs.String("view", "auto", "live (redraw), lines (one line every -every seconds) or auto (live on a terminal)")
	every := fs.Float64("every", 5, "simulated seconds between lines in the lines view")
	if err := fs.Parse(args); err != nil {
		return err
	}
	lay, err := parseLayout(*layout)
	if err != nil {
		return err
	}
	if *journal == "" {
		*journal = filepath.Join("reckon-demo", time.Now().Format("run-20060102-150405"))
	}
	live := *view == "live" || (*view == "auto" && isTerminal(stdout))
	sc := fusiontest.Scenario{Layout: lay, Seed: *seed, DurationS: *duration, OutlierFraction: *outliers, SlipPerS: 0.02,
		IMU: lay != fusiontest.GyroTurn, Counts: true, Markers: *markers}
	if *bump > 0 {
		sc.Bump = &fusiontest.Bump{AtS: *bump, DXM: 0.8, DYM: 0.6, DRad: 0.35}
	}
	s := fusiontest.New(sc)

	// The server, on loopback, with its journal.
	srvCtx, stopSrv := context.WithCancel(context.Background())
	defer stopSrv()
	addrc := make(chan string, 1)
	srvErr := make(chan error, 1)
	go func() {
		srvErr <- server.Serve(srvCtx, server.DaemonConfig{Listen: "127.0.0.1:0", Options: server.Options{JournalDir: *journal,
			Logger: slog.New(slog.NewTextHandler(io.Discard, nil))}, Ready: func(a, _ string) { addrc <- a }})
	}()
	var addr string
	select {
	case addr = <-addrc:
	case err := <-srvErr:
		return fmt.Errorf("server: %w", err)
	}
	// Three separate clients: the cart's odometry bridge, its camera, and a watcher.
	cart, err := client.Dial(addr, client.Options{})
	if err != nil {
		return err
	}
	defer cart.Close()
	camera, err := client.Dial(addr, client.Options{})
	if err != nil {
		return err
	}
	defer camera.Close()
	watcher, err := client.Dial(addr, client.Options{})
	if err != nil {
		return err
	}
	defer watcher.Close()
	const name = "robots/greenhouse-cart"
	if _, err := cart.CreateRobot(ctx, "greenhouse-cart", convert.ConfigToProto(s.Config())); err != nil {
		return err
	}
	odo, err := cart.OpenIngest(ctx, name)
	if err != nil {
		return err
	}
	cam, err := camera.OpenIngest(ctx, name)
	if err != nil {
		return err
	}
	v := &demoView{verdicts: map[string]int{}, truth: map[int64]estimator.Pose{}}
	wctx, stopWatch := context.WithCancel(ctx)
	defer stopWatch()
	watchDone := make(chan struct{})
	go func() {
		defer close(watchDone)
		for resp, err := range watcher.Watch(wctx, name, 50*time.Millisecond) {
			if err != nil {
				return
			}
			v.mu.Lock()
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
			v.mu.Unlock()
		}
	}()

	fmt.Fprintf(stdout, "reckon demo: greenhouse cart (%s) and camera feeding %s on %s; journal in %s\n", lay, name, addr, *journal)
	if !live {
		fmt.Fprintf(stdout, "%7s %8s %8s %8s %7s %7s %7s %8s %7s  %s\n", "t_s", "x_m", "y_m", "head_deg", "sx_m", "sy_m", "sh_deg", "r95_m", "err_m", "trust")
	}
	// The simulator's truth, for review and compare.
	if err := os.MkdirAll(*journal, 0o755); err != nil {
		return err
	}
	truthFile, err := os.Create(filepath.Join(*journal, "truth.csv"))
	if err != nil {
		return err
	}
	defer truthFile.Close()
	truthCSV := bufio.NewWriter(truthFile)
	defer truthCSV.Flush()
	fmt.Fprintln(truthCSV, "stamp_ns,x_m,y_m,heading_rad")
	start := time.Now()
	heldFixes := map[uint64]bool{}
	var nextLine, nextDraw int64
	for {
		if err := ctx.Err(); err != nil {
			return err
		}
		in, ok := s.Next()
		if !ok {
			break
		}
		if *speed > 0 {
			due := start.Add(time.Duration(float64(in.ArrivalNs) / *speed))
			if d := time.Until(due); d > 0 {
				select {
				case <-time.After(d):
				case <-ctx.Done():
					return ctx.Err()
				}
			}
		}
		var resp *pb.IngestResponse
		switch {
		case in.Odometry != nil:
			fmt.Fprintf(truthCSV, "%d,%g,%g,%g\n", in.Odometry.StampNs, in.Truth.X, in.Truth.Y, in.Truth.Heading)
			v.mu.Lock()
			v.truth[in.Odometry.StampNs] = in.Truth
			delete(v.truth, in.Odometry.StampNs-3e9)
			v.mu.Unlock()
			resp, err = odo.Apply(convert.OdometryToProto(in.Odometry))
		case in.Heading != nil:
			resp, err = odo.Apply(convert.HeadingToProto(in.Heading))
		default:
			resp, err = cam.Apply(convert.FixToProto(in.Fix))
		}
		if err != nil {
			return err
		}
		v.mu.Lock()
		if in.Fix != nil {
			if resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
				heldFixes[resp.GetSequence()] = true
			} else {
				v.verdicts[convert.VerdictName(resp.GetVerdict())]++
			}
		}
		for _, r := range resp.GetResolved() {
			if heldFixes[r.GetSequence()] {
				delete(heldFixes, r.GetSequence())
				v.verdicts[convert.VerdictName(r.GetVerdict())]++
			}
		}
		v.mu.Unlock()
		if live && time.Since(start).Nanoseconds() >= nextDraw {
			nextDraw = time.Since(start).Nanoseconds() + 200e6
			drawLive(stdout, v, in.ArrivalNs, *duration)
		}
		if !live && in.Odometry != nil && in.Odometry.StampNs >= nextLine {
			nextLine += int64(*every * 1e9)
			p, err := cart.API().GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: name, StampNs: in.Odometry.StampNs})
			if err == nil {
				printLine(stdout, p.GetPose(), in.Truth)
			}
		}
	}
	if err := odo.Close(); err != nil {
		return err
	}
	if err := cam.Close(); err != nil {
		return err
	}
	time.Sleep(100 * time.Millisecond) // let the watcher take the last pose
	stopWatch()
	<-watchDone
	if live {
		drawLive(stdout, v, int64(*duration*1e9), *duration)
	}
	st, err := cart.API().GetStatistics(ctx, &pb.GetStatisticsRequest{Robot: name})
	if err != nil {
		return err
	}
	v.mu.Lock()
	defer v.mu.Unlock()
	fmt.Fprintf(stdout, "\nRMS position error of the watched estimate against truth: %.3f m (largest %.3f m) over %d poses; watcher skipped %d\n",
		math.Sqrt(v.sumSq/float64(max(v.n, 1))), v.maxErr, v.n, v.skipped)
	fmt.Fprintf(stdout, "fix verdicts: %s\n", review.FormatCounts(v.verdicts))
	stats := st.GetStatistics()
	fmt.Fprintf(stdout, "recoveries %d, slips suspected %d, odometry gaps %d\n", stats.GetRecoveries(), stats.GetSlips(), stats.GetGaps())
	for _, ss := range stats.GetSensors() {
		fmt.Fprintf(stdout, "sensor %-7s applied %5d gated %4d  mean NIS %.2f (95%% band %.2f-%.2f): %s\n", ss.GetSensorId(),
			ss.GetCounts().GetApplied(), ss.GetCounts().GetGated(), ss.GetMeanNis(), ss.GetBandLow(), ss.GetBandHigh(), convert.ConsistencyName(ss.GetVerdict()))
	}
	if *bump > 0 && *bump < *duration {
		fmt.Fprintf(stdout, "(the cart was lifted aside and turned by hand at %g s: the means include the moments the IMU saw it turn and the wheels did not)\n", *bump)
	}
	if !live && len(v.events) > 0 {
		fmt.Fprintln(stdout, "\nevents:")
		for _, l := range v.events {
			fmt.Fprintln(stdout, l)
		}
	}
	stopSrv()
	if err := <-srvErr; err != nil && !errors.Is(err, context.Canceled) {
		return fmt.Errorf("server: %w", err)
	}
	fmt.Fprintf(stdout, "\nthe journal (and the simulator's truth.csv) is in %s; try:\n  reckon review -journal %s -robot greenhouse-cart\n", *journal, *journal)
	return nil
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
