package fusiontest

import (
	"fmt"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// TrustEpisode is a stretch of time during which the estimate was reported
// trusted while its true error lay outside its 99.9% region.
type TrustEpisode struct {
	StartNs, EndNs int64
}

// Seconds is the episode's length.
func (e TrustEpisode) Seconds() float64 { return float64(e.EndNs-e.StartNs) * 1e-9 }

// TrustReport is what a TrustMonitor measured, from truth, about the trust
// flag (DEVELOPERS.md, "Design: Trust"). Reports of several runs add with
// Add.
type TrustReport struct {
	// SimulatedS is the time covered by the observed estimates, seconds.
	SimulatedS float64
	// TrustedS is the part of it during which the estimate was trusted.
	TrustedS float64
	// ViolationS is the part during which the estimate was trusted while
	// its pose NEES exceeded the 3-dof chi-square 99.9% quantile (16.27).
	ViolationS float64
	// Episodes are the violations, each a stretch of consecutive
	// observations.
	Episodes []TrustEpisode
}

// Add adds o's times and episodes to the report.
func (r *TrustReport) Add(o TrustReport) {
	r.SimulatedS += o.SimulatedS
	r.TrustedS += o.TrustedS
	r.ViolationS += o.ViolationS
	r.Episodes = append(r.Episodes, o.Episodes...)
}

// LongestS is the longest episode in seconds (0 without any).
func (r *TrustReport) LongestS() float64 {
	var m float64
	for _, e := range r.Episodes {
		m = max(m, e.Seconds())
	}
	return m
}

// Over counts the episodes longer than limitS seconds.
func (r *TrustReport) Over(limitS float64) int {
	n := 0
	for _, e := range r.Episodes {
		if e.Seconds() > limitS {
			n++
		}
	}
	return n
}

// String summarises the report for a test log.
func (r *TrustReport) String() string {
	return fmt.Sprintf("%.1f simulated s, trusted %.1f%%, trusted while outside the 99.9%% region %.2f s in %d episodes (longest %.3f s, %d over 0.2 s)",
		r.SimulatedS, 100*r.TrustedS/max(r.SimulatedS, 1e-300), r.ViolationS, len(r.Episodes), r.LongestS(), r.Over(0.2))
}

// TrustMonitor measures the trust flag against truth. Each observation is
// an estimate with the truth at its stamp, in stamp order; an observation
// stands for the time until the next one.
type TrustMonitor struct {
	limit   float64 // NEES above which the truth is outside the 99.9% region
	rep     TrustReport
	started bool
	lastNs  int64
	lastBad bool // the last observation was trusted and outside
	trusted bool
	epStart int64
}

// NewTrustMonitor returns a monitor with the 3-dof chi-square 99.9%
// quantile of the pose NEES (gonum stat/distuv) as the region's edge.
func NewTrustMonitor() *TrustMonitor {
	return &TrustMonitor{limit: distuv.ChiSquared{K: 3}.Quantile(0.999)}
}

// Observe takes the estimate p and the truth at p's stamp. It fails when
// p's covariance is not positive definite or stamps run backwards.
func (m *TrustMonitor) Observe(p fusion.FusedPose, truth estimator.Pose) error {
	if m.started && p.StampNs < m.lastNs {
		return fmt.Errorf("stamp %d before %d", p.StampNs, m.lastNs)
	}
	q, err := estimator.PoseNEES(p.Pose, &p.Cov, truth)
	if err != nil {
		return fmt.Errorf("estimate at %d: %w", p.StampNs, err)
	}
	m.advance(p.StampNs)
	bad := p.Trusted() && q > m.limit
	if bad && !m.lastBad {
		m.epStart = p.StampNs
	}
	if !bad && m.lastBad {
		m.rep.Episodes = append(m.rep.Episodes, TrustEpisode{m.epStart, p.StampNs})
	}
	m.started, m.lastNs, m.lastBad, m.trusted = true, p.StampNs, bad, p.Trusted()
	return nil
}

// advance credits the time from the last observation to t to its state.
func (m *TrustMonitor) advance(t int64) {
	if !m.started {
		return
	}
	dt := float64(t-m.lastNs) * 1e-9
	m.rep.SimulatedS += dt
	if m.trusted {
		m.rep.TrustedS += dt
	}
	if m.lastBad {
		m.rep.ViolationS += dt
	}
}

// Report returns what was measured; an episode still open ends at the last
// observation.
func (m *TrustMonitor) Report() TrustReport {
	r := m.rep
	r.Episodes = append([]TrustEpisode(nil), r.Episodes...)
	if m.lastBad && m.lastNs > m.epStart {
		r.Episodes = append(r.Episodes, TrustEpisode{m.epStart, m.lastNs})
	}
	return r
}

// TrustViolations runs sc through a robot configured by config (for
// instance (*Sim).Config) and measures the trust flag from truth: after
// every odometry sample, the estimate at the newest odometry against the
// truth at its stamp.
func TrustViolations(sc Scenario, config func(*Sim) fusion.Config) (TrustReport, error) {
	s := New(sc)
	r, err := fusion.New(config(s))
	if err != nil {
		return TrustReport{}, err
	}
	m := NewTrustMonitor()
	for {
		in, ok := s.Next()
		if !ok {
			return m.Report(), nil
		}
		Feed(r, &in)
		if in.Odometry == nil || r.NewestNs() != in.Odometry.StampNs {
			continue
		}
		if err := m.Observe(r.Pose(), in.Truth); err != nil {
			return m.Report(), fmt.Errorf("seed %d: %w", sc.Seed, err)
		}
	}
}
