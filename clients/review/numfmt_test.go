package review

import (
	"math"
	"math/rand/v2"
	"strconv"
	"testing"
)

// TestAppendGEqualsStrconv: appendG writes every number as
// strconv.AppendFloat with 'g' and the same precision does (the standard
// library is the reference), for random bit patterns, magnitudes spread
// over the range it formats itself and past it, values next to powers of
// ten and to halves of the last digit (ties, which strconv rounds to even),
// and the special values.
func TestAppendGEqualsStrconv(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	n := 0
	check := func(v float64) {
		n++
		for _, prec := range []int{7, 10, 1, 3} {
			want := strconv.AppendFloat(nil, v, 'g', prec, 64)
			if got := appendG(nil, v, prec); string(got) != string(want) {
				t.Fatalf("%v (bits %#x) with %d digits: %q, want %q", v, math.Float64bits(v), prec, got, want)
			}
		}
	}
	for _, v := range []float64{0, math.Copysign(0, -1), math.NaN(), math.Inf(1), math.Inf(-1), 1, -1, 0.5, 1e-12, 1e21, 5e-324, math.MaxFloat64,
		9.9999995, 99999.995, 0.00012345675, 1234567.5, 1234568.5, 9999999.5, 0.0001, 0.00001, 123456789, 1e7, 1e10, 123456.7, 1234567, 12345678} {
		check(v)
		check(-v)
	}
	for i := 0; i < 200000; i++ {
		check(math.Float64frombits(rng.Uint64()))
		// Log-uniform from 1e-15 to 1e24.
		check(math.Copysign(math.Pow(10, -15+39*rng.Float64()), rng.Float64()-0.5))
		// Near a power of ten, a few units in the last place away.
		p := math.Pow(10, float64(rng.IntN(40)-15))
		check(math.Float64frombits(math.Float64bits(p) + uint64(rng.IntN(9)) - 4))
		// Ties and near-ties of the last digit: m + 1/2 at 1 to 10
		// digits, scaled by powers of two, and their neighbours.
		m := float64(rng.Int64N(1e10)) + 0.5
		for _, v := range []float64{m, m / 1024, m * 1024, m / 1e3} {
			check(v)
			check(math.Nextafter(v, 0))
			check(math.Nextafter(v, math.Inf(1)))
		}
		// Covariances and coordinates as a track holds them.
		check(rng.NormFloat64() * math.Pow(10, float64(rng.IntN(12)-9)))
	}
	t.Logf("%d numbers at 4 precisions", n)
}

func BenchmarkAppendG(b *testing.B) {
	rng := rand.New(rand.NewPCG(1, 2))
	vs := make([]float64, 1024)
	for i := range vs {
		vs[i] = rng.NormFloat64() * math.Pow(10, float64(rng.IntN(8)-6))
	}
	buf := make([]byte, 0, 64)
	b.Run("appendG", func(b *testing.B) {
		for i := 0; b.Loop(); i++ {
			buf = appendG(buf[:0], vs[i%len(vs)], 7)
		}
	})
	b.Run("strconv", func(b *testing.B) {
		for i := 0; b.Loop(); i++ {
			buf = strconv.AppendFloat(buf[:0], vs[i%len(vs)], 'g', 7, 64)
		}
	})
}

// FuzzAppendG: for any bit pattern and precision, appendG writes what
// strconv.AppendFloat with 'g' writes (the standard library is the
// reference).
func FuzzAppendG(f *testing.F) {
	for _, v := range []float64{0, 1, 0.5, 1234567.5, 9.9999995, 1e-12, 1e21, -0.00012345675} {
		f.Add(math.Float64bits(v), uint8(7))
	}
	f.Fuzz(func(t *testing.T, bits uint64, prec uint8) {
		v, p := math.Float64frombits(bits), 1+int(prec%10)
		want := strconv.AppendFloat(nil, v, 'g', p, 64)
		if got := appendG(nil, v, p); string(got) != string(want) {
			t.Fatalf("%v (bits %#x) with %d digits: %q, want %q", v, bits, p, got, want)
		}
	})
}
