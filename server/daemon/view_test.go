package daemon

import (
	"bufio"
	"context"
	"crypto/tls"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
)

// viewing is a daemon with the live view, started by a test on loopback.
type viewing struct {
	*running
	view string // the live view's address
	api  pb.FusionServiceClient
}

// startViewing starts a daemon serving the live view on a loopback port
// with robot "cart" of cfg; token, if set, guards both.
func startViewing(t *testing.T, dc Config, cfg *pb.RobotConfig) *viewing {
	t.Helper()
	addr := make(chan string, 1)
	dc.ViewListen = "127.0.0.1:0"
	dc.ViewReady = func(a string) { addr <- a }
	if cfg != nil {
		dc.Robots = map[string]*pb.RobotConfig{"cart": cfg}
	}
	r := start(t, dc)
	t.Cleanup(r.stop)
	return &viewing{running: r, view: <-addr, api: dial(t, r.addr, nil, dc.Token)}
}

// cartSamples is a run of the simulated cart with late, sometimes wrong
// camera fixes, as the demo feeds.
func cartSamples(seconds float64) ([]*pb.Sample, *pb.RobotConfig) {
	return samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 41, DurationS: seconds, OutlierFraction: 0.05})
}

// feedAll sends samp on one ingest stream as fast as the service takes
// them and returns how many verdicts came back with a sequence number.
func feedAll(t *testing.T, api pb.FusionServiceClient, token string, samp []*pb.Sample) int {
	t.Helper()
	st, err := api.Ingest(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	errc := make(chan error, 1)
	go func() {
		for i, s := range samp {
			if err := st.Send(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: uint64(i + 1), Sample: s}); err != nil {
				errc <- err
				return
			}
		}
		errc <- st.CloseSend()
	}()
	answered, sequenced := 0, 0
	for {
		resp, err := st.Recv()
		if err == io.EOF {
			break
		}
		if err != nil {
			t.Fatalf("after %d verdicts: %v", answered, err)
		}
		if resp.GetClientSequence() == 0 {
			continue // a resolution of a held fix only
		}
		answered++
		if resp.GetSequence() != 0 {
			sequenced++
		}
	}
	if err := <-errc; err != nil {
		t.Fatal(err)
	}
	if answered != len(samp) {
		t.Fatalf("%d verdicts for %d samples", answered, len(samp))
	}
	return sequenced
}

