package fusion

import (
	"math"
	"reflect"
	"testing"

	"reckon/estimator"
)

// snapshot is everything that makes up a robot's estimate.
type snapshot struct {
	st      estimator.State
	ready   bool
	base    checkpoint
	baseT   int64
	newest  int64
	live    []entry
	held    []entry
	counts  []int64
	lastIMU *float64
}

func snap(r *Robot) snapshot {
	s := snapshot{st: r.f.State(), ready: r.ready, base: r.base, baseT: r.baseT, newest: r.newest,
		live: append([]entry(nil), r.live()...), held: append([]entry(nil), r.held...),
		counts: append([]int64(nil), r.lastCounts...)}
	if r.lastIMU != nil {
		v := *r.lastIMU
		s.lastIMU = &v
	}
	return s
}

func sameSnapshot(t *testing.T, what string, a, b snapshot) {
	t.Helper()
	if !reflect.DeepEqual(a, b) {
		t.Errorf("%s changed the robot: state %v -> %v, window %d -> %d entries, held %d -> %d",
			what, a.st.X, b.st.X, len(a.live), len(b.live), len(a.held), len(b.held))
	}
}

// checkFinitePD fails unless the robot's state is finite with a symmetric
// positive-definite covariance.
func checkFinitePD(t *testing.T, r *Robot) {
	t.Helper()
	st := r.f.State()
	for i := 0; i < st.N; i++ {
		if math.IsNaN(st.X[i]) || math.IsInf(st.X[i], 0) {
			t.Fatalf("state[%d] = %v", i, st.X[i])
		}
	}
	p := make([]float64, 0, 16)
	for i := 0; i < st.N; i++ {
		p = append(p, st.P[i*4:i*4+st.N]...)
	}
	if err := estimator.CheckCovariance(p, st.N); err != nil {
		t.Fatalf("covariance: %v", err)
	}
}
