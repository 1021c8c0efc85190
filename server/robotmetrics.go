package server

import (
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
)

// robotVecs are the per-robot series (label robot, the resource name;
// sensor for the NIS).
type robotVecs struct {
	trusted, position95, headingStd *prometheus.GaugeVec
	nis                             *prometheus.GaugeVec
	slips, gaps, held, journalLag   *prometheus.GaugeVec
	run                             *prometheus.GaugeVec
	historyDamage                   *prometheus.GaugeVec
}

func newRobotVecs() robotVecs {
	g := func(name, help string, labels ...string) *prometheus.GaugeVec {
		return prometheus.NewGaugeVec(prometheus.GaugeOpts{Name: name, Help: help}, append([]string{"robot"}, labels...))
	}
	return robotVecs{
		trusted:    g("reckon_robot_trusted", "1 when no reason to distrust the robot's estimate is known, else 0."),
		position95: g("reckon_robot_position95_meters", "Major semi-axis of the estimate's 95% position ellipse, metres."),
		headingStd: g("reckon_robot_heading_std_radians", "Standard deviation of the estimate's heading, radians."),
		nis: g("reckon_robot_nis_mean", "Running mean NIS of the sensor's applied fixes (a consistent ungated sensor averages its dimension).",
			"sensor"),
		slips:         g("reckon_robot_slips", "Wheel slips suspected since the robot was created (its statistics)."),
		gaps:          g("reckon_robot_odometry_gaps", "Odometry gaps since the robot was created (its statistics)."),
		held:          g("reckon_robot_held_inputs", "Inputs held now, waiting for odometry to reach their stamp."),
		run:           g("reckon_robot_run", "The robot's current run, from 1: a controller restart (a run start) begins the next."),
		historyDamage: g("reckon_robot_history_damage", "Damage found in the robot's journal history before the snapshot it was restored from, by the verification after the last restart: the problems found, 0 when it read whole. Absent until that verification ends."),
		journalLag:    g("reckon_robot_journal_lag_seconds", "For the robot's last batch: seconds from the arrival of its first input to the end of their journal write (to the operating system; fsynced with it under -fsync each, else within the sync interval)."),
	}
}

func (v robotVecs) collectors() []prometheus.Collector {
	return []prometheus.Collector{v.trusted, v.position95, v.headingStd, v.nis, v.slips, v.gaps, v.held, v.journalLag, v.run, v.historyDamage}
}

// robotGauges are one robot's series, looked up once; the robot's mutex
// protects nis.
type robotGauges struct {
	trusted, position95, headingStd prometheus.Gauge
	slips, gaps, held, journalLag   prometheus.Gauge
	run                             prometheus.Gauge
	nis                             map[string]prometheus.Gauge
}

// robotGauges returns the series of the named robot.
func (m *Metrics) robotGauges(name string) *robotGauges {
	if m == nil {
		return nil
	}
	v := m.perRobot
	return &robotGauges{trusted: v.trusted.WithLabelValues(name), position95: v.position95.WithLabelValues(name),
		headingStd: v.headingStd.WithLabelValues(name), slips: v.slips.WithLabelValues(name), gaps: v.gaps.WithLabelValues(name),
		held: v.held.WithLabelValues(name), journalLag: v.journalLag.WithLabelValues(name), run: v.run.WithLabelValues(name),
		nis: map[string]prometheus.Gauge{}}
}

// forget removes a deleted robot's series.
func (m *Metrics) forget(name string) {
	if m == nil {
		return
	}
	for _, c := range m.perRobot.collectors() {
		c.(*prometheus.GaugeVec).DeletePartialMatch(prometheus.Labels{"robot": name})
	}
}

// historyDamage records what VerifyHistories found in the named robot's
// history: the number of problems, 0 when none.
func (m *Metrics) historyDamage(name string, problems int) {
	if m != nil {
		m.perRobot.historyDamage.WithLabelValues(name).Set(float64(problems))
	}
}

// observeRobot updates the robot's series from its estimate and statistics,
// once per batch; lag is its journal write's (negative: none). The caller
// holds r.mu.
func (s *Server) observeRobot(r *robot, pose *pb.FusedPose, lag time.Duration) {
	if s.opt.Metrics == nil || r.fr == nil {
		return
	}
	if r.gauges == nil {
		r.gauges = s.opt.Metrics.robotGauges(r.name)
	}
	g := r.gauges
	if pose == nil {
		pose = poseNow(r)
	}
	g.trusted.Set(boolGauge(pose.GetTrusted()))
	g.position95.Set(pose.GetPosition95M())
	g.headingStd.Set(pose.GetHeadingStdRad())
	st := r.fr.Stats()
	g.slips.Set(float64(st.Slips))
	g.gaps.Set(float64(st.Gaps))
	g.held.Set(float64(st.Held))
	g.run.Set(float64(r.fr.Run()))
	if lag >= 0 {
		g.journalLag.Set(lag.Seconds())
	}
	for _, ss := range st.Sensors {
		if ss.Applied == 0 {
			continue
		}
		ng := g.nis[ss.ID]
		if ng == nil {
			ng = s.opt.Metrics.perRobot.nis.WithLabelValues(r.name, ss.ID)
			g.nis[ss.ID] = ng
		}
		ng.Set(sensorNISMean(ss))
	}
}

// sensorNISMean is the mean NIS of a sensor's applied fixes.
func sensorNISMean(ss fusion.SensorStats) float64 { return ss.NISSum / float64(ss.Applied) }

func boolGauge(b bool) float64 {
	if b {
		return 1
	}
	return 0
}
