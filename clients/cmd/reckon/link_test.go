package main

import (
	"context"
	"io"
	"log/slog"
	"net"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/creack/pty"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"reckon.example/clients/bridge"
	"reckon.example/clients/client"
	"reckon.example/server"
	"reckon.example/server/daemon"
)

// freeUDP returns a free UDP port on loopback: taken, then let go for
// reckon link to take.
func freeUDP(t *testing.T) string {
	t.Helper()
	pc, err := net.ListenPacket("udp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer pc.Close()
	return pc.LocalAddr().String()
}

// dialUDP connects to the link's UDP port for the rest of the test.
func dialUDP(t *testing.T, addr string) net.Conn {
	t.Helper()
	conn, err := net.Dial("udp", addr)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	return conn
}

// dialService connects to the service for the rest of the test.
func dialService(t *testing.T, addr string) *client.Client {
	t.Helper()
	c, err := client.Dial(addr, client.Options{})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { c.Close() })
	return c
}

// background is a command that startBackground runs.
type background struct {
	out, errb *syncBuffer // its standard output and standard error
	done      chan error  // run's result, once it ends; closed after
	stop      func()      // interrupts it, as Ctrl-C does (exit 130)
}

// startBackground runs "reckon args..." in a goroutine. It is interrupted
// and waited for when the test ends, if it has not ended before.
func startBackground(t *testing.T, args ...string) *background {
	ctx, stop := context.WithCancel(context.Background())
	r := &background{out: &syncBuffer{}, errb: &syncBuffer{}, done: make(chan error, 1), stop: stop}
	go func() {
		r.done <- run(ctx, args, nil, r.out, r.errb)
		close(r.done)
	}()
	t.Cleanup(func() { stop(); <-r.done })
	return r
}

// linkRun is a reckon link that startLink started.
type linkRun struct {
	*background
	udpAddr string   // the UDP port it listens on
	conn    net.Conn // dialled to that port
}

// startLink runs "reckon link args... -udp port" on a free UDP port of
// loopback and dials that port.
func startLink(t *testing.T, args ...string) *linkRun {
	t.Helper()
	udpAddr := freeUDP(t)
	bg := startBackground(t, append(append([]string{"link"}, args...), "-udp", udpAddr)...)
	return &linkRun{background: bg, udpAddr: udpAddr, conn: dialUDP(t, udpAddr)}
}

// TestLink: reckon link listens on UDP, creates the robot, takes 200 frames
// of a cart driving straight (one sent twice) and, interrupted, prints its
// summary.
func TestLink(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	l := startLink(t, "-addr", addr, "-robot", "robots/cart", "-create", "../../../testdata/robots/free-wheel-turn.yaml")
	c := dialService(t, addr)
	const last = int64(199 * 10_000_000)
	deadline := time.Now().Add(20 * time.Second)
	for {
		// Until the link listens and the robot exists, datagrams may be
		// refused or dropped: send the whole feed again (duplicates are
		// dropped) until the last stamp arrives.
		var b []byte
		for k := range 200 {
			f := bridge.Frame{Type: bridge.FrameWheels, Counter: uint32(k), StampUs: uint64(10_000 * k), Counts: []int32{int32(200 * k), int32(200 * k), 0}}
			b = bridge.AppendFrame(b, &f, nil)
			if k%20 == 19 || k == 199 {
				l.conn.Write(b)
				b = b[:0]
			}
		}
		if r, err := c.GetRobot(context.Background(), "robots/cart"); err == nil && r.GetNewestStampNs() == last {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("the last frame never arrived\n%s%s", l.out.String(), l.errb.String())
		}
		time.Sleep(50 * time.Millisecond)
	}
	l.stop()
	if err := <-l.done; exitCode(err) != exitInterrupted {
		t.Fatalf("link interrupted: %v (exit %d), want exit %d\n%s", err, exitCode(err), exitInterrupted, l.errb.String())
	}
	s := l.out.String()
	if !strings.Contains(s, "frames: ") || !strings.Contains(s, " samples sent to robots/cart: applied ") || !strings.Contains(s, "too_old 0, invalid 0") {
		t.Errorf("summary:\n%s", s)
	}
	if !strings.Contains(l.errb.String(), "linking udp "+l.udpAddr+" to robots/cart") {
		t.Errorf("stderr: %s", l.errb.String())
	}
}

