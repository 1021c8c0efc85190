package daemon

import (
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"testing"
	"time"

	"github.com/chromedp/chromedp"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// chromium returns the path of headless Chromium (Debian's package, which
// .ci/run installs); without it the test is skipped, except under CI.
func chromium(t *testing.T) string {
	browser, err := exec.LookPath("chromium")
	if err != nil {
		if os.Getenv("CI") != "" {
			t.Fatal("chromium is not installed; .ci/run installs it")
		}
		t.Skip("chromium is not installed")
	}
	return browser
}

// browse opens a headless Chromium tab on url for the rest of the test,
// driven over the DevTools protocol (chromedp). The browser lives as long
// as the context of the first action, which therefore has no timeout; the
// later ones get the returned context, which has.
func browse(t *testing.T, url string) context.Context {
	opts := append(chromedp.DefaultExecAllocatorOptions[:], chromedp.ExecPath(chromium(t)), chromedp.NoSandbox, chromedp.DisableGPU,
		chromedp.UserDataDir(t.TempDir()), chromedp.Flag("disable-quic", true), chromedp.WindowSize(1400, 1100))
	alloc, cancelAlloc := chromedp.NewExecAllocator(context.Background(), opts...)
	tab, cancelTab := chromedp.NewContext(alloc)
	t.Cleanup(func() { cancelTab(); cancelAlloc() })
	if err := chromedp.Do(tab, chromedp.Navigate(url)); err != nil {
		t.Fatalf("chromium: %v", err)
	}
	ctx, cancel := context.WithTimeout(tab, time.Minute)
	t.Cleanup(cancel)
	return ctx
}

// attr returns an attribute of the first element sel selects ("" when
// either is missing).
func attr(t *testing.T, ctx context.Context, sel, name string) string {
	t.Helper()
	a, err := chromedp.Run(ctx, chromedp.AttributeValue(chromedp.CSS(sel), name))
	if err != nil {
		t.Fatalf("%s %s: %v", sel, name, err)
	}
	return a.Value
}

// feedPaced sends samp on one ingest stream at the pace of their stamps
// (real time) for their first span, then as fast as the service takes
// them, and returns when all are answered, with the first error.
func feedPaced(api pb.FusionServiceClient, samp []*pb.Sample, span time.Duration) error {
	st, err := api.Ingest(context.Background())
	if err != nil {
		return err
	}
	sent := make(chan error, 1)
	go func() {
		t0, s0 := time.Now(), convert.SampleStamp(samp[0])
		for i, s := range samp {
			if at := time.Duration(convert.SampleStamp(s) - s0); at <= span {
				time.Sleep(time.Until(t0.Add(at)))
			}
			if err := st.Send(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: uint64(i + 1), Sample: s}); err != nil {
				sent <- err
				return
			}
		}
		sent <- st.CloseSend()
	}()
	for {
		if _, err := st.Recv(); err != nil {
			if err.Error() == "EOF" {
				return <-sent
			}
			return err
		}
	}
}

// TestViewInBrowser: headless Chromium loads the live view of a real
// service, whose robot appears; fed odometry and fixes over gRPC at real
// time (for two seconds, then faster), the page shows at least two
// different poses within a second of the feed's start (the check of the
// live view); a robot created meanwhile appears and goes when deleted; and
// the page draws the pose, its 95% ellipse, the track, the fixes and the
// grid. It leaves a screenshot in testdata/out/live-view.png.
func TestViewInBrowser(t *testing.T) {
	samp, cfg := cartSamples(25)
	v := startViewing(t, Config{}, cfg)
	ctx := browse(t, "http://"+v.view+"/")
	card := `section.robot[data-robot="robots/cart"]`
	if err := chromedp.Do(ctx, chromedp.WaitVisible(chromedp.CSS(card+`[data-pose]`))); err != nil {
		t.Fatalf("the page did not show the robot: %v", err)
	}
	if s := attr(t, ctx, "body", "data-stream"); s != "open" {
		t.Errorf("body data-stream %q, want open", s)
	}
	before := attr(t, ctx, card, "data-pose")
	fed := make(chan error, 1)
	start := time.Now()
	go func() { fed <- feedPaced(v.api, samp, 2*time.Second) }()
	seen := map[string]bool{}
	for time.Since(start) < time.Second {
		if pose := attr(t, ctx, card, "data-pose"); pose != before {
			seen[pose] = true
		}
		time.Sleep(20 * time.Millisecond)
	}
	if len(seen) < 2 {
		t.Errorf("%d different poses shown within a second of feeding, want at least 2", len(seen))
	}
	if err := <-fed; err != nil {
		t.Fatalf("feed: %v", err)
	}
	// A robot created while the page is open appears on it, and goes when
	// deleted.
	if _, err := v.api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart-b", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	other := `section.robot[data-robot="robots/cart-b"]`
	if err := chromedp.Do(ctx, chromedp.WaitVisible(chromedp.CSS(other))); err != nil {
		t.Fatalf("the robot created later did not appear: %v", err)
	}
	if _, err := v.api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart-b"}); err != nil {
		t.Fatal(err)
	}
	if err := chromedp.Do(ctx, chromedp.WaitNotPresent(chromedp.CSS(other))); err != nil {
		t.Fatalf("the deleted robot stayed: %v", err)
	}
	// After the run the page has drawn every kind of mark.
	time.Sleep(200 * time.Millisecond)
	for _, sel := range []string{`g.robot path.pose`, `g.robot ellipse.ellipse`, `g.robot polyline.track`, `g.robot .fix.applied`, `g.grid line`, `g.grid-labels text`, card + ` td.pose`} {
		n, err := chromedp.Run(ctx, chromedp.Evaluate[int](`document.querySelectorAll('`+sel+`').length`))
		if err != nil {
			t.Fatal(err)
		}
		if n == 0 {
			t.Errorf("no %s on the page", sel)
		}
	}
	shot, err := chromedp.Run(ctx, chromedp.CaptureScreenshot())
	if err != nil {
		t.Fatal(err)
	}
	path, _ := filepath.Abs("../../testdata/out/live-view.png")
	os.MkdirAll(filepath.Dir(path), 0o755)
	if err := os.WriteFile(path, shot, 0o644); err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshot: %s; poses seen in the first second: %d", path, len(seen))
}
