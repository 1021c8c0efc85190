package review

import (
	"fmt"
	"math"
	"sort"
	"strings"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// Problem is one thing a review found wrong, with the moment to look at.
type Problem struct {
	// Kind is one of "sensor" (a sensor disagrees with the estimate),
	// "slip", "gap" (no input for a while, or inputs lost from the
	// journal), "refused" (fixes refused in a row), "distrust" (the
	// estimate was not to be trusted) and "moved" (moved by hand).
	Kind string
	// AtNs is the stamp of the moment to look at.
	AtNs int64
	// Text is one sentence that says what and why.
	Text string
	// weight ranks problems of one kind (longer or more is worse).
	weight float64
}

// maxPerKind bounds the sentences of one kind; the rest are counted in
// one more.
const maxPerKind = 8

// clusterGapNs joins problems of one kind less than this apart into one
// sentence.
const clusterGapNs = 5e9

// clusters groups time-ordered intervals less than clusterGapNs apart.
func clusters(ivs []Interval) [][]Interval {
	var out [][]Interval
	for i, iv := range ivs {
		if i > 0 && iv.FromNs-ivs[i-1].ToNs < clusterGapNs {
			out[len(out)-1] = append(out[len(out)-1], iv)
			continue
		}
		out = append(out, []Interval{iv})
	}
	return out
}

// details lists the different details of intervals, in order.
func details(ivs []Interval) string {
	var ds []string
	seen := map[string]bool{}
	for _, iv := range ivs {
		if !seen[iv.Detail] {
			seen[iv.Detail] = true
			ds = append(ds, iv.Detail)
		}
	}
	return strings.Join(ds, "; ")
}

// Problems lists what the review found wrong, one sentence each, in time
// order.
func (run *Run) Problems() []Problem {
	s := &run.Summary
	var out []Problem
	weight := 0.0
	add := func(kind string, at int64, format string, args ...any) {
		out = append(out, Problem{kind, at, fmt.Sprintf(format, args...), weight})
	}
	for _, ss := range s.Sensors {
		id := ss.GetSensorId()
		c := ss.GetCounts()
		switch ss.GetVerdict() {
		case pb.ConsistencyVerdict_CONSISTENCY_VERDICT_OVERCONFIDENT:
			weight = 0
			refused := ""
			if c.GetGated() > 0 {
				refused = fmt.Sprintf(", and the gate refused %d more", c.GetGated())
			}
			add("sensor", run.worstNIS(id),
				"The %s disagrees with the estimate (overconfident): its mean NIS over %d applied inputs is %.2f against a 95%% band of %.2f to %.2f%s; its stated noise is too small, or it is mounted, wired or calibrated wrongly.",
				id, c.GetApplied(), ss.GetMeanNis(), ss.GetBandLow(), ss.GetBandHigh(), refused)
		case pb.ConsistencyVerdict_CONSISTENCY_VERDICT_UNDERCONFIDENT:
			add("sensor", run.worstNIS(id),
				"The %s agrees with the estimate better than its stated noise allows (underconfident): its mean NIS over %d applied inputs is %.2f, below its 95%% band of %.2f to %.2f; its covariance could be smaller.",
				id, c.GetApplied(), ss.GetMeanNis(), ss.GetBandLow(), ss.GetBandHigh())
		}
	}
	var slips []Interval
	for _, at := range s.SlipsAt {
		slips = append(slips, Interval{at, at, ""})
	}
	for _, c := range clusters(slips) {
		weight = float64(len(c))
		if len(c) == 1 {
			add("slip", c[0].FromNs, "A wheel slipped at %.1f s: the wheels' turn and the IMU's disagreed, and the estimate's uncertainty grew to match.", run.ts(c[0].FromNs))
			continue
		}
		add("slip", c[0].FromNs, "Wheel slips were suspected %d times from %.1f to %.1f s: the wheels' turn and the IMU's kept disagreeing (slipping wheels, or an IMU whose sign or axis is wrong).",
			len(c), run.ts(c[0].FromNs), run.ts(c[len(c)-1].ToNs))
	}
	if s.Slips > len(s.SlipsAt) {
		add("slip", s.SlipsAt[len(s.SlipsAt)-1], "%d more wheel slips were suspected after %.1f s.", s.Slips-len(s.SlipsAt), run.ts(s.SlipsAt[len(s.SlipsAt)-1]))
	}
	for _, g := range s.InputGaps {
		weight = secs(g.ToNs - g.FromNs)
		add("gap", g.FromNs, "No input arrived for %.1f s, from %.1f to %.1f s; the estimate only predicted meanwhile.", secs(g.ToNs-g.FromNs), run.ts(g.FromNs), run.ts(g.ToNs))
	}
	for i, g := range s.Gaps {
		at := s.StartNs
		if i < len(s.GapsAt) {
			at = s.GapsAt[i]
		}
		add("gap", at, "The journal lost inputs after %.1f s (%s); the review goes on past the gap.", run.ts(at), g)
	}
	for _, r := range s.RefusedStretches {
		weight = secs(r.ToNs - r.FromNs)
		add("refused", r.FromNs, "%s, from %.1f to %.1f s: the estimate and that sensor disagreed for %.1f s.", upperFirst(r.Detail), run.ts(r.FromNs), run.ts(r.ToNs), secs(r.ToNs-r.FromNs))
	}
	for _, c := range clusters(s.Distrust) {
		weight = 0
		for _, d := range c {
			weight += secs(d.ToNs - d.FromNs)
		}
		if len(c) == 1 {
			d := c[0]
			add("distrust", d.FromNs, "The estimate was not to be trusted from %.1f to %.1f s (%.1f s): %s.", run.ts(d.FromNs), run.ts(d.ToNs), secs(d.ToNs-d.FromNs), d.Detail)
			continue
		}
		var total int64
		for _, d := range c {
			total += d.ToNs - d.FromNs
		}
		add("distrust", c[0].FromNs, "The estimate was not to be trusted %d times from %.1f to %.1f s (%.1f s in all): %s.",
			len(c), run.ts(c[0].FromNs), run.ts(c[len(c)-1].ToNs), secs(total), details(c))
	}
	for _, c := range clusters(s.Recoveries) {
		weight = float64(len(c))
		if len(c) == 1 {
			add("moved", c[0].FromNs, "The robot was moved by hand at %.1f s and the estimate recovered: %s.", run.ts(c[0].FromNs), c[0].Detail)
			continue
		}
		add("moved", c[0].FromNs, "The estimate was re-initialised from the fixes %d times from %.1f to %.1f s, as after a move by hand; so many in a row point to a sensor that misleads the estimate rather than to moves (the first: %s).",
			len(c), run.ts(c[0].FromNs), run.ts(c[len(c)-1].ToNs), c[0].Detail)
	}
	out = worst(out)
	sort.SliceStable(out, func(i, j int) bool { return out[i].AtNs < out[j].AtNs })
	return out
}

// worst keeps the maxPerKind heaviest problems of each kind, and one more
// sentence for the rest of a kind, at the first of them.
func worst(ps []Problem) []Problem {
	byKind := map[string][]Problem{}
	var kinds []string
	for _, p := range ps {
		if byKind[p.Kind] == nil {
			kinds = append(kinds, p.Kind)
		}
		byKind[p.Kind] = append(byKind[p.Kind], p)
	}
	var out []Problem
	for _, k := range kinds {
		v := byKind[k]
		if len(v) <= maxPerKind {
			out = append(out, v...)
			continue
		}
		sort.SliceStable(v, func(i, j int) bool { return v[i].weight > v[j].weight })
		rest := v[maxPerKind:]
		first := rest[0].AtNs
		for _, p := range rest {
			first = min(first, p.AtNs)
		}
		out = append(out, v[:maxPerKind]...)
		out = append(out, Problem{Kind: k, AtNs: first, Text: fmt.Sprintf("%d more problems of this kind (%s), lighter than those above, the first at the time given; the figures mark them all.", len(rest), kindNames[k])})
	}
	return out
}

// kindNames says what each kind of problem is, for the sentence that
// counts the rest.
var kindNames = map[string]string{
	"sensor":   "sensors that disagree",
	"slip":     "wheel slips",
	"gap":      "gaps",
	"refused":  "fixes refused in a row",
	"distrust": "stretches not to be trusted",
	"moved":    "moves by hand",
}

// worstNIS returns the moment to look at for a sensor that disagrees: its
// first refused input, or its largest NIS.
func (run *Run) worstNIS(sensor string) int64 {
	at, worst := run.Summary.StartNs, math.Inf(-1)
	for _, n := range run.NIS[sensor] {
		if n.Refused {
			return n.StampNs
		}
		if n.NIS > worst {
			at, worst = n.StampNs, n.NIS
		}
	}
	return at
}

func upperFirst(s string) string {
	if s == "" {
		return s
	}
	return strings.ToUpper(s[:1]) + s[1:]
}

// refusedFixes counts the fixes refused in the end (gated, too old or
// invalid).
func (s *Summary) refusedFixes() int {
	n := 0
	for k, v := range s.Fixes {
		if k != convert.VerdictName(pb.Verdict_VERDICT_APPLIED) && k != convert.VerdictName(pb.Verdict_VERDICT_HELD) {
			n += v
		}
	}
	return n
}

// untrustedNs is the time the estimate was not to be trusted.
func (s *Summary) untrustedNs() int64 {
	var t int64
	for _, d := range s.Distrust {
		t += d.ToNs - d.FromNs
	}
	return t
}
