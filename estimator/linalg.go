package estimator

import (
	"fmt"
	"math"
)

// The filter's matrices are at most MaxStates x MaxStates, so its kernels are loops over
// fixed-size row-major arrays with an explicit stride: no allocation, no
// dispatch. Tests check them against gonum mat.

// cholesky writes the lower Cholesky factor of the n x n symmetric matrix a
// (stride st) into l (stride st) and reports whether a is positive definite.
// Reference: Golub and Van Loan, Matrix Computations, 4th ed, algorithm 4.2.1.
func cholesky(a, l []float64, n, st int) bool {
	for j := 0; j < n; j++ {
		d := a[j*st+j]
		for k := 0; k < j; k++ {
			d -= l[j*st+k] * l[j*st+k]
		}
		if !(d > 0) || math.IsInf(d, 0) {
			return false
		}
		d = math.Sqrt(d)
		l[j*st+j] = d
		for i := j + 1; i < n; i++ {
			v := a[i*st+j]
			for k := 0; k < j; k++ {
				v -= l[i*st+k] * l[j*st+k]
			}
			l[i*st+j] = v / d
		}
		for i := 0; i < j; i++ {
			l[i*st+j] = 0
		}
	}
	return true
}

// cholForward solves L y = b for y (L lower, n x n, stride st).
func cholForward(l []float64, n, st int, b, y []float64) {
	for i := 0; i < n; i++ {
		v := b[i]
		for k := 0; k < i; k++ {
			v -= l[i*st+k] * y[k]
		}
		y[i] = v / l[i*st+i]
	}
}

// cholSolveVec solves (L L^T) x = b for x.
func cholSolveVec(l []float64, n, st int, b, x []float64) {
	cholForward(l, n, st, b, x)
	for i := n - 1; i >= 0; i-- {
		v := x[i]
		for k := i + 1; k < n; k++ {
			v -= l[k*st+i] * x[k]
		}
		x[i] = v / l[i*st+i]
	}
}

// symmetrise replaces the n x n matrix a (stride st) by (a + a^T)/2.
func symmetrise(a []float64, n, st int) {
	for i := 0; i < n; i++ {
		for j := i + 1; j < n; j++ {
			v := (a[i*st+j] + a[j*st+i]) / 2
			a[i*st+j], a[j*st+i] = v, v
		}
	}
}

// CheckCovariance reports whether the n x n row-major matrix c is finite,
// symmetric to a relative tolerance of 1e-9 and positive definite. It names
// what was wrong in the error.
func CheckCovariance(c []float64, n int) error {
	if len(c) != n*n {
		return fmt.Errorf("covariance has %d entries, want %d (%dx%d row-major): %w", len(c), n*n, n, n, ErrShape)
	}
	for _, v := range c {
		if !finite(v) {
			return ErrNotFinite
		}
	}
	for i := 0; i < n; i++ {
		for j := i + 1; j < n; j++ {
			a, b := c[i*n+j], c[j*n+i]
			// Relative to the entries' scale, as loose as single
			// precision: a covariance computed in float32 (a
			// microcontroller, an image library) may differ between its
			// halves by its rounding, about 6e-8 of its scale (binary32's
			// unit roundoff 2^-24; common practice).
			scale := math.Max(math.Sqrt(math.Abs(c[i*n+i]*c[j*n+j])), 1e-300)
			if math.Abs(a-b) > 1e-6*scale {
				return errAsymmetric{i, j}
			}
		}
	}
	var l [MaxStates * MaxStates]float64
	if n > MaxStates || !cholesky(c, l[:], n, n) {
		return ErrNotPositiveDefinite
	}
	return nil
}

type errAsymmetric struct{ i, j int }

func (e errAsymmetric) Error() string {
	return fmt.Sprintf("covariance is not symmetric at (%d,%d)", e.i, e.j)
}

// InvertSPD3 returns the inverse of the d x d (d at most 3; row-major,
// stride 3) symmetric positive-definite a, through its Cholesky factor
// (cholesky, then cholSolveVec against each column of the identity), and
// false where a is not positive definite. It allocates nothing.
func InvertSPD3(a *[9]float64, d int) (inv [9]float64, ok bool) {
	var l [9]float64
	if d < 1 || d > 3 || !cholesky(a[:], l[:], d, 3) {
		return inv, false
	}
	for j := 0; j < d; j++ {
		var e, x [3]float64
		e[j] = 1
		cholSolveVec(l[:], d, 3, e[:], x[:])
		for i := 0; i < d; i++ {
			inv[i*3+j] = x[i]
		}
	}
	return inv, true
}

// SolveSPD solves a x = b for the n x n symmetric positive-definite a
// (row-major, stride MaxStates) and the n x m right-hand side b (stride
// MaxStates), writing x into b. It reports false, leaving b unchanged, if a
// is not positive definite. n and m are at most MaxStates; it allocates
// nothing.
func SolveSPD(a *[MaxStates * MaxStates]float64, n int, b *[MaxStates * MaxStates]float64, m int) bool {
	var l [MaxStates * MaxStates]float64
	if !cholesky(a[:], l[:], n, stride) {
		return false
	}
	for j := 0; j < m; j++ {
		var col, x [MaxStates]float64
		for i := 0; i < n; i++ {
			col[i] = b[i*stride+j]
		}
		cholSolveVec(l[:], n, stride, col[:], x[:])
		for i := 0; i < n; i++ {
			b[i*stride+j] = x[i]
		}
	}
	return true
}
