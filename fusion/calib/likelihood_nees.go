package calib

import (
	"errors"
	"sort"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// StampedPose is a true pose at a stamp (ns, the robot's time base).
type StampedPose struct {
	StampNs int64
	Pose    estimator.Pose
}

// NEESSummary is the pose NEES of one replayed run against its truth.
type NEESSummary struct {
	// Count is how many filter steps the truth covered; Mean their mean
	// NEES (3 for a consistent filter); Outside the fraction above the
	// 3-dof chi-square quantile at 0.95 (5% for a consistent filter;
	// Bar-Shalom, Li and Kirubarajan 2001, sec. 5.4.2). One run's NEES are
	// correlated in time, so neither has the Monte Carlo band.
	Count         int
	Mean, Outside float64
}

// ErrNoTruth: the truth covers none of the run.
var ErrNoTruth = errors.New("the truth covers none of the run's steps")

// RunNEES replays the run under cfg (in stamp order, as the fit does) and
// returns the NEES of its filtered pose at every step that truth (sorted
// by stamp) brackets, the truth interpolated linearly (heading by its
// wrapped difference).
func RunNEES(cfg fusion.Config, inputs []RecordedInput, truth []StampedPose) (NEESSummary, error) {
	if err := cfg.Validate(); err != nil {
		return NEESSummary{}, err
	}
	p := newReplayer(cfg, inputs, nil)
	p.base.GateProbability = withDefaults(cfg).GateProbability
	r, err := fusion.New(p.base)
	if err != nil {
		return NEESSummary{}, err
	}
	r.CollectSteps()
	q95 := distuv.ChiSquared{K: 3}.Quantile(0.95)
	var s NEESSummary
	var outside int
	take := func(steps []fusion.Step) {
		for i := range steps {
			tp, ok := truthAt(truth, steps[i].StampNs)
			if !ok {
				continue
			}
			var cov [9]float64
			steps[i].Post.PoseCovarianceInto(&cov)
			v, err := estimator.PoseNEES(steps[i].Post.Pose(), &cov, tp)
			if err != nil {
				continue
			}
			s.Count++
			s.Mean += v
			if v > q95 {
				outside++
			}
		}
	}
	for k, i := range p.order {
		p.inputs[i].feed(r)
		if k%1024 == 0 {
			take(r.TakeSteps())
		}
	}
	take(r.FinishSteps())
	if s.Count == 0 {
		return s, ErrNoTruth
	}
	s.Mean /= float64(s.Count)
	s.Outside = float64(outside) / float64(s.Count)
	return s, nil
}

// truthAt interpolates truth at stamp; ok is false outside its span.
func truthAt(truth []StampedPose, stamp int64) (estimator.Pose, bool) {
	j := sort.Search(len(truth), func(i int) bool { return truth[i].StampNs >= stamp })
	switch {
	case j == len(truth):
		return estimator.Pose{}, false
	case truth[j].StampNs == stamp:
		return truth[j].Pose, true
	case j == 0:
		return estimator.Pose{}, false
	}
	a, b := truth[j-1], truth[j]
	f := float64(stamp-a.StampNs) / float64(b.StampNs-a.StampNs)
	return estimator.Pose{
		X:       a.Pose.X + f*(b.Pose.X-a.Pose.X),
		Y:       a.Pose.Y + f*(b.Pose.Y-a.Pose.Y),
		Heading: estimator.Wrap(a.Pose.Heading + f*estimator.Wrap(b.Pose.Heading-a.Pose.Heading)),
	}, true
}
