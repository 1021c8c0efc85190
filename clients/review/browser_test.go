package review

import (
	"context"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// chromium returns the path of headless Chromium (Debian's package, which
// .ci/run installs) and the arguments every run of it takes.
func chromium(t *testing.T) (string, []string) {
	browser, err := exec.LookPath("chromium")
	if err != nil {
		if os.Getenv("CI") != "" {
			t.Fatal("chromium is not installed; .ci/run installs it")
		}
		t.Skip("chromium is not installed")
	}
	return browser, []string{"--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--disable-background-networking",
		"--disable-component-update", "--disable-sync", "--hide-scrollbars", "--user-data-dir=" + t.TempDir()}
}

// browserTimeout bounds one run of headless Chromium: a few seconds as a
// rule, tens of seconds on a loaded machine.
var browserTimeout = 2 * time.Minute

// runChromium runs headless Chromium with args (chromium's, and a profile
// directory of its own each time) and returns its standard output. Now and
// then Chromium never exits after a --dump-dom or --screenshot on a loaded
// machine: once in session 20, for 9 minutes (until go test's deadline),
// with two test suites and a CI run sharing the 2 cores, its processes
// left running after the test binary died. So a run has browserTimeout,
// its whole process group is killed when it ends, and a run that timed out
// is tried once more; a second timeout fails the test.
func runChromium(t *testing.T, browser string, args ...string) []byte {
	t.Helper()
	out, err := runBrowser(t, browser, args...)
	if err != nil {
		t.Fatal(err)
	}
	return out
}

// runBrowser is runChromium's run, returning its error.
func runBrowser(t *testing.T, browser string, args ...string) ([]byte, error) {
	t.Helper()
	var kept []string
	for _, a := range args {
		if !strings.HasPrefix(a, "--user-data-dir=") {
			kept = append(kept, a)
		}
	}
	for attempt := 1; ; attempt++ {
		ctx, cancel := context.WithTimeout(context.Background(), browserTimeout)
		cmd := exec.CommandContext(ctx, browser, append([]string{"--user-data-dir=" + t.TempDir()}, kept...)...)
		cmd.SysProcAttr = &syscall.SysProcAttr{Setpgid: true}
		cmd.Cancel = func() error { return syscall.Kill(-cmd.Process.Pid, syscall.SIGKILL) }
		out, err := cmd.Output()
		timedOut := ctx.Err() != nil
		cancel()
		if cmd.Process != nil {
			// Its zygote, GPU and renderer processes go with it.
			syscall.Kill(-cmd.Process.Pid, syscall.SIGKILL)
		}
		switch {
		case timedOut && attempt == 1:
			t.Logf("chromium %s did not finish in %v; trying again", strings.Join(kept, " "), browserTimeout)
			continue
		case timedOut:
			err = fmt.Errorf("did not finish in %v, twice: %w", browserTimeout, err)
		}
		if err != nil {
			return out, fmt.Errorf("chromium %s: %w", strings.Join(kept, " "), err)
		}
		return out, nil
	}
}

// TestHungBrowserIsKilled: a browser that never exits, and leaves a child
// behind it as Chromium's helpers are, is given up after browserTimeout
// twice, with an error saying so, and neither it nor its child is left
// running.
func TestHungBrowserIsKilled(t *testing.T) {
	defer func(d time.Duration) { browserTimeout = d }(browserTimeout)
	browserTimeout = 300 * time.Millisecond
	marker := fmt.Sprintf("hung-browser-%d", time.Now().UnixNano())
	script := filepath.Join(t.TempDir(), "browser")
	// The child is a sleep of its own, named by the marker in its
	// arguments; the script waits for it.
	if err := os.WriteFile(script, []byte("#!/bin/sh\nsh -c 'sleep 3600; : "+marker+"' &\nwait\n"), 0o755); err != nil {
		t.Fatal(err)
	}
	start := time.Now()
	_, err := runBrowser(t, script, "--headless")
	if err == nil || !strings.Contains(err.Error(), "twice") {
		t.Fatalf("a browser that never exits: %v", err)
	}
	if d := time.Since(start); d > 10*time.Second {
		t.Errorf("given up after %v", d)
	}
	time.Sleep(100 * time.Millisecond)
	cmdlines, _ := filepath.Glob("/proc/[0-9]*/cmdline")
	if len(cmdlines) == 0 {
		t.Fatal("no /proc to look for what is left running")
	}
	for _, c := range cmdlines {
		if b, _ := os.ReadFile(c); strings.Contains(string(b), marker) {
			t.Errorf("left running: %s: %q", c, b)
		}
	}
}

// reverseIMU flips the sign of IMU headings, as an IMU mounted upside down
// or wired with the wrong handedness reports them.
func reverseIMU(s *pb.Sample) {
	if h := s.GetHeading(); h != nil {
		h.HeadingRad = -h.HeadingRad
	}
}

// TestReportShowsWhereAndWhy reviews a demo-like run (outliers, a move by
// hand) and a run whose IMU is reversed, opens each report in headless
// Chromium after its script ran, and checks in the DOM that the marks are
// there: shaded intervals, time marks along the track, ellipses, the NIS
// gate line and refused inputs, problem sentences linked to their moment,
// and that following such a link zooms the figures. It leaves screenshots
// at 1400 and 800 px wide in testdata/out.
func TestReportShowsWhereAndWhy(t *testing.T) {
	browser, args := chromium(t)
	for _, c := range []struct {
		name  string
		sc    fusiontest.Scenario
		alter func(*pb.Sample)
		// want counts the least number of elements of each class.
		want map[string]int
		// problem is a kind of problem sentence the report must have.
		problem string
	}{
		{"demo", fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 73, DurationS: 40, OutlierFraction: 0.1, Bump: &fusiontest.Bump{AtS: 18, DXM: 0.8}}, nil,
			map[string]int{"time-tick": 3, "ellipse filtered": 20, "ellipse smoothed": 20, "gate-line": 1, "nis-refused": 1, "event recovery": 2, "problem": 1}, "moved"},
		{"reversed-imu", fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 76, DurationS: 40}, reverseIMU,
			map[string]int{"time-tick": 3, "ellipse filtered": 20, "gate-line": 1, "interval distrust": 2, "problem": 1}, "distrust"},
	} {
		t.Run(c.name, func(t *testing.T) {
			dir, truth := writeRunWith(t, c.sc, c.alter)
			out := t.TempDir()
			run, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, out, Options{})
			if err != nil {
				t.Fatal(err)
			}
			for _, p := range run.Problems() {
				t.Logf("problem: %s", p.Text)
			}
			report := filepath.Join(out, "report.html")
			f, _ := os.Create(report)
			if err := WriteHTML(f, "Review of robots/cart ("+c.name+")", run); err != nil {
				t.Fatal(err)
			}
			f.Close()
			dom := runChromium(t, browser, append(args, "--window-size=1400,2000", "--dump-dom", "file://"+report)...)
			page := string(dom)
			if !strings.Contains(page, `data-zoom="ready"`) {
				t.Fatalf("the page's script did not run")
			}
			for class, n := range c.want {
				if got := len(regexp.MustCompile(`class="`+class+`[" ]`).FindAllString(page, -1)); got < n {
					t.Errorf("%d elements of class %q, want at least %d", got, class, n)
				}
			}
			// The legend's ellipse swatches are filled with the ellipses'
			// colours at alpha 50/255 (#1F5EA0 and #D67814, give or take
			// the rounding of premultiplied alpha).
			if !regexp.MustCompile(`style="fill:#1[EF]5[DE](9F|A0);fill-opacity:0\.196`).MatchString(page) || !regexp.MustCompile(`style="fill:#D[56]7[78]1[34];fill-opacity:0\.196`).MatchString(page) {
				t.Errorf("the legend's ellipse swatches are not filled with the ellipses' colours")
			}
			if !regexp.MustCompile(`<li class="problem" data-kind="` + c.problem + `"><a class="moment" href="#t=[0-9.]+" data-t="[0-9.]+">`).MatchString(page) {
				t.Errorf("no %s problem linked to its moment", c.problem)
			}
			// Following a link to a moment zooms the track and the time
			// figures to it.
			m := regexp.MustCompile(`<a class="moment" href="(#t=[0-9.]+)"`).FindStringSubmatch(page)
			if m == nil {
				t.Fatal("no link to a moment")
			}
			zoomed := runChromium(t, browser, append(args, "--window-size=1400,2000", "--dump-dom", "file://"+report+m[1])...)
			if !strings.Contains(string(zoomed), `data-moment="`) || strings.Count(string(zoomed), `class="cursor"`) < 2 {
				t.Errorf("following %s did not zoom the figures", m[1])
			}
			if vb := regexp.MustCompile(`<figure id="fig-track-0" data-kind="track"><svg [^>]*viewBox="([^"]*)"`).FindStringSubmatch(string(zoomed)); vb == nil || vb[1] == "0 0 760 560" {
				t.Errorf("the track's view after %s: %v", m[1], vb)
			}
			// Tall enough for the problems and the track at each width
			// (README.md shows testdata/review-report.png, a copy of the
			// demo's at 1400 px).
			for _, size := range []string{"1400,1150", "800,1500"} {
				width, _, _ := strings.Cut(size, ",")
				shot, _ := filepath.Abs("../../testdata/out/review-" + c.name + "-" + width + ".png")
				os.MkdirAll(filepath.Dir(shot), 0o755)
				runChromium(t, browser, append(args, "--window-size="+size, "--screenshot="+shot, "file://"+report)...)
				if st, err := os.Stat(shot); err != nil || st.Size() < 10000 {
					t.Fatalf("screenshot %s: %v", shot, err)
				}
				t.Logf("screenshot: %s", shot)
			}
		})
	}
}

