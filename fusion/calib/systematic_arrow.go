package calib

import (
	"gonum.org/v1/gonum/mat"
)

// arrowNormal is the fit's normal matrix N = J^T C^-1 J (prior included)
// and its right-hand side, kept in the shape they have: a segment's fixes
// touch the global parameters and their own anchor only, so N is a block
// arrow,
//
//	N = [ A    B_1 ... B_S ]
//	    [ B_1^T D_1        ]
//	    [ ...      ...     ]
//	    [ B_S^T        D_S ]
//
// with A the globals' ng x ng block, B_k their ng x 3 cross block with
// anchor k and D_k anchor k's 3 x 3 block. Held so it takes ng^2 + 3 ng S +
// 9 S numbers, where the dense p x p matrix (p = ng + 3 S) took 9.4 MB for
// the demo's hour (360 segments) and grew with the square of the run, and
// its solves and inverse took p^3 operations. Systems in N are solved by
// eliminating the anchors (the Schur complement S = A - sum B_k D_k^-1
// B_k^T, as in bundle adjustment: B. Triggs et al., Bundle adjustment, a
// modern synthesis, Vision Algorithms: Theory and Practice, 2000, sec.
// 6.1, from memory), which gives the same solution as the dense
// factorisation to rounding.
type arrowNormal struct {
	ng, segs int
	a        []float64    // A, ng x ng, row-major (both triangles)
	b        []float64    // B_k at b[k*ng*3:], ng x 3, row-major
	d        [][9]float64 // D_k, 3 x 3, row-major
	gg       []float64    // the right-hand side's globals
	ga       [][3]float64 // its anchors'
}

func newArrowNormal(ng, segs int) *arrowNormal {
	return &arrowNormal{ng: ng, segs: segs, a: make([]float64, ng*ng), b: make([]float64, segs*ng*3),
		d: make([][9]float64, segs), gg: make([]float64, ng), ga: make([][3]float64, segs)}
}

// addBlock adds segment k's cols x cols contribution m (globals' columns,
// then the anchor's three; only its upper triangle is read) and its
// right-hand side v.
func (n *arrowNormal) addBlock(k int, m *mat.Dense, v *mat.VecDense) {
	ng := n.ng
	for x := range ng + 3 {
		for y := x; y < ng+3; y++ {
			val := m.At(x, y)
			switch {
			case y < ng:
				n.a[x*ng+y] += val
				if x != y {
					n.a[y*ng+x] += val
				}
			case x < ng:
				n.b[(k*ng+x)*3+y-ng] += val
			default:
				i, j := x-ng, y-ng
				n.d[k][i*3+j] += val
				if i != j {
					n.d[k][j*3+i] += val
				}
			}
		}
	}
	if v == nil {
		return
	}
	for x := range ng {
		n.gg[x] += v.AtVec(x)
	}
	for c := range 3 {
		n.ga[k][c] += v.AtVec(ng + c)
	}
}

// bk returns B_k, ng x 3.
func (n *arrowNormal) bk(k int) []float64 { return n.b[k*n.ng*3 : (k+1)*n.ng*3] }

// schur is N with its diagonal times 1 + lambda (Marquardt's damping),
// the anchors eliminated: the Cholesky factor of the Schur complement and
// each anchor block's inverse.
type schur struct {
	n    *arrowNormal
	ch   mat.Cholesky
	dinv [][9]float64
}

// factor eliminates the anchors of N damped by lambda; false when the
// damped N is not positive definite (an anchor block or the Schur
// complement is not).
func (n *arrowNormal) factor(lambda float64) (*schur, bool) {
	ng := n.ng
	s := &schur{n: n, dinv: make([][9]float64, n.segs)}
	sc := mat.NewSymDense(ng, nil)
	for x := range ng {
		for y := x; y < ng; y++ {
			v := n.a[x*ng+y]
			if x == y {
				v *= 1 + lambda
			}
			sc.SetSym(x, y, v)
		}
	}
	var dk mat.SymDense
	var ck mat.Cholesky
	inv := mat.NewSymDense(3, nil)
	bd := make([]float64, ng*3)
	for k := range n.segs {
		dk.Reset()
		dk.ReuseAsSym(3)
		for i := range 3 {
			for j := i; j < 3; j++ {
				v := n.d[k][i*3+j]
				if i == j {
					v *= 1 + lambda
				}
				dk.SetSym(i, j, v)
			}
		}
		if !ck.Factorize(&dk) || ck.InverseTo(inv) != nil {
			return nil, false
		}
		for i := range 3 {
			for j := range 3 {
				s.dinv[k][i*3+j] = inv.At(i, j)
			}
		}
		// S -= B_k D_k^-1 B_k^T.
		b := n.bk(k)
		for x := range ng {
			for j := range 3 {
				bd[x*3+j] = b[x*3]*s.dinv[k][j] + b[x*3+1]*s.dinv[k][3+j] + b[x*3+2]*s.dinv[k][6+j]
			}
		}
		for x := range ng {
			for y := x; y < ng; y++ {
				v := bd[x*3]*b[y*3] + bd[x*3+1]*b[y*3+1] + bd[x*3+2]*b[y*3+2]
				sc.SetSym(x, y, sc.At(x, y)-v)
			}
		}
	}
	if !s.ch.Factorize(sc) {
		return nil, false
	}
	return s, true
}