func TestLinkFlags(t *testing.T) {
	cases := []struct {
		args    []string
		ok      bool
		errText string
	}{
		{[]string{"link", "-robot", "robots/cart"}, false, "usage: reckon link"},
		{[]string{"link", "-robot", "robots/cart", "-serial", "/dev/null0", "-udp", "127.0.0.1:0"}, false, "usage: reckon link"},
		{[]string{"link", "-udp", "127.0.0.1:0"}, false, "usage: reckon link"},
		{[]string{"link", "-robot", "robots/cart", "-serial", "/nonexistent/tty", "-addr", "127.0.0.1:1"}, false, ""},
		{[]string{"link", "-bogus"}, false, "flag provided but not defined"},
	}
	for _, c := range cases {
		_, errs, err := runCmd(t, c.args...)
		if (err == nil) != c.ok || !strings.Contains(errs, c.errText) {
			t.Errorf("%v: err %v, stderr %q", c.args, err, errs)
		}
	}
	// -baud with -udp was ignored, and one of 0 or less went to the serial
	// library, which refused it in its own words (exit 1).
	for args, want := range map[string]string{
		"-udp 127.0.0.1:0 -baud 9600":          "link: -baud is for -serial",
		"-serial /nonexistent/tty -baud 0":     "link: -baud must be a positive bit rate, got 0",
		"-serial /nonexistent/tty -baud -9600": "link: -baud must be a positive bit rate, got -9600",
	} {
		_, errs, code := runCode(t, context.Background(), "", append([]string{"link", "-robot", "cart", "-addr", "127.0.0.1:1"}, strings.Fields(args)...)...)
		if code != exitUsage || !strings.Contains(errs, want) {
			t.Errorf("link %s: exit %d, want %d and %q\n%s", args, code, exitUsage, want, errs)
		}
	}
	// -h prints the usage on standard output (TestHelpAndUsage checks it
	// for every command).
	if out, _, err := runCmd(t, "link", "-h"); err != nil || !strings.Contains(out, "usage: reckon link") {
		t.Errorf("link -h: err %v, stdout %q", err, out)
	}
}

// TestLinkReboot: the controller restarts mid-run (its boot byte changes,
// its counter, clock and counts start again): reckon link starts run 2 of
// the robot and its frames go on being taken on the new clock.
func TestLinkReboot(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	l := startLink(t, "-addr", addr, "-robot", "robots/cart", "-create", "../../../testdata/robots/free-wheel-turn.yaml")
	c := dialService(t, addr)
	// Each boot's feed is sent again until its last stamp arrives (until
	// the link listens, datagrams may be lost; duplicates are dropped).
	for _, boot := range []struct {
		boot   uint8
		frames int
	}{{1, 150}, {2, 60}} {
		last := int64(boot.frames-1) * 10_000_000
		deadline := time.Now().Add(20 * time.Second)
		for {
			var b []byte
			for k := range boot.frames {
				f := bridge.Frame{Type: bridge.FrameWheels, Boot: boot.boot, Counter: uint32(k), StampUs: uint64(10_000 * k), Counts: []int32{int32(200 * k), int32(200 * k), 0}}
				b = bridge.AppendFrame(b, &f, nil)
				if k%20 == 19 || k == boot.frames-1 {
					l.conn.Write(b)
					b = b[:0]
				}
			}
			r, err := c.GetRobot(context.Background(), "robots/cart")
			if err == nil && r.GetNewestStampNs() == last && r.GetRun() == uint64(boot.boot) {
				break
			}
			if time.Now().After(deadline) {
				t.Fatalf("boot %d: the last frame never arrived (%v)\n%s%s", boot.boot, r, l.out.String(), l.errb.String())
			}
			time.Sleep(50 * time.Millisecond)
		}
	}
	r, err := c.GetRobot(context.Background(), "robots/cart")
	if err != nil || r.GetRun() != 2 || r.GetBootId() != bridge.BootID(2) {
		t.Errorf("after the reboot: %v %v", r, err)
	}
	l.stop()
	<-l.done
	if s := l.out.String(); !strings.Contains(s, " 1 restarts") || !strings.Contains(s, "too_old 0, invalid 0") {
		t.Errorf("summary:\n%s", s)
	}
}

