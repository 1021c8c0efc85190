package server

import (
	"net/http"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"google.golang.org/grpc/codes"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// Metrics are the server's Prometheus metrics on a registry of their own.
// A nil *Metrics records nothing.
type Metrics struct {
	reg      *prometheus.Registry
	inputs   *prometheus.CounterVec
	refusals *prometheus.CounterVec
	latency  prometheus.Histogram
	watching prometheus.Gauge
	count    prometheus.Gauge
	torn     prometheus.Counter
	pausedG  prometheus.Gauge
	quarG    prometheus.Gauge
	dups     prometheus.Counter
	diverged prometheus.Counter
	viewers  prometheus.Gauge
	viewConf prometheus.Counter
	conns    prometheus.Gauge
	connRef  prometheus.Counter
	httpConn *prometheus.GaugeVec
	httpRef  *prometheus.CounterVec
	waits    prometheus.Counter
	// pending is the budget that reckon_ingest_pending_bytes reads, the
	// last server's made with these metrics.
	pending  atomic.Pointer[pendingBudget]
	perRobot robotVecs
}

// NewMetrics makes the metrics.
func NewMetrics() *Metrics {
	m := &Metrics{
		reg: prometheus.NewRegistry(),
		inputs: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "reckon_inputs_total",
			Help: "Inputs taken by the robots, by verdict."}, []string{"verdict"}),
		refusals: prometheus.NewCounterVec(prometheus.CounterOpts{Name: "reckon_inputs_refused_total",
			Help: "Inputs refused before a robot took them (malformed, failing its checks, unknown robot), by status code."}, []string{"code"}),
		latency: prometheus.NewHistogram(prometheus.HistogramOpts{Name: "reckon_ingest_seconds",
			Help: "Time from receiving an input to its verdict, journal included.", Buckets: prometheus.ExponentialBuckets(5e-6, 2, 16)}),
		watching: prometheus.NewGauge(prometheus.GaugeOpts{Name: "reckon_watchers", Help: "Open watch streams."}),
		count:    prometheus.NewGauge(prometheus.GaugeOpts{Name: "reckon_robots", Help: "Robots served."}),
		torn:     prometheus.NewCounter(prometheus.CounterOpts{Name: "reckon_journal_torn_total", Help: "Torn journal tails dropped on restore."}),
	}
	m.pausedG = prometheus.NewGauge(prometheus.GaugeOpts{Name: "reckon_robots_paused", Help: "Robots paused because their journal's disk is full."})
	m.quarG = prometheus.NewGauge(prometheus.GaugeOpts{Name: "reckon_robots_quarantined", Help: "Robots quarantined because their journal could not be restored or written."})
	m.dups = prometheus.NewCounter(prometheus.CounterOpts{Name: "reckon_inputs_duplicate_total", Help: "Retried inputs answered with their original verdict, not applied again."})
	m.diverged = prometheus.NewCounter(prometheus.CounterOpts{Name: "reckon_restore_outputs_differing_total", Help: "Journaled outputs of an older build that differ on replay by this build."})
	m.viewers = prometheus.NewGauge(prometheus.GaugeOpts{Name: "reckon_viewers", Help: "Open live views (event streams of the live view page)."})
	m.viewConf = prometheus.NewCounter(prometheus.CounterOpts{Name: "reckon_view_updates_conflated_total",
		Help: "Live view updates replaced by a newer one before their view took them (a slow or stuck page)."})
	m.conns = prometheus.NewGauge(prometheus.GaugeOpts{Name: "reckon_connections", Help: "Open gRPC connections (Server.LimitConnections)."})
	m.connRef = prometheus.NewCounter(prometheus.CounterOpts{Name: "reckon_connections_refused_total",
		Help: "Connections closed at once because -max-connections were open."})
	m.httpConn = prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: "reckon_http_connections",
		Help: "Open connections of the metrics and live view HTTP servers (Server.LimitHTTPConnections), by server."}, []string{"server"})
	m.httpRef = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "reckon_http_connections_refused_total",
		Help: "Connections of an HTTP server closed at once because -max-http-connections of its were open, by server."}, []string{"server"})
	m.waits = prometheus.NewCounter(prometheus.CounterOpts{Name: "reckon_ingest_receive_waits_total",
		Help: "Times an ingest stream waited before receiving more because -max-pending-bytes of received samples waited to be taken (its client's sends blocked meanwhile)."})
	pendingG := prometheus.NewGaugeFunc(prometheus.GaugeOpts{Name: "reckon_ingest_pending_bytes",
		Help: "Bytes of ingest requests received and not yet taken, all streams together (bounded by -max-pending-bytes plus one request a stream)."},
		func() float64 {
			if g := m.pending.Load(); g != nil {
				return float64(g.used.Load())
			}
			return 0
		})
	m.perRobot = newRobotVecs()
	m.reg.MustRegister(m.inputs, m.refusals, m.latency, m.watching, m.count, m.torn, m.pausedG, m.quarG, m.dups, m.diverged, m.viewers, m.viewConf,
		m.conns, m.connRef, m.httpConn, m.httpRef, m.waits, pendingG,
		prometheus.NewGoCollector(), prometheus.NewProcessCollector(prometheus.ProcessCollectorOpts{}))
	m.reg.MustRegister(m.perRobot.collectors()...)
	return m
}

