package fusion

import (
	"math"
	"reflect"
	"testing"

	"reckon.example/estimator"
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
	// cps are the checkpoints of live and held entries, by value (the
	// entries name slots).
	cps []checkpoint
}

func snap(r *Robot) snapshot {
	s := snapshot{st: r.f.State(), ready: r.ready, base: r.base, baseT: r.baseT, newest: r.newest,
		live: append([]entry(nil), r.live()...), held: append([]entry(nil), r.held...),
		counts: append([]int64(nil), r.lastCounts...)}
	if r.lastIMU != nil {
		v := *r.lastIMU
		s.lastIMU = &v
	}
	for _, q := range [][]entry{s.live, s.held} {
		for i := range q {
			s.cps = append(s.cps, r.checkpointOf(&q[i].after))
		}
	}
	return s
}

func sameSnapshot(t *testing.T, what string, a, b snapshot) {
	t.Helper()
	if !reflect.DeepEqual(a, b) {
		t.Errorf("%s changed the robot: state %v -> %v, window %d -> %d entries, held %d -> %d",
			what, a.st.Mean().RawVector().Data, b.st.Mean().RawVector().Data, len(a.live), len(b.live), len(a.held), len(b.held))
	}
}

// checkFinitePD fails unless the robot's state is finite with a symmetric
// positive-definite covariance.
func checkFinitePD(t *testing.T, r *Robot) {
	t.Helper()
	st := r.f.State()
	n := st.Size()
	for i := 0; i < n; i++ {
		if math.IsNaN(st.MeanAt(i)) || math.IsInf(st.MeanAt(i), 0) {
			t.Fatalf("state[%d] = %v", i, st.MeanAt(i))
		}
	}
	p := make([]float64, n*n)
	st.CovarianceInto(p)
	if err := estimator.CheckCovariance(p, n); err != nil {
		t.Fatalf("covariance: %v", err)
	}
}

// TestEntryHoldsNoPointers: the history window is a slice of entries that
// the garbage collector need not scan and that moves without write
// barriers; an entry must not gain a pointer (errors live in Robot.errs).
func TestEntryHoldsNoPointers(t *testing.T) {
	var walk func(reflect.Type) bool
	walk = func(ty reflect.Type) bool {
		switch ty.Kind() {
		case reflect.Pointer, reflect.Interface, reflect.Slice, reflect.Map, reflect.String, reflect.Chan, reflect.Func, reflect.UnsafePointer:
			return true
		case reflect.Array:
			return walk(ty.Elem())
		case reflect.Struct:
			for i := 0; i < ty.NumField(); i++ {
				if walk(ty.Field(i).Type) {
					t.Logf("field %s.%s", ty.Name(), ty.Field(i).Name)
					return true
				}
			}
		}
		return false
	}
	if walk(reflect.TypeFor[entry]()) {
		t.Error("fusion.entry holds a pointer")
	}
}
