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

// TestStoresRoundTrip: steps come back from the compact files bit for
// bit, whatever their covariances (symmetric or not, negative zeros, NaN),
// with Post equal to Pred or not, and any Jacobian; over several chunks,
// read forwards and backwards. The smoothed store gives each state's
// export row and pose covariance bit for bit, from memory and from its
// file, and the states drawn whole.
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
		const every = 100
		disk, err := newSmoothedRows(t.TempDir(), n, k, every, 0)
		if err != nil {
			t.Fatal(err)
		}
		mem, err := newSmoothedRows(t.TempDir(), n, k, every, int64(n)*rowBytes)
		if err != nil {
			t.Fatal(err)
		}
		if !disk.onDisk() || mem.onDisk() {
			t.Fatalf("k %d: on disk %v and %v", k, disk.onDisk(), mem.onDisk())
		}
		for i := range steps {
			if err := store.add(&steps[i], nil); err != nil {
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
			for _, sm := range []*smoothedRows{disk, mem} {
				if err := sm.SetSmoothed(i, &steps[i].Post); err != nil {
					t.Fatal(err)
				}
			}
		}
		for _, sm := range []*smoothedRows{disk, mem} {
			if err := sm.flush(); err != nil {
				t.Fatal(err)
			}
		}
		rd := store.reader()
		for i := 0; i < n; i++ {
			var err error
			if st.StampNs, st.Start, err = rd.readPost(i, &st.Post); err != nil {
				t.Fatal(err)
			}
			check(i, &st, true)
			want := rowOf(0, &steps[i].Post)
			var wantCov [9]float64
			steps[i].Post.PoseCovarianceInto(&wantCov)
			for _, sm := range []*smoothedRows{disk, mem} {
				var r trackRow
				var cov [9]float64
				if err := sm.row(i, &r, &cov); err != nil {
					t.Fatal(err)
				}
				for a := range r.v {
					if math.Float64bits(r.v[a]) != math.Float64bits(want.v[a]) {
						t.Fatalf("k %d, on disk %v: smoothed row %d: value %d is %v, want %v", k, sm.onDisk(), i, a, r.v[a], want.v[a])
					}
				}
				for a := range cov {
					if math.Float64bits(cov[a]) != math.Float64bits(wantCov[a]) {
						t.Fatalf("k %d, on disk %v: smoothed state %d: pose covariance %d is %v, want %v", k, sm.onDisk(), i, a, cov[a], wantCov[a])
					}
				}
				if r.offset != want.offset {
					t.Fatalf("k %d: smoothed row %d: offset %v", k, i, r.offset)
				}
				if whole := sm.state(i); (i%every == 0 || i == n-1) && (whole == nil || !sameStateBits(whole, &steps[i].Post)) {
					t.Fatalf("k %d, on disk %v: smoothed state %d not kept whole", k, sm.onDisk(), i)
				}
			}
		}
		store.close()
		disk.close()
		mem.close()
	}
}