// Handler serves the metrics in the Prometheus text format.
func (m *Metrics) Handler() http.Handler { return promhttp.HandlerFor(m.reg, promhttp.HandlerOpts{}) }

func (m *Metrics) verdict(v pb.Verdict, d time.Duration) {
	if m == nil {
		return
	}
	m.inputs.WithLabelValues(convert.VerdictName(v)).Inc()
	m.latency.Observe(d.Seconds())
}

// pendingBytes makes reckon_ingest_pending_bytes read g.
func (m *Metrics) pendingBytes(g *pendingBudget) {
	if m != nil {
		m.pending.Store(g)
	}
}

// pendingWait counts a receiver's wait at -max-pending-bytes.
func (m *Metrics) pendingWait() {
	if m != nil {
		m.waits.Inc()
	}
}

func (m *Metrics) refused(c codes.Code) {
	if m != nil {
		m.refusals.WithLabelValues(c.String()).Inc()
	}
}

func (m *Metrics) watchers(d float64) {
	if m != nil {
		m.watching.Add(d)
	}
}

func (m *Metrics) robots(n int) {
	if m != nil {
		m.count.Set(float64(n))
	}
}

func (m *Metrics) tornTail() {
	if m != nil {
		m.torn.Inc()
	}
}

func (m *Metrics) paused(d float64) {
	if m != nil {
		m.pausedG.Add(d)
	}
}

func (m *Metrics) quarantined(d float64) {
	if m != nil {
		m.quarG.Add(d)
	}
}

func (m *Metrics) duplicate() {
	if m != nil {
		m.dups.Inc()
	}
}

func (m *Metrics) differing(n int) {
	if m != nil {
		m.diverged.Add(float64(n))
	}
}

func (m *Metrics) views(n int) {
	if m != nil {
		m.viewers.Set(float64(n))
	}
}

func (m *Metrics) viewConflated() {
	if m != nil {
		m.viewConf.Inc()
	}
}

func (m *Metrics) connections(n int) {
	if m != nil {
		m.conns.Set(float64(n))
	}
}

func (m *Metrics) connectionRefused() {
	if m != nil {
		m.connRef.Inc()
	}
}

func (m *Metrics) httpConnections(server string, n int) {
	if m != nil {
		m.httpConn.WithLabelValues(server).Set(float64(n))
	}
}

func (m *Metrics) httpConnectionRefused(server string) {
	if m != nil {
		m.httpRef.WithLabelValues(server).Inc()
	}
}