// TestLinkSaysWhyFramesDrop: frames with a bad CRC, of an unknown type (a
// newer protocol) and stamped behind the last taken frame (a controller
// clock that went back, after which every frame is dropped until it
// catches up) are named, with the field that was wrong, on standard error
// while the link runs and in its summary. Before, the summary only counted
// them ("1 corrupted, 2 invalid") and nothing was said while it ran.
func TestLinkSaysWhyFramesDrop(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	l := startLink(t, "-addr", addr, "-robot", "robots/cart", "-create", "../../../testdata/robots/free-wheel-turn.yaml")
	c := dialService(t, addr)
	frame := func(k int) bridge.Frame {
		return bridge.Frame{Type: bridge.FrameWheels, Counter: uint32(k), StampUs: uint64(10_000 * k), Counts: []int32{int32(200 * k), int32(200 * k), 0}}
	}
	waitNewest := func(k int) {
		for deadline := time.Now().Add(20 * time.Second); ; time.Sleep(50 * time.Millisecond) {
			if r, err := c.GetRobot(context.Background(), "robots/cart"); err == nil && r.GetNewestStampNs() == int64(k)*10_000_000 {
				return
			}
			if time.Now().After(deadline) {
				t.Fatalf("frame %d never arrived\n%s%s", k, l.out.String(), l.errb.String())
			}
			// Until the link listens, datagrams may be lost; the frame
			// before it confirms the boot's first frame (a lone frame
			// is held: PROTOCOL.md, "The first frames of a boot").
			f, g := frame(k-1), frame(k)
			l.conn.Write(bridge.AppendFrame(bridge.AppendFrame(nil, &f, nil), &g, nil))
		}
	}
	waitNewest(2) // frame 1: stamp 0 is a new robot's newest too
	var b []byte
	for k := 3; k < 40; k++ {
		f := frame(k)
		switch k {
		case 10:
			raw := bridge.AppendRawFrame(nil, &f)
			raw[len(raw)-1] ^= 0x5a
			b = append(bridge.AppendCOBS(b, raw), 0)
			continue
		case 20:
			f.Type = 2
		case 30:
			f.StampUs = 50_000 // behind frame 29's 290 ms
		}
		b = bridge.AppendFrame(b, &f, nil)
	}
	l.conn.Write(b)
	waitNewest(39)
	l.stop()
	if err := <-l.done; exitCode(err) != exitInterrupted {
		t.Fatalf("link interrupted: %v (exit %d)\n%s", err, exitCode(err), l.errb.String())
	}
	for _, want := range []string{
		"bridge: corrupted frame: crc: CRC ",
		"bridge: invalid frame: type: 2, only 1 (wheel counts) is known",
		"bridge: invalid frame: stamp: 50000 us is not after the last taken frame's 290000 us although its counter 30 is ahead of 29",
	} {
		if !strings.Contains(l.errb.String(), "frame dropped: "+want) {
			t.Errorf("stderr does not say %q:\n%s", want, l.errb.String())
		}
		if !strings.Contains(l.out.String(), "first of its kind: "+want) {
			t.Errorf("summary does not say %q:\n%s", want, l.out.String())
		}
	}
	if s := l.out.String(); !strings.Contains(s, "1 corrupted, 2 invalid") {
		t.Errorf("summary:\n%s", s)
	}
}

