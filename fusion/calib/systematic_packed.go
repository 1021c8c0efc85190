package calib

import (
	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas64"
	"gonum.org/v1/gonum/lapack/lapack64"
	"gonum.org/v1/gonum/mat"
)

// packedL is a segment block's lower Cholesky factor L (C = L L^T) packed
// by rows: row i's entries 0..i at i(i+1)/2. It holds half the values of
// a dense n x n factor, and a run holds one per segment for the whole fit
// (an hour of the demo: 360 segments of up to 300 rows, 130 MB packed
// against 260 MB dense). Its solves repeat, operation for operation, the
// loops of gonum's native BLAS (blas/gonum: Dtrsv, Dtrsm, Dtrmm, lower
// triangular, non-unit diagonal) that solved with the dense factor before,
// so the fit's results are the same to the last bit.
type packedL struct {
	n int
	v []float64
}

// factorPacked factorises the symmetric positive definite c (whose upper
// triangle it overwrites with U = L^T, by LAPACK's Dpotrf, as
// mat.Cholesky.Factorize does on its copy) and returns L packed; false
// when c is not positive definite.
func factorPacked(c *mat.SymDense) (packedL, bool) {
	raw := c.RawSymmetric()
	if raw.Uplo != blas.Upper {
		panic("calib: a segment block not stored upper")
	}
	if _, ok := lapack64.Potrf(raw); !ok {
		return packedL{}, false
	}
	n := raw.N
	l := packedL{n: n, v: make([]float64, n*(n+1)/2)}
	for i := range n {
		row := l.v[i*(i+1)/2 : i*(i+1)/2+i+1]
		for j := range row {
			row[j] = raw.Data[j*raw.Stride+i]
		}
	}
	return l, true
}

// row returns L's row i, entries 0..i.
func (l *packedL) row(i int) []float64 { return l.v[i*(i+1)/2 : i*(i+1)/2+i+1] }

// solveVec overwrites x with L^-1 x (Dtrsv, lower, no transpose).
func (l *packedL) solveVec(x []float64) {
	for i := range l.n {
		r := l.row(i)
		var sum float64
		for j, v := range r[:i] {
			sum += x[j] * v
		}
		x[i] -= sum
		x[i] /= r[i]
	}
}

// solve overwrites the n x cols matrix b with L^-1 b (Dtrsm, left, lower,
// no transpose, alpha 1).
func (l *packedL) solve(b blas64.General) {
	for i := range l.n {
		bi := b.Data[i*b.Stride : i*b.Stride+b.Cols]
		r := l.row(i)
		for k, va := range r[:i] {
			if va != 0 {
				axpy(-va, b.Data[k*b.Stride:k*b.Stride+b.Cols], bi)
			}
		}
		scal(1/r[i], bi)
	}
}

// solveTrans overwrites b with L^-T b (Dtrsm, left, lower, transpose,
// alpha 1).
func (l *packedL) solveTrans(b blas64.General) {
	for k := l.n - 1; k >= 0; k-- {
		bk := b.Data[k*b.Stride : k*b.Stride+b.Cols]
		r := l.row(k)
		scal(1/r[k], bk)
		for i, va := range r[:k] {
			if va != 0 {
				axpy(-va, bk, b.Data[i*b.Stride:i*b.Stride+b.Cols])
			}
		}
	}
}

// mulTrans overwrites b with L^T b (Dtrmm, left, lower, transpose, alpha
// 1).
func (l *packedL) mulTrans(b blas64.General) {
	for k := range l.n {
		bk := b.Data[k*b.Stride : k*b.Stride+b.Cols]
		r := l.row(k)
		for i, va := range r[:k] {
			if va != 0 {
				axpy(va, bk, b.Data[i*b.Stride:i*b.Stride+b.Cols])
			}
		}
		if r[k] != 1 {
			scal(r[k], bk)
		}
	}
}

// axpy is y += a x, element by element.
func axpy(a float64, x, y []float64) {
	for j, v := range x {
		y[j] += a * v
	}
}

// scal is x *= a.
func scal(a float64, x []float64) {
	for j := range x {
		x[j] *= a
	}
}
