package review

import (
	"strings"
	"testing"
)

// TestProblems: problems of one kind close in time make one sentence, a
// kind keeps its heaviest sentences and counts the rest in one more, and
// the sentences come in time order.
func TestProblems(t *testing.T) {
	const s = int64(1e9)
	run := &Run{Summary: Summary{RunStartNs: 0, StartNs: 0, EndNs: 400 * s, Slips: 3, SlipsAt: []int64{10 * s, 11 * s, 12 * s}}}
	// Twenty stretches 20 s apart, each a second longer than the one
	// before: the eight longest are the last eight.
	for i := int64(0); i < 20; i++ {
		run.Summary.Distrust = append(run.Summary.Distrust, Interval{FromNs: 20 * i * s, ToNs: 20*i*s + (i+1)*s/10, Detail: "fix_disagrees"})
	}
	ps := run.Problems()
	var slips, distrust, rest []Problem
	for i, p := range ps {
		if i > 0 && p.AtNs < ps[i-1].AtNs {
			t.Errorf("problem %d at %d ns comes after one at %d ns", i, p.AtNs, ps[i-1].AtNs)
		}
		switch {
		case strings.Contains(p.Text, "more problems of this kind"):
			rest = append(rest, p)
		case p.Kind == "slip":
			slips = append(slips, p)
		case p.Kind == "distrust":
			distrust = append(distrust, p)
		}
	}
	if len(slips) != 1 || !strings.Contains(slips[0].Text, "3 times from 10.0 to 12.0 s") || slips[0].AtNs != 10*s {
		t.Errorf("slips: %+v", slips)
	}
	if len(distrust) != maxPerKind || distrust[0].AtNs != 20*12*s {
		t.Errorf("%d distrust sentences, the first at %d ns (want %d at %d)", len(distrust), distrust[0].AtNs, maxPerKind, 20*12*s)
	}
	if len(rest) != 1 || !strings.HasPrefix(rest[0].Text, "12 more") || rest[0].AtNs != 0 {
		t.Errorf("rest: %+v", rest)
	}
}
