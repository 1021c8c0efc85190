package review

import (
	"math"
	"math/rand/v2"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// randomState returns a state of size k whose covariance is symmetric to
// the bit or not, with a negative zero and, if nan is set, a NaN in it.
func randomState(rng *rand.Rand, k int, symmetric, nan bool) estimator.State {
	x := make([]float64, k)
	p := make([]float64, k*k)
	for i := range x {
		x[i] = rng.NormFloat64()
	}
	for i := 0; i < k; i++ {
		for j := i; j < k; j++ {
			p[i*k+j] = rng.NormFloat64()
			p[j*k+i] = p[i*k+j]
			if !symmetric && i != j && i > 0 {
				p[j*k+i] = math.Nextafter(p[i*k+j], 1)
			}
		}
	}
	p[1], p[k] = math.Copysign(0, -1), math.Copysign(0, -1)
	if !symmetric {
		p[k] = 0
	}
	if nan {
		x[0] = math.NaN()
	}
	return estimator.NewState(k, 1<<estimator.IHead, x, p)
}

// bitsOf returns a state's size, angles, mean and covariance as bits.
func bitsOf(s *estimator.State) []uint64 {
	out := []uint64{uint64(s.Size()), uint64(s.Angles())}
	for i := 0; i < s.Size(); i++ {
		out = append(out, math.Float64bits(s.MeanAt(i)))
		for j := 0; j < s.Size(); j++ {
			out = append(out, math.Float64bits(s.At(i, j)))
		}
	}
	return out
}

func sameStateBits(a, b *estimator.State) bool {
	x, y := bitsOf(a), bitsOf(b)
	if len(x) != len(y) {
		return false
	}
	for i := range x {
		if x[i] != y[i] {
			return false
		}
	}
	return true
}

// TestStoresRoundTrip: steps and smoothed states come back from the
// compact files bit for bit, whatever their covariances (symmetric or not,
// negative zeros, NaN), with Post equal to Pred or not, and any Jacobian;
// over several chunks, read forwards and backwards.
func TestStoresRoundTrip(t *testing.T) {
	for _, k := range []int{3, 4, 7, estimator.MaxStates} {
		rng := rand.New(rand.NewPCG(uint64(k), 5))
		n := 2*chunk + 77
		steps := make([]fusion.Step, n)
		for i := range steps {
			s := &steps[i]
			s.StampNs = int64(i) * 5e6
			s.Start = i%1000 == 0
			s.Pred = randomState(rng, k, i%3 != 0, i%97 == 0)
			s.Post = s.Pred
			if i%2 == 0 {
				s.Post = randomState(rng, k, i%5 != 0, false)
			}
			for a := 0; a < k; a++ {
				s.F[a*estimator.MaxStates+a] = 1
				if i%7 == 0 {
					s.F[a*estimator.MaxStates+a] = math.Copysign(0, -1)
				}
			}
			s.F[0*estimator.MaxStates+2] = rng.NormFloat64()
			s.F[(k-1)*estimator.MaxStates+k-1] = 0.99
		}
		store := newStepStore(t.TempDir(), 1) // on disk from the first step
		states, err := newStateStore(t.TempDir(), n, k, true)
		if err != nil {
			t.Fatal(err)
		}
		for i := range steps {
			if err := store.add(&steps[i]); err != nil {
				t.Fatal(err)
			}
		}
		if err := store.flush(); err != nil {
			t.Fatal(err)
		}
		if !store.onDisk() || store.Len() != n {
			t.Fatalf("k %d: %d steps, on disk %v", k, store.Len(), store.onDisk())
		}
		check := func(i int, got *fusion.Step, postOnly bool) {
			want := &steps[i]
			if got.StampNs != want.StampNs || got.Start != want.Start || !sameStateBits(&got.Post, &want.Post) {
				t.Fatalf("k %d: step %d: stamp, start or Post differ", k, i)
			}
			if postOnly {
				return
			}
			if !sameStateBits(&got.Pred, &want.Pred) {
				t.Fatalf("k %d: step %d: Pred differs", k, i)
			}
			for a := range got.F {
				if math.Float64bits(got.F[a]) != math.Float64bits(want.F[a]) {
					t.Fatalf("k %d: step %d: F[%d] is %v, want %v", k, i, a, got.F[a], want.F[a])
				}
			}
		}
		var st fusion.Step
		for i := n - 1; i >= 0; i-- {
			if err := store.Step(i, &st); err != nil {
				t.Fatal(err)
			}
			check(i, &st, false)
			if err := states.SetSmoothed(i, &steps[i].Post); err != nil {
				t.Fatal(err)
			}
		}
		if err := states.flush(); err != nil {
			t.Fatal(err)
		}
		rd := store.reader()
		var s estimator.State
		for i := 0; i < n; i++ {
			var err error
			if st.StampNs, st.Start, err = rd.readPost(i, &st.Post); err != nil {
				t.Fatal(err)
			}
			check(i, &st, true)
			if err := states.get(i, &s); err != nil {
				t.Fatal(err)
			}
			if !sameStateBits(&s, &steps[i].Post) {
				t.Fatalf("k %d: smoothed state %d differs", k, i)
			}
		}
		store.close()
		states.close()
	}
}
