package daemon

import (
	"crypto/subtle"
	_ "embed"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"net"
	"net/http"
	"strings"
	"time"

	"google.golang.org/grpc/status"

	"reckon.example/server"
	"reckon.example/server/convert"
)

// viewPage is the live view: one self-contained HTML file with its own
// script, which draws what /events streams (no network beyond it).
//
//go:embed view.html
var viewPage []byte

// viewWriteTimeout bounds one write to a view's event stream: a browser
// that has not taken anything for this long is dropped, which frees its
// connection (its mailbox conflated meanwhile, so ingest never waited).
const viewWriteTimeout = 10 * time.Second

// viewKeepalive is how often an idle event stream gets a comment line, so
// that a browser that went away is noticed by the failing write.
const viewKeepalive = 15 * time.Second

// viewHandler serves the live view: the page at "/" and the server-sent
// events at "/events"; anything else is 404. With a token, both need it
// (as a bearer token, or as the password of HTTP basic authentication,
// which a browser asks for and then sends with the event stream too).
func viewHandler(srv *server.Server, token string) http.Handler {
	mux := http.NewServeMux()
	mux.HandleFunc("GET /{$}", func(w http.ResponseWriter, _ *http.Request) {
		h := w.Header()
		h.Set("Content-Type", "text/html; charset=utf-8")
		h.Set("Cache-Control", "no-store")
		h.Set("Content-Security-Policy", "default-src 'none'; script-src 'unsafe-inline'; style-src 'unsafe-inline'; connect-src 'self'")
		w.Write(viewPage)
	})
	mux.HandleFunc("GET /events", func(w http.ResponseWriter, r *http.Request) { streamView(w, r, srv) })
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if token != "" && !viewAuthorized(r.Header.Get("Authorization"), token) {
			w.Header().Set("WWW-Authenticate", `Basic realm="reckon live view", charset="UTF-8"`)
			http.Error(w, "authorization: a valid bearer token (or basic authentication with the token as password) is required", http.StatusUnauthorized)
			return
		}
		mux.ServeHTTP(w, r)
	})
}

// viewAuthorized tells whether an Authorization header carries the token:
// "Bearer <token>", or "Basic" with the token as password (any user).
func viewAuthorized(header, token string) bool {
	if bearerOK(header, token) {
		return true
	}
	enc, ok := strings.CutPrefix(header, "Basic ")
	if !ok {
		return false
	}
	b, err := base64.StdEncoding.DecodeString(enc)
	if err != nil {
		return false
	}
	_, pass, ok := strings.Cut(string(b), ":")
	return ok && subtle.ConstantTimeCompare([]byte(pass), []byte(token)) == 1
}

// bearerOK tells whether an authorization value is "Bearer <token>".
func bearerOK(v, token string) bool {
	got, ok := strings.CutPrefix(v, "Bearer ")
	return ok && subtle.ConstantTimeCompare([]byte(got), []byte(token)) == 1
}

// streamView sends the robots' updates as server-sent events (the HTML
// living standard, "Server-sent events"): one "robot" event per robot and
// read, its data one JSON object (viewUpdate). The live view conflates
// while a write waits, so a slow browser gets fewer, newer updates.
func streamView(w http.ResponseWriter, r *http.Request, srv *server.Server) {
	live, err := srv.OpenLive()
	if err != nil {
		http.Error(w, status.Convert(err).Message(), http.StatusServiceUnavailable)
		return
	}
	defer live.Close()
	rc := http.NewResponseController(w)
	h := w.Header()
	h.Set("Content-Type", "text/event-stream")
	h.Set("Cache-Control", "no-store")
	h.Set("X-Content-Type-Options", "nosniff")
	send := func(b []byte) bool {
		rc.SetWriteDeadline(time.Now().Add(viewWriteTimeout))
		if _, err := w.Write(b); err != nil {
			return false
		}
		return rc.Flush() == nil
	}
	// A browser reconnects 2 s after losing the stream.
	if !send([]byte("retry: 2000\n\n")) {
		return
	}
	keep := time.NewTicker(viewKeepalive)
	defer keep.Stop()
	done := live.Done()
	var buf []byte
	for {
		select {
		case <-r.Context().Done():
			return
		case <-done:
			return
		case <-keep.C:
			if !send([]byte(": keepalive\n\n")) {
				return
			}
			continue
		case <-live.Notify():
		}
		buf = buf[:0]
		for _, u := range live.Take() {
			b, err := json.Marshal(viewUpdateOf(u))
			if err != nil {
				panic(err) // viewUpdate has no type json cannot encode
			}
			buf = append(buf, "event: robot\ndata: "...)
			buf = append(append(buf, b...), "\n\n"...)
		}
		if len(buf) > 0 && !send(buf) {
			return
		}
	}
}