// solve returns the solution of the damped N d = (rg, ra), the globals'
// part then each anchor's; false when the Schur complement is too badly
// conditioned to solve (mat.Cholesky.SolveVecTo).
func (s *schur) solve(rg []float64, ra [][3]float64) ([]float64, [][3]float64, bool) {
	n := s.n
	ng := n.ng
	r := make([]float64, ng)
	copy(r, rg)
	for k := range n.segs {
		// r -= B_k D_k^-1 ra_k
		var t [3]float64
		for i := range 3 {
			t[i] = s.dinv[k][i*3]*ra[k][0] + s.dinv[k][i*3+1]*ra[k][1] + s.dinv[k][i*3+2]*ra[k][2]
		}
		b := n.bk(k)
		for x := range ng {
			r[x] -= b[x*3]*t[0] + b[x*3+1]*t[1] + b[x*3+2]*t[2]
		}
	}
	var dg mat.VecDense
	if err := s.ch.SolveVecTo(&dg, mat.NewVecDense(ng, r)); err != nil {
		return nil, nil, false
	}
	g := dg.RawVector().Data
	da := make([][3]float64, n.segs)
	for k := range n.segs {
		b := n.bk(k)
		var t [3]float64
		for c := range 3 {
			t[c] = ra[k][c]
			for x := range ng {
				t[c] -= b[x*3+c] * g[x]
			}
		}
		for i := range 3 {
			da[k][i] = s.dinv[k][i*3]*t[0] + s.dinv[k][i*3+1]*t[1] + s.dinv[k][i*3+2]*t[2]
		}
	}
	return g, da, true
}

// globalRows returns, for the undamped factorisation, the rows of N^-1
// that belong to the globals, by segment: S^-1 (ng x ng) and, for each
// anchor k, W_k = -S^-1 B_k D_k^-1 (ng x 3, row-major); false when S^-1
// cannot be formed (mat.Cholesky.InverseTo).
func (s *schur) globalRows() (*mat.SymDense, [][]float64, bool) {
	n := s.n
	ng := n.ng
	sinv := mat.NewSymDense(ng, nil)
	if s.ch.InverseTo(sinv) != nil {
		return nil, nil, false
	}
	w := make([][]float64, n.segs)
	bd := make([]float64, ng*3)
	for k := range n.segs {
		b := n.bk(k)
		for x := range ng {
			for j := range 3 {
				bd[x*3+j] = b[x*3]*s.dinv[k][j] + b[x*3+1]*s.dinv[k][3+j] + b[x*3+2]*s.dinv[k][6+j]
			}
		}
		wk := make([]float64, ng*3)
		for x := range ng {
			for j := range 3 {
				var v float64
				for y := range ng {
					v += sinv.At(x, y) * bd[y*3+j]
				}
				wk[x*3+j] = -v
			}
		}
		w[k] = wk
	}
	return sinv, w, true
}

// segRows returns segment k's columns of the globals' rows of N^-1 (ng x
// (ng + 3): S^-1, then W_k).
func segRows(sinv *mat.SymDense, wk []float64) *mat.Dense {
	ng, _ := sinv.Dims()
	r := mat.NewDense(ng, ng+3, nil)
	for x := range ng {
		for y := range ng {
			r.Set(x, y, sinv.At(x, y))
		}
		for j := range 3 {
			r.Set(x, ng+j, wk[x*3+j])
		}
	}
	return r
}
