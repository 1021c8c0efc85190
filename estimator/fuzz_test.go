package estimator

import (
	"math"
	"testing"
)

// FuzzUpdate drives Predict and Update with arbitrary numbers. The oracle is
// the invariants: no panic, and after every call that returns without error
// the state is finite and its covariance symmetric positive definite.
func FuzzUpdate(f *testing.F) {
	f.Add(uint8(1), 0.1, 0.2, 0.3, 0.01, 0.005, 0.0, 0.001)
	f.Add(uint8(4), 2.0, 0.1, 0.0, 0.01, 0.01, 1e-9, 0.0)
	f.Add(uint8(7), 3.1, 0.0, 0.0, 1e-6, 0.0, 0.5, math.Pi)
	f.Add(uint8(129), 0.2, -0.1, 0.4, 1e-3, 0.1, 0.0, 0.2) // a biased, Huber-weighted pose fix
	f.Add(uint8(131), 8.0, 0.3, 0.0, 1e-4, 0.0, 0.0, 0.0)  // biased range and bearing, Student-t
	f.Fuzz(func(t *testing.T, kind uint8, z0, z1, z2, r, fwd, left, turn float64) {
		l := testLayout(12)
		x := []float64{0.5, -0.2, 0.1, 0, 1, 1, 0, 0, 0, 0, 0, 0}
		p := make([]float64, 144)
		for i := 0; i < 12; i++ {
			p[i*12+i] = 0.01
		}
		flt, err := NewFilter(&l, x, p)
		if err != nil {
			t.Fatal(err)
		}
		if finite(fwd) && finite(left) && finite(turn) && math.Abs(fwd)+math.Abs(left)+math.Abs(turn) < 1e3 {
			cu := [9]float64{math.Abs(fwd) * 1e-4, 0, 0, 0, math.Abs(fwd) * 1e-4, 0, 0, 0, math.Abs(turn) * 1e-4}
			q := [MaxStates]float64{IHead: 1e-8, IOffset: 1e-8}
			flt.Predict(Step{fwd, left, turn}, &cu, 0.01, &q)
			checkState(t, flt)
		}
		m := Measurement{Kind: Kinds()[int(kind)%len(Kinds())], Mount: Pose{0.1, 0, 0.2}, LandmarkX: 4, LandmarkY: 1}
		if kind >= 128 {
			m = biased(m)
		}
		m.Z = [3]float64{z0, z1, z2}
		d := m.Kind.Dim()
		for i := 0; i < d; i++ {
			m.R[i*3+i] = r
		}
		before := flt.State()
		if _, err := flt.Update(&m, NoGate()); err != nil {
			if flt.State() != before {
				t.Fatalf("failed update (%v) changed the state", err)
			}
			return
		}
		checkState(t, flt)
	})
}

func checkState(t *testing.T, f *Filter) {
	t.Helper()
	st := f.State()
	for i := 0; i < st.n; i++ {
		if !finite(st.x[i]) {
			t.Fatalf("state %d is %v", i, st.x[i])
		}
	}
	if err := CheckCovariance(flatP(&st), st.n); err != nil {
		t.Fatalf("covariance %v: %v", st.p, err)
	}
}