// get fetches path from the view with an Authorization header (if set).
func get(t *testing.T, method, url, auth string) (*http.Response, string) {
	t.Helper()
	req, err := http.NewRequest(method, url, nil)
	if err != nil {
		t.Fatal(err)
	}
	if auth != "" {
		req.Header.Set("Authorization", auth)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	if strings.HasPrefix(resp.Header.Get("Content-Type"), "text/event-stream") {
		return resp, "" // a stream does not end; the status is what counts
	}
	b, _ := io.ReadAll(resp.Body)
	return resp, string(b)
}

// TestViewPaths: the page at "/" is the embedded one, self-contained (no
// address of another host); the event stream is at "/events"; any other
// path is 404 and another method 405.
func TestViewPaths(t *testing.T) {
	v := startViewing(t, Config{}, nil)
	base := "http://" + v.view
	resp, body := get(t, "GET", base+"/", "")
	if resp.StatusCode != http.StatusOK || !strings.HasPrefix(resp.Header.Get("Content-Type"), "text/html") || !strings.Contains(body, "reckon live view") {
		t.Fatalf("GET /: %s %q", resp.Status, resp.Header.Get("Content-Type"))
	}
	if m := regexp.MustCompile(`(src|href)="(https?:)?//`).FindString(body); m != "" {
		t.Errorf("the page loads from another host: %s", m)
	}
	if resp, _ := get(t, "GET", base+"/events", ""); resp.StatusCode != http.StatusOK || resp.Header.Get("Content-Type") != "text/event-stream" {
		t.Errorf("GET /events: %s %q", resp.Status, resp.Header.Get("Content-Type"))
	}
	for _, path := range []string{"/index.html", "/events/cart", "/view.html", "/metrics", "/robots/cart", "/favicon.ico"} {
		if resp, _ := get(t, "GET", base+path, ""); resp.StatusCode != http.StatusNotFound {
			t.Errorf("GET %s: %s, want 404", path, resp.Status)
		}
	}
	if resp, _ := get(t, "POST", base+"/events", ""); resp.StatusCode != http.StatusMethodNotAllowed {
		t.Errorf("POST /events: %s, want 405", resp.Status)
	}
}

// TestViewToken: with a token, the page and the stream need it, as a
// bearer token or as the password of basic authentication (which a browser
// asks for when told so); without it they are 401 with a basic challenge.
func TestViewToken(t *testing.T) {
	v := startViewing(t, Config{Token: "greenhouse-secret"}, nil)
	base := "http://" + v.view
	cases := []struct {
		auth string
		want int
	}{
		{"", http.StatusUnauthorized},
		{"Bearer wrong", http.StatusUnauthorized},
		{"Bearer greenhouse-secret", http.StatusOK},
		{"Basic " + basic("anyone", "greenhouse-secret"), http.StatusOK},
		{"Basic " + basic("greenhouse-secret", "wrong"), http.StatusUnauthorized},
		{"Basic not-base64!", http.StatusUnauthorized},
	}
	for _, path := range []string{"/", "/events"} {
		for _, c := range cases {
			resp, _ := get(t, "GET", base+path, c.auth)
			if resp.StatusCode != c.want {
				t.Errorf("GET %s with %q: %s, want %d", path, c.auth, resp.Status, c.want)
			}
			if c.want == http.StatusUnauthorized && !strings.HasPrefix(resp.Header.Get("WWW-Authenticate"), "Basic ") {
				t.Errorf("GET %s with %q: challenge %q", path, c.auth, resp.Header.Get("WWW-Authenticate"))
			}
		}
	}
	// A path that does not exist is not revealed without the token.
	if resp, _ := get(t, "GET", base+"/nope", ""); resp.StatusCode != http.StatusUnauthorized {
		t.Errorf("GET /nope without the token: %s", resp.Status)
	}
}

func basic(user, pass string) string {
	req, _ := http.NewRequest("GET", "http://x/", nil)
	req.SetBasicAuth(user, pass)
	auth, _ := strings.CutPrefix(req.Header.Get("Authorization"), "Basic ")
	return auth
}

// TestViewLimit: past -max-viewers open event streams another is refused
// 503 naming the flag; a closed one frees its place.
func TestViewLimit(t *testing.T) {
	v2 := startViewing(t, Config{Options: server.Options{Limits: server.Limits{MaxViewers: 1}}}, nil)
	first := openStream(t, v2.view)
	resp, body := get(t, "GET", "http://"+v2.view+"/events", "")
	if resp.StatusCode != http.StatusServiceUnavailable || !strings.Contains(body, "-max-viewers") {
		t.Errorf("second stream: %s %q", resp.Status, body)
	}
	first.Close()
	var err error
	for deadline := time.Now().Add(5 * time.Second); time.Now().Before(deadline); time.Sleep(10 * time.Millisecond) {
		var resp *http.Response
		if resp, _ = get(t, "GET", "http://"+v2.view+"/events", ""); resp.StatusCode == http.StatusOK {
			err = nil
			break
		}
		err = fmt.Errorf("%s", resp.Status)
	}
	if err != nil {
		t.Errorf("stream after the first closed: %v", err)
	}
}

// stream is an open event stream read line by line.
type stream struct {
	io.Closer
	r *bufio.Reader
}

// openStream opens /events on addr, through a connection with a small
// receive buffer so that a stream not read soon holds the service's writes.
func openStream(t *testing.T, addr string) *stream {
	t.Helper()
	tr := &http.Transport{DialContext: func(ctx context.Context, network, a string) (net.Conn, error) {
		c, err := (&net.Dialer{}).DialContext(ctx, network, a)
		if err == nil {
			c.(*net.TCPConn).SetReadBuffer(4096)
		}
		return c, err
	}}
	t.Cleanup(tr.CloseIdleConnections)
	resp, err := (&http.Client{Transport: tr}).Get("http://" + addr + "/events")
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { resp.Body.Close() })
	if resp.StatusCode != http.StatusOK {
		t.Fatalf("GET /events: %s", resp.Status)
	}
	return &stream{Closer: resp.Body, r: bufio.NewReader(resp.Body)}
}