// TestLinkAfterPowerCycle: the whole robot is switched off and on. The
// robot's first run was fed by reckon link without a controller restart,
// so it carries no link boot id; the new link's first frame, of the
// rebooted controller, is stamped on a clock started again, behind the
// robot's newest odometry: the link starts run 2 there (PROTOCOL.md,
// "Reboots"). Before, it compared boot ids only, found none to compare,
// and every frame of the new boot was refused as time_backwards for as
// long as the first run had lasted. A link restarted while the controller
// ran on (its stamps after the newest) starts no run.
func TestLinkAfterPowerCycle(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	c := dialService(t, addr)
	// One link process per step: its boot byte, its first counter and
	// stamp step (10 ms frames), and the run the robot is then in.
	for i, step := range []struct {
		boot        uint8
		from, count int
		run         uint64
	}{
		{1, 0, 150, 1},  // created by the link; run 1 has no boot id
		{1, 150, 50, 1}, // the link restarted, the controller ran on
		{2, 0, 60, 2},   // power cycle: boot 2, clock from zero
	} {
		l := startLink(t, "-addr", addr, "-robot", "robots/cart", "-create", "../../../testdata/robots/free-wheel-turn.yaml")
		last := int64(step.from+step.count-1) * 10_000_000
		var r interface {
			GetNewestStampNs() int64
			GetRun() uint64
		}
		for deadline := time.Now().Add(20 * time.Second); ; time.Sleep(50 * time.Millisecond) {
			var b []byte
			for k := step.from; k < step.from+step.count; k++ {
				f := bridge.Frame{Type: bridge.FrameWheels, Boot: step.boot, Counter: uint32(k), StampUs: uint64(10_000 * k), Counts: []int32{int32(200 * k), int32(200 * k), 0}}
				b = bridge.AppendFrame(b, &f, nil)
				if k%20 == 19 || k == step.from+step.count-1 {
					l.conn.Write(b)
					b = b[:0]
				}
			}
			robot, err := c.GetRobot(context.Background(), "robots/cart")
			if err == nil && robot.GetNewestStampNs() == last {
				r = robot
				break
			}
			if time.Now().After(deadline) {
				t.Fatalf("link %d: the last frame never arrived (%v)\n%s%s", i+1, robot, l.out.String(), l.errb.String())
			}
		}
		l.stop()
		<-l.done
		if r.GetRun() != step.run || !strings.Contains(l.out.String(), "invalid 0") {
			t.Errorf("link %d: robot in run %d, want %d; summary:\n%s", i+1, r.GetRun(), step.run, l.out.String())
		}
	}
}

// TestLinkPortGone: the serial port goes away under the link (a USB
// adapter pulled out; here the pseudo-terminal's master end closed): the
// link prints its summary and exits 1 with an error naming the port.
// Before, the error was the serial library's bare "Port has been closed".
func TestLinkPortGone(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	master, tty, err := pty.Open()
	if err != nil {
		t.Skipf("no pseudo-terminal: %v", err)
	}
	defer tty.Close()
	l := startBackground(t, "link", "-addr", addr, "-serial", tty.Name(), "-robot", "robots/cart", "-create", "../../../testdata/robots/free-wheel-turn.yaml")
	c := dialService(t, addr)
	for deadline := time.Now().Add(20 * time.Second); ; time.Sleep(20 * time.Millisecond) {
		// Two frames: the second confirms the first (a lone frame is
		// held: PROTOCOL.md, "The first frames of a boot").
		f := bridge.Frame{Type: bridge.FrameWheels, Counter: 1, StampUs: 10_000, Counts: []int32{1, 1, 0}}
		g := bridge.Frame{Type: bridge.FrameWheels, Counter: 2, StampUs: 20_000, Counts: []int32{2, 2, 0}}
		master.Write(bridge.AppendFrame(bridge.AppendFrame(nil, &f, nil), &g, nil))
		if r, err := c.GetRobot(context.Background(), "robots/cart"); err == nil && r.GetNewestStampNs() == 20_000_000 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("the frame never arrived\n%s%s", l.out.String(), l.errb.String())
		}
	}
	master.Close()
	select {
	case err = <-l.done:
	case <-time.After(20 * time.Second):
		t.Fatal("the link did not end when its port went away")
	}
	if exitCode(err) != exitFailure || !strings.Contains(err.Error(), tty.Name()) {
		t.Errorf("link ended with %v (exit %d), want exit %d naming %s", err, exitCode(err), exitFailure, tty.Name())
	}
	if !strings.Contains(l.out.String(), "samples sent to robots/cart: applied ") {
		t.Errorf("summary:\n%s", l.out.String())
	}
}

