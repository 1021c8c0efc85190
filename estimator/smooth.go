package estimator

// RTSStep writes into dst the smoothed estimate of one step of the
// fixed-interval Rauch-Tung-Striebel smoother: filtered is the step's
// filtered estimate, predicted the next step's prediction from it, f the
// Jacobian of that prediction (n x n, stride MaxStates, Filter.Transition) and smoothed the next
// step's smoothed estimate.
//
//	C   = P_f F^T P_p^-1
//	x_s = x_f + C (x_s' - x_p)
//	P_s = P_f + C (P_s' - P_p) C^T
//
// Angle differences are wrapped. It returns ErrNotPositiveDefinite if the
// prediction's covariance is not. dst may alias filtered.
//
// Reference: Rauch, Tung and Striebel, AIAA Journal 3(8), 1965; in this
// form Bar-Shalom, Li and Kirubarajan (2001), section 8.6.
func RTSStep(dst, filtered, predicted *State, f *[MaxStates * MaxStates]float64, smoothed *State) error {
	var ct [MaxStates * MaxStates]float64
	if err := RTSGain(&ct, filtered, predicted, f); err != nil {
		return err
	}
	RTSStepWithGain(dst, filtered, predicted, &ct, smoothed)
	return nil
}

// RTSGain writes into ct the transpose of the gain C of RTSStep (n x n,
// stride MaxStates), which needs neither smoothed estimate: a smoother may
// work the gains out ahead of its backward pass, elsewhere. It returns
// ErrNotPositiveDefinite if the prediction's covariance is not.
func RTSGain(ct *[MaxStates * MaxStates]float64, filtered, predicted *State, f *[MaxStates * MaxStates]float64) error {
	if !rtsGainT(ct, filtered, predicted, f) {
		return ErrNotPositiveDefinite
	}
	return nil
}

// RTSStepWithGain is RTSStep with the transposed gain ct that RTSGain gave
// for filtered, predicted and f: the same operations, so the same result
// to the bit. dst may alias filtered.
func RTSStepWithGain(dst, filtered, predicted *State, ct *[MaxStates * MaxStates]float64, smoothed *State) {
	n := filtered.n
	var d [MaxStates]float64
	for i := 0; i < n; i++ {
		d[i] = smoothed.x[i] - predicted.x[i]
		if filtered.isAngle(i) {
			d[i] = Wrap(d[i])
		}
	}
	// dp = P_s - P_p; out.p = P_f + C dp C^T with C = ct^T.
	var dp, cdp [MaxStates * MaxStates]float64
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			dp[i*stride+j] = smoothed.p[i*stride+j] - predicted.p[i*stride+j]
		}
	}
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			var acc float64
			for k := 0; k < n; k++ {
				acc += ct[k*stride+i] * dp[k*stride+j]
			}
			cdp[i*stride+j] = acc
		}
	}
	out := State{n: n, angles: filtered.angles}
	for i := 0; i < n; i++ {
		var dx float64
		for k := 0; k < n; k++ {
			dx += ct[k*stride+i] * d[k]
		}
		out.x[i] = filtered.x[i] + dx
		if filtered.isAngle(i) {
			out.x[i] = Wrap(out.x[i])
		}
		for j := 0; j < n; j++ {
			var acc float64
			for k := 0; k < n; k++ {
				acc += cdp[i*stride+k] * ct[k*stride+j]
			}
			out.p[i*stride+j] = filtered.p[i*stride+j] + acc
		}
	}
	symmetrise(out.p[:], n, stride)
	*dst = out
}

// rtsGainT writes ct = P_p^-1 F P_f, the transpose of the smoother gain C,
// and reports false if P_p is not positive definite.
func rtsGainT(ct *[MaxStates * MaxStates]float64, filtered, predicted *State, f *[MaxStates * MaxStates]float64) bool {
	n := filtered.n
	pp := predicted.p
	symmetrise(pp[:], n, stride)
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			var acc float64
			for k := 0; k < n; k++ {
				acc += f[i*stride+k] * filtered.p[k*stride+j]
			}
			ct[i*stride+j] = acc
		}
	}
	return SolveSPD(&pp, n, ct, n)
}