// TestCalibrationSection reviews a run under a configuration with the
// camera's mount 3 cm off (before) and under its own (after), writes them
// with a calibration section, and checks in headless Chromium's DOM that
// the section comes first, with its findings, its table of parameters,
// and a before and an after row carrying the camera's mean NIS with its
// band and, with the truth, the NEES and RMS errors; and that the
// comparison's own sections follow.
func TestCalibrationSection(t *testing.T) {
	browser, args := chromium(t)
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 74, DurationS: 30}
	dir, truth := writeRunWith(t, sc, nil)
	wrong := convert.ConfigToProto(fusiontest.New(sc).Config())
	wrong.Sensors[0].Mount.XM += 0.03
	out := t.TempDir()
	var runs []*Run
	for _, c := range []struct {
		label string
		cfg   *pb.RobotConfig
	}{{"before", wrong}, {"after", nil}} {
		run, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth, Override: c.cfg, Label: c.label}, out, Options{})
		if err != nil {
			t.Fatal(err)
		}
		runs = append(runs, run)
	}
	cal := Calibration{By: "a test", Findings: []string{"sensors[0] (camera)'s mount is wrong"},
		Columns: []string{"parameter", "fitted"}, Rows: [][]string{{"sensors[0] (camera) mount.x_m", "0.1500"}}, Notes: []string{"wrote after.yaml"}}
	report := filepath.Join(out, "report.html")
	f, _ := os.Create(report)
	if err := WriteCalibrationHTML(f, "Calibration of robots/cart", cal, runs[0], runs[1]); err != nil {
		t.Fatal(err)
	}
	f.Close()
	dom := runChromium(t, browser, append(args, "--window-size=1400,2000", "--dump-dom", "file://"+report)...)
	page := string(dom)
	if !strings.Contains(page, `data-zoom="ready"`) {
		t.Fatalf("the page's script did not run")
	}
	sec := strings.Index(page, `<section id="calibration">`)
	if sec < 0 || sec > strings.Index(page, "<h2>Differences</h2>") {
		t.Fatalf("no calibration section before the differences")
	}
	for _, re := range []string{
		`<li class="finding">sensors\[0\] \(camera\)'s mount is wrong</li>`,
		`<tr class="calibration-param"><td>sensors\[0\] \(camera\) mount.x_m</td><td>0.1500</td></tr>`,
		`<th>camera mean NIS \(95% band\)</th>`,
		// Each row: the camera's mean NIS, its band and in or out, then
		// the NEES and two RMS errors.
		`<tr class="calibration-before"><td>before</td><td>[0-9.]+ \[[0-9.]+, [0-9.]+\] (in|out)</td>(<td>[^<]*</td>)*<td>[0-9.]+</td><td>[0-9.]+ m</td><td>[0-9.]+ m</td></tr>`,
		`<tr class="calibration-after"><td>after</td><td>[0-9.]+ \[[0-9.]+, [0-9.]+\] (in|out)</td>(<td>[^<]*</td>)*<td>[0-9.]+</td><td>[0-9.]+ m</td><td>[0-9.]+ m</td></tr>`,
	} {
		if !regexp.MustCompile(re).MatchString(page) {
			t.Errorf("the section lacks %s", re)
		}
	}
	// The mount 3 cm off shows in the camera's NIS: larger before than
	// after.
	head := regexp.MustCompile(`<table class="calibration-check">(?:<tbody>)?<tr>(.*?)</tr>`).FindStringSubmatch(page)
	if head == nil {
		t.Fatal("no before and after table")
	}
	col := slices.Index(regexp.MustCompile(`<th>(.*?)</th>`).FindAllString(head[1], -1), "<th>camera mean NIS (95% band)</th>")
	var nis []float64
	for _, row := range []string{"before", "after"} {
		r := regexp.MustCompile(`<tr class="calibration-` + row + `">(.*?)</tr>`).FindStringSubmatch(page)
		cells := regexp.MustCompile(`<td>([0-9.]+)`).FindAllStringSubmatch(r[1], -1)
		if col < 1 || col > len(cells) {
			t.Fatalf("camera column %d of %q", col, r[1])
		}
		nis = append(nis, atof(cells[col-1][1])) // the first column is the label, without a number
	}
	if !(nis[0] > nis[1]) {
		t.Errorf("camera mean NIS before %.3f, after %.3f: the wrong mount should show", nis[0], nis[1])
	}
	t.Logf("camera mean NIS before %.3f, after %.3f", nis[0], nis[1])
}

func atof(s string) float64 {
	v, _ := strconv.ParseFloat(s, 64)
	return v
}