// TestLinkSaysRefusalsWhileRunning: frames of three wheels to a robot
// configured with two (the firmware's wheel order or count not matching
// the configuration): the service refuses every sample, and the link says
// so on standard error while it runs, naming the field, once and not at
// every sample. Before, the refusals were named only in the summary at
// its end; a link under systemd fed a robot nothing for hours in silence.
func TestLinkSaysRefusalsWhileRunning(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	l := startLink(t, "-addr", addr, "-robot", "robots/cart", "-create", "../../../testdata/robots/drive-wheel-turn.yaml")
	const want = "counts has 3 entries for 2 wheels"
	for k, deadline := 0, time.Now().Add(20*time.Second); !strings.Contains(l.errb.String(), want); k++ {
		if time.Now().After(deadline) {
			t.Fatalf("the refusals were not said while the link runs:\n%s", l.errb.String())
		}
		f := bridge.Frame{Type: bridge.FrameWheels, Counter: uint32(k), StampUs: uint64(10_000 * k), Counts: []int32{int32(200 * k), int32(200 * k), 0}}
		l.conn.Write(bridge.AppendFrame(nil, &f, nil))
		time.Sleep(10 * time.Millisecond)
	}
	time.Sleep(200 * time.Millisecond) // more refusals, not said again
	l.stop()
	<-l.done
	if n := strings.Count(l.errb.String(), want); n != 1 {
		t.Errorf("said %d times, want once:\n%s", n, l.errb.String())
	}
}

