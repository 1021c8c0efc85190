package estimator

import (
	"fmt"
	"math"
)

// RobustKind names a robust weighting of a measurement update.
type RobustKind uint8

const (
	// RobustNone: the ordinary update (weight 1).
	RobustNone RobustKind = iota
	// RobustHuber: Huber's weight min(1, k / sqrt(NIS)), Param = k in
	// standard deviations (Huber 1964).
	RobustHuber
	// RobustStudentT: the weight (nu + d - 2) / (nu + NIS) of a Student-t
	// error with nu = Param degrees of freedom (StudentTCovWeight, after
	// Roth, Ozkan and Gustafsson 2013).
	RobustStudentT
)

// String names the kind.
func (k RobustKind) String() string {
	switch k {
	case RobustNone:
		return "none"
	case RobustHuber:
		return "huber"
	case RobustStudentT:
		return "student_t"
	}
	return fmt.Sprintf("robust(%d)", uint8(k))
}

// Robust is the robust weighting of a measurement: the update uses the
// noise R / w, with w the weight of the raw NIS. A heavy-tailed error of a
// few standard deviations then moves the estimate less than a Gaussian one
// would, while the gate still refuses gross outliers. The zero value is
// the ordinary update.
type Robust struct {
	Kind RobustKind
	// Param is Huber's k (standard deviations) or Student-t's degrees of
	// freedom nu.
	Param float64
}

// Weight returns the weight w in (0, 1] of a measurement of dimension d
// whose raw NIS is nis.
func (r Robust) Weight(nis float64, d int) float64 {
	switch r.Kind {
	case RobustHuber:
		return HuberWeight(nis, r.Param)
	case RobustStudentT:
		return StudentTCovWeight(nis, r.Param, d)
	}
	return 1
}

// HuberWeight returns Huber's weight min(1, k / sqrt(nis)) for a residual
// of Mahalanobis length sqrt(nis): the iteratively re-weighted least-squares
// weight psi(r)/r of Huber's loss, quadratic within k standard deviations
// and linear beyond (P. J. Huber, Robust estimation of a location
// parameter, Annals of Mathematical Statistics 35(1), 1964).
func HuberWeight(nis, k float64) float64 {
	if !(nis > k*k) {
		return 1
	}
	return k / math.Sqrt(nis)
}

// StudentTWeight returns (nu + d) / (nu + nis), capped at 1: the expected
// precision scale of a d-dimensional Student-t error with nu degrees of
// freedom given its NIS, the weight of the EM (variational) update for
// Student-t measurement noise (M. Roth, E. Ozkan and F. Gustafsson, A
// Student's t filter for heavy tailed process and measurement noise, ICASSP
// 2013). Capping at 1 keeps a small NIS from claiming more than the
// Gaussian model's information.
func StudentTWeight(nis, nu float64, d int) float64 {
	w := (nu + float64(d)) / (nu + nis)
	if !(w < 1) {
		return 1
	}
	return w
}

// StudentTCovWeight returns (nu + d - 2) / (nu + nis), capped at 1: the
// weight whose R / w is the expected covariance of a Student-t error given
// its NIS, the one the update uses. With the error R^(1/2) z / sqrt(lambda),
// lambda ~ Gamma(nu/2, nu/2), the posterior of lambda given the NIS is
// Gamma((nu + d)/2, (nu + nis)/2) (Roth, Ozkan and Gustafsson 2013), whose
// mean gives StudentTWeight; but the error's covariance given the NIS is
// R E[1/lambda] = R (nu + nis) / (nu + d - 2) (the mean of an inverse
// gamma, common practice). R / StudentTWeight understates it by (nu + d -
// 2) / (nu + d), two thirds for nu = d = 3 (DEVELOPERS.md, "Design:
// Sensors", has the Monte Carlo figures). Capping at 1 keeps a small NIS from claiming more
// than the Gaussian model's information. It needs nu + d > 2.
func StudentTCovWeight(nis, nu float64, d int) float64 {
	w := (nu + float64(d) - 2) / (nu + nis)
	if !(w < 1) {
		return 1
	}
	return w
}