// next returns the data of the next "robot" event, decoded.
func (s *stream) next() (viewUpdate, error) {
	var event string
	for {
		line, err := s.r.ReadString('\n')
		if err != nil {
			return viewUpdate{}, err
		}
		line = strings.TrimSuffix(line, "\n")
		switch {
		case strings.HasPrefix(line, "event: "):
			event = line[len("event: "):]
		case strings.HasPrefix(line, "data: ") && event == "robot":
			var u viewUpdate
			err := json.Unmarshal([]byte(line[len("data: "):]), &u)
			return u, err
		}
	}
}

// TestViewStreamConflates: an event stream that is not read while a run
// is fed loses intermediate updates, never the newest: read afterwards, it
// ends with the pose of the robot's last input, after fewer updates than
// inputs; the fixes come with their verdicts and the events with their
// labels (the wire enums' lowercase suffixes).
func TestViewStreamConflates(t *testing.T) {
	samp, cfg := cartSamples(20)
	v := startViewing(t, Config{}, cfg)
	s := openStream(t, v.view)
	first, err := s.next()
	if err != nil || first.Robot != "robots/cart" || first.Pose == nil || first.State != "serving" {
		t.Fatalf("first update: %+v %v", first, err)
	}
	last := uint64(feedAll(t, v.api, "", samp))
	timer := time.AfterFunc(20*time.Second, func() { s.Close() })
	defer timer.Stop()
	updates, verdicts, kinds := 0, map[string]int{}, map[string]int{}
	for {
		u, err := s.next()
		if err != nil {
			t.Fatalf("after %d updates: %v", updates, err)
		}
		updates++
		for _, f := range u.Fixes {
			verdicts[f.Verdict]++
		}
		for _, e := range u.Events {
			kinds[e.Kind]++
		}
		if u.Pose != nil && u.Pose.Sequence == last {
			break
		}
	}
	t.Logf("%d inputs, %d updates read; fixes by verdict %v; events %v", len(samp), updates, verdicts, kinds)
	if updates >= len(samp) {
		t.Errorf("%d updates for %d inputs: nothing was conflated", updates, len(samp))
	}
	if verdicts["applied"] == 0 {
		t.Errorf("no applied fix among %v", verdicts)
	}
	for k := range kinds {
		if !regexp.MustCompile(`^[a-z_]+$`).MatchString(k) {
			t.Errorf("event kind %q is not a label", k)
		}
	}
}

// TestViewStuckPage: a page that opens the event stream and never reads
// does not hold up ingest: a feed of a long run gets every verdict, and the
// service counts the updates the stuck page's view conflated.
func TestViewStuckPage(t *testing.T) {
	samp, cfg := cartSamples(40)
	v := startViewing(t, Config{MetricsListen: "127.0.0.1:0"}, cfg)
	c, err := net.Dial("tcp", v.view)
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	c.(*net.TCPConn).SetReadBuffer(4096)
	fmt.Fprintf(c, "GET /events HTTP/1.1\r\nHost: %s\r\n\r\n", v.view)
	for deadline := time.Now().Add(10 * time.Second); metric(t, v.metrics, "reckon_viewers") != 1; time.Sleep(10 * time.Millisecond) {
		if time.Now().After(deadline) {
			t.Fatal("the stuck page's stream did not open")
		}
	}
	if n := feedAll(t, v.api, "", samp); n == 0 {
		t.Fatal("no input taken")
	}
	if got := metric(t, v.metrics, "reckon_view_updates_conflated_total"); got <= 0 {
		t.Errorf("reckon_view_updates_conflated_total = %v after %d inputs, want > 0", got, len(samp))
	}
}