// viewUpdate is one robot's update as the page reads it: labels as
// everywhere (the lowercase suffix of the wire enum value), field frame,
// metres, radians, nanoseconds.
type viewUpdate struct {
	Robot         string      `json:"robot"`
	Gone          bool        `json:"gone,omitempty"`
	State         string      `json:"state,omitempty"`
	Pose          *viewPose   `json:"pose,omitempty"`
	Events        []viewEvent `json:"events,omitempty"`
	Fixes         []viewFix   `json:"fixes,omitempty"`
	Skipped       uint64      `json:"skipped,omitempty"`
	EventsDropped uint64      `json:"events_dropped,omitempty"`
	FixesDropped  uint64      `json:"fixes_dropped,omitempty"`
}

// viewPose is a fused pose; Cov is (xx, xy, yy) of the position
// covariance, m^2.
type viewPose struct {
	StampNs       int64      `json:"stamp_ns"`
	XM            float64    `json:"x_m"`
	YM            float64    `json:"y_m"`
	HeadingRad    float64    `json:"heading_rad"`
	Cov           [3]float64 `json:"cov_m2"`
	Position95M   float64    `json:"position95_m"`
	HeadingStdRad float64    `json:"heading_std_rad"`
	ForwardMPerS  float64    `json:"forward_m_per_s"`
	Trusted       bool       `json:"trusted"`
	Distrust      []string   `json:"distrust"`
	Sequence      uint64     `json:"sequence"`
}

type viewEvent struct {
	Kind     string  `json:"kind"`
	StampNs  int64   `json:"stamp_ns"`
	SensorID string  `json:"sensor_id,omitempty"`
	Value    float64 `json:"value"`
	Detail   string  `json:"detail,omitempty"`
}

type viewFix struct {
	StampNs  int64   `json:"stamp_ns"`
	SensorID string  `json:"sensor_id"`
	XM       float64 `json:"x_m"`
	YM       float64 `json:"y_m"`
	Position bool    `json:"position"`
	Verdict  string  `json:"verdict"`
}

func viewUpdateOf(u server.LiveUpdate) viewUpdate {
	out := viewUpdate{Robot: u.Robot, Gone: u.Gone, Skipped: u.Skipped, EventsDropped: u.EventsDropped, FixesDropped: u.FixesDropped}
	if u.Gone {
		return out
	}
	out.State = convert.RobotStateName(u.State)
	if p := u.Pose; p != nil {
		vp := &viewPose{StampNs: p.GetStampNs(), XM: p.GetPose().GetXM(), YM: p.GetPose().GetYM(), HeadingRad: p.GetPose().GetHeadingRad(),
			Position95M: p.GetPosition95M(), HeadingStdRad: p.GetHeadingStdRad(), ForwardMPerS: p.GetVelocity().GetForwardMPerS(),
			Trusted: p.GetTrusted(), Distrust: []string{}, Sequence: p.GetSequence()}
		if c := p.GetCovariance(); c.GetDimension() == 3 && len(c.GetValues()) == 9 {
			vp.Cov = [3]float64{c.Values[0], c.Values[1], c.Values[4]}
		}
		for _, d := range p.GetDistrust() {
			vp.Distrust = append(vp.Distrust, convert.DistrustName(d))
		}
		out.Pose = vp
	}
	for _, e := range u.Events {
		out.Events = append(out.Events, viewEvent{Kind: convert.EventName(e.GetKind()), StampNs: e.GetStampNs(), SensorID: e.GetSensorId(), Value: finite(e.GetValue()), Detail: e.GetDetail()})
	}
	for _, f := range u.Fixes {
		out.Fixes = append(out.Fixes, viewFix{StampNs: f.StampNs, SensorID: f.SensorID, XM: f.XM, YM: f.YM, Position: f.HasPosition, Verdict: convert.VerdictName(f.Verdict)})
	}
	return out
}

// finite returns v, or 0 for a value JSON cannot carry (an event's value
// is a number for people to read).
func finite(v float64) float64 {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return 0
	}
	return v
}

// startView serves the live view if dc.ViewListen is set, over TLS when
// the service has a certificate; it returns the HTTP server (nil if off)
// and its address. Its connections are bounded
// (server.LimitHTTPConnections), apart from the metrics'.
func startView(dc *Config, srv *server.Server) (*http.Server, string, error) {
	if dc.ViewListen == "" {
		return nil, "", nil
	}
	vl, err := net.Listen("tcp", dc.ViewListen)
	if err != nil {
		return nil, "", fmt.Errorf("view: %w", err)
	}
	hsrv := &http.Server{Handler: viewHandler(srv, dc.Token), ReadHeaderTimeout: 5 * time.Second, IdleTimeout: time.Minute,
		ErrorLog: httpErrorLog(dc.Logger, "view")}
	limited := srv.LimitHTTPConnections(vl, "view")
	serve := func() error { return hsrv.Serve(limited) }
	if dc.TLSCert != "" {
		tc, err := LoadTLS(dc.TLSCert, dc.TLSKey, dc.TLSClientCA)
		if err != nil {
			limited.Close()
			return nil, "", err
		}
		hsrv.TLSConfig = tc
		serve = func() error { return hsrv.ServeTLS(limited, "", "") }
	}
	go func() {
		if err := serve(); err != nil && !errors.Is(err, http.ErrServerClosed) {
			dc.Logger.Error("view server", "err", err)
		}
	}()
	return hsrv, vl.Addr().String(), nil
}