// TestLinkTokenRefused: the service restarts with another token (rotated
// on the coprocessor; the link read its token file when it started). The
// stream it opens again is refused at once: the link ends with the
// refusal (exit 1), so that its unit restarts it with the new token. Before,
// it opened the stream again at every frame, two lines on standard error
// each time, for as long as it ran.
func TestLinkTokenRefused(t *testing.T) {
	dir := t.TempDir()
	tokenFile := dir + "/token"
	if err := os.WriteFile(tokenFile, []byte("alpha-token\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	serveToken := func(listen, token string) (string, func()) {
		ctx, cancel := context.WithCancel(context.Background())
		ready, done := make(chan string, 1), make(chan error, 1)
		go func() {
			done <- daemon.Serve(ctx, daemon.Config{Listen: listen, Token: token, Ready: func(a, _ string) { ready <- a }, ShutdownGrace: 100 * time.Millisecond,
				Options: server.Options{JournalDir: dir + "/journal", Logger: slog.New(slog.NewTextHandler(io.Discard, nil))}})
		}()
		select {
		case addr := <-ready:
			return addr, func() { cancel(); <-done }
		case err := <-done:
			cancel()
			t.Fatalf("serve: %v", err)
			return "", nil
		}
	}
	addr, stop := serveToken("127.0.0.1:0", "alpha-token")
	l := startLink(t, "-addr", addr, "-token-file", tokenFile, "-robot", "robots/cart", "-create", "../../../testdata/robots/free-wheel-turn.yaml")
	send := func(k int) {
		f := bridge.Frame{Type: bridge.FrameWheels, Counter: uint32(k), StampUs: uint64(10_000 * k), Counts: []int32{int32(200 * k), int32(200 * k), 0}}
		l.conn.Write(bridge.AppendFrame(nil, &f, nil))
	}
	k := 0
	for deadline := time.Now().Add(20 * time.Second); !strings.Contains(l.errb.String(), "linking udp"); k++ {
		if time.Now().After(deadline) {
			t.Fatalf("the link did not start:\n%s", l.errb.String())
		}
		send(k)
		time.Sleep(10 * time.Millisecond)
	}
	stop()
	_, stop = serveToken(addr, "beta-token")
	defer stop()
	var linkErr error
	for deadline := time.Now().Add(30 * time.Second); linkErr == nil; k++ {
		select {
		case linkErr = <-l.done:
			if linkErr == nil {
				t.Fatal("the link ended without an error")
			}
			continue
		default:
		}
		if time.Now().After(deadline) {
			t.Fatalf("the link did not end when its token was refused; %d lines on stderr", strings.Count(l.errb.String(), "\n"))
		}
		send(k)
		time.Sleep(10 * time.Millisecond)
	}
	if exitCode(linkErr) != exitFailure || status.Code(linkErr) != codes.Unauthenticated {
		t.Errorf("link ended with %v (exit %d), want Unauthenticated, exit %d", linkErr, exitCode(linkErr), exitFailure)
	}
	if n := strings.Count(l.errb.String(), "opening it again"); n > 3 {
		t.Errorf("the stream was opened again %d times:\n%s", n, l.errb.String())
	}
}

// TestLinkOpensItsPortFirst: the link opens its serial port (or UDP
// socket) before it creates the robot. A mistyped port exits 1 naming it
// and creates no robot, and with -replace the robot that existed keeps its
// configuration. Before, the robot was created (or replaced, its journal
// set aside) first and left behind when the port failed to open.
func TestLinkOpensItsPortFirst(t *testing.T) {
	addr, _ := serve(t, "127.0.0.1:0", t.TempDir())
	ctx := context.Background()
	c := dialService(t, addr)
	const tty = "/nonexistent/ttyACM9"
	link := func(args ...string) {
		t.Helper()
		_, errs, code := runCode(t, ctx, "", append([]string{"link", "-addr", addr, "-robot", "cart", "-serial", tty, "-create", exampleConfig}, args...)...)
		if code != exitFailure || !strings.Contains(errs, tty) {
			t.Errorf("link %v on a missing port: exit %d, want %d naming it\n%s", args, code, exitFailure, errs)
		}
	}
	link()
	if r, err := c.GetRobot(ctx, "robots/cart"); status.Code(err) != codes.NotFound {
		t.Fatalf("robot after the link failed to open its port: %v %v", r, err)
	}
	if _, errs, code := runCode(t, ctx, "", "create", "cart", "-addr", addr, "-config", otherConfig(t)); code != exitOK {
		t.Fatalf("create: exit %d, %s", code, errs)
	}
	link("-replace")
	if r, err := c.GetRobot(ctx, "robots/cart"); err != nil || r.GetConfig().GetGateProbability() != 0.9 {
		t.Errorf("the robot after link -replace failed to open its port: %v %v", r.GetConfig(), err)
	}
}

// TestLinkSummarySaysHeld: frames held unconfirmed when the link ends (a
// boot's first frame that no later frame followed) are said in the
// summary, as they are never sent; with none held, the summary is as
// before.
func TestLinkSummarySaysHeld(t *testing.T) {
	var d bridge.Decoder
	f := bridge.Frame{Type: bridge.FrameWheels, Counter: 1, StampUs: 10_000, Counts: []int32{1, 1, 0}}
	if ss := d.Decode(nil, bridge.AppendFrame(nil, &f, nil)); len(ss) != 0 {
		t.Fatalf("a lone frame gave %d samples", len(ss))
	}
	var b strings.Builder
	printLinkSummary(&b, "robots/cart", bridge.Summary{Stats: d.Stats()})
	if !strings.Contains(b.String(), "1 frames held at the end, not sent") {
		t.Errorf("summary:\n%s", b.String())
	}
	b.Reset()
	printLinkSummary(&b, "robots/cart", bridge.Summary{})
	if strings.Contains(b.String(), "held at the end") {
		t.Errorf("summary without held frames:\n%s", b.String())
	}
}
