package server

import (
	"context"
	"io"
	"net"
	"net/http"
	"strconv"
	"strings"
	"testing"
	"time"

	pb "reckon.example/proto/reckon/v1"
)

// scrape fetches the metrics over HTTP and returns the values of the
// series whose name starts with prefix, by their text before the value
// (`name{label="value",...}`).
func scrape(t *testing.T, url, prefix string) map[string]float64 {
	t.Helper()
	resp, err := http.Get(url)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil || resp.StatusCode != http.StatusOK {
		t.Fatalf("scrape: %d %v", resp.StatusCode, err)
	}
	out := map[string]float64{}
	for _, line := range strings.Split(string(body), "\n") {
		if !strings.HasPrefix(line, prefix) {
			continue
		}
		i := strings.LastIndexByte(line, ' ')
		v, err := strconv.ParseFloat(line[i+1:], 64)
		if err != nil {
			t.Fatalf("scrape: %q: %v", line, err)
		}
		out[line[:i]] = v
	}
	return out
}

// TestRobotMetrics: after the cart's run, a scrape of the metrics over
// HTTP on loopback shows the robot's series with sane values, and none once
// the robot is deleted.
func TestRobotMetrics(t *testing.T) {
	m := NewMetrics()
	srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir(), Metrics: m}})
	defer srv.stop()
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	hs := &http.Server{Handler: m.Handler(), ReadHeaderTimeout: 5 * time.Second}
	go hs.Serve(lis)
	defer hs.Close()
	url := "http://" + lis.Addr().String() + "/metrics"

	api := dial(t, srv.addr)
	ctx := context.Background()
	samp, cfg := cartRun(41, 20)
	if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	f, err := openFeed(ctx, api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	applyAll(t, f, samp)
	if err := f.close(); err != nil {
		t.Fatal(err)
	}
	stats, err := api.GetStatistics(ctx, &pb.GetStatisticsRequest{Robot: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	rb, err := api.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	pose, err := api.GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: "robots/cart", StampNs: rb.GetRobot().GetNewestStampNs()})
	if err != nil {
		t.Fatal(err)
	}

	got := scrape(t, url, "reckon_robot_")
	const r = `{robot="robots/cart"}`
	// The served pose's own numbers, and the statistics' counts.
	want := map[string]float64{
		"reckon_robot_trusted" + r:             boolGauge(pose.GetPose().GetTrusted()),
		"reckon_robot_position95_meters" + r:   pose.GetPose().GetPosition95M(),
		"reckon_robot_heading_std_radians" + r: pose.GetPose().GetHeadingStdRad(),
		"reckon_robot_slips" + r:               float64(stats.GetStatistics().GetSlips()),
		"reckon_robot_odometry_gaps" + r:       float64(stats.GetStatistics().GetGaps()),
		"reckon_robot_held_inputs" + r:         float64(stats.GetStatistics().GetHeld()),
		"reckon_robot_run" + r:                 float64(rb.GetRobot().GetRun()),
	}
	for k, v := range want {
		g, ok := got[k]
		if !ok || g != v {
			t.Errorf("%s = %v (present %v), want %v", k, g, ok, v)
		}
	}
	if p := got["reckon_robot_position95_meters"+r]; !(p > 0 && p < 0.5) {
		t.Errorf("95%% position radius %v m, want within (0, 0.5) for a trusted cart", p)
	}
	if lag := got["reckon_robot_journal_lag_seconds"+r]; !(lag > 0 && lag < 1) {
		t.Errorf("journal lag %v s", lag)
	}
	nis := 0
	for _, ss := range stats.GetStatistics().GetSensors() {
		if ss.GetCounts().GetApplied() == 0 {
			continue
		}
		k := `reckon_robot_nis_mean{robot="robots/cart",sensor="` + ss.GetSensorId() + `"}`
		// Mean NIS of a consistent sensor: about its dimension (2 or 3
		// for our fixes, 1 for the IMU); a bound of 10 catches a unit slip.
		if v, ok := got[k]; !ok || !(v > 0 && v < 10) {
			t.Errorf("%s = %v (present %v)", k, v, ok)
		}
		nis++
	}
	if nis == 0 {
		t.Fatal("no sensor applied a fix")
	}

	if _, err := api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart"}); err != nil {
		t.Fatal(err)
	}
	for k := range scrape(t, url, "reckon_robot_") {
		if strings.Contains(k, `robot="robots/cart"`) {
			t.Errorf("deleted robot's series %s still served", k)
		}
	}
}