// metric reads one unlabelled metric's value from the metrics server.
func metric(t *testing.T, addr, name string) float64 {
	t.Helper()
	_, body := get(t, "GET", "http://"+addr+"/metrics", "")
	m := regexp.MustCompile(`(?m)^` + name + ` (\S+)$`).FindStringSubmatch(body)
	if m == nil {
		t.Fatalf("no metric %s", name)
	}
	v, err := strconv.ParseFloat(m[1], 64)
	if err != nil {
		t.Fatal(err)
	}
	return v
}

// TestViewTLS: with the service's certificate the view speaks HTTPS (and
// still needs the token); plain HTTP gets no page.
func TestViewTLS(t *testing.T) {
	p := newPKI(t, "reckon test CA")
	cert, key := p.issue(t, "reckond", true)
	v := startViewing(t, Config{TLSCert: cert, TLSKey: key, Token: "greenhouse-7"}, nil)
	hc := &http.Client{Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: p.caPool, MinVersion: tls.VersionTLS12}}}
	defer hc.CloseIdleConnections()
	for _, c := range []struct {
		auth string
		want int
	}{{"Bearer greenhouse-7", http.StatusOK}, {"", http.StatusUnauthorized}} {
		req, _ := http.NewRequest("GET", "https://"+v.view+"/", nil)
		if c.auth != "" {
			req.Header.Set("Authorization", c.auth)
		}
		resp, err := hc.Do(req)
		if err != nil {
			t.Fatalf("HTTPS: %v", err)
		}
		resp.Body.Close()
		if resp.StatusCode != c.want {
			t.Errorf("HTTPS with %q: %s, want %d", c.auth, resp.Status, c.want)
		}
	}
	req, _ := http.NewRequest("GET", "http://"+v.view+"/", nil)
	req.Header.Set("Authorization", "Bearer greenhouse-7")
	if resp, err := http.DefaultClient.Do(req); err == nil {
		resp.Body.Close()
		if resp.StatusCode == http.StatusOK {
			t.Error("plain HTTP to the TLS view served the page")
		}
	}
}

// TestHTTPErrorsLogged: what net/http logs of the live view's server (here
// a TLS handshake that a client broke off) goes to the service's logger,
// naming the server. Before, it went to Go's standard logger, on standard
// error apart from the service's log and its level.
func TestHTTPErrorsLogged(t *testing.T) {
	p := newPKI(t, "reckon test CA")
	cert, key := p.issue(t, "reckond", true)
	logger, logs := fileLog(t, slog.LevelWarn)
	v := startViewing(t, Config{TLSCert: cert, TLSKey: key, Token: "greenhouse-7", Options: server.Options{Logger: logger}}, nil)
	c, err := net.Dial("tcp", v.view)
	if err != nil {
		t.Fatal(err)
	}
	c.Close() // before the TLS handshake
	for deadline := time.Now().Add(10 * time.Second); time.Now().Before(deadline); time.Sleep(10 * time.Millisecond) {
		if strings.Contains(logs(), "TLS handshake error") {
			break
		}
	}
	if s := logs(); !strings.Contains(s, "level=WARN") || !strings.Contains(s, "TLS handshake error") || !strings.Contains(s, "server=view") {
		t.Errorf("the view server's handshake error is not in the service's log as a warning naming server=view:\n%s", s)
	}
}
