package estimator

import "errors"

var (
	// ErrNotPositiveDefinite reports a covariance that fails a Cholesky
	// factorisation: an input covariance, an innovation covariance or the
	// state covariance that an update would produce.
	ErrNotPositiveDefinite = errors.New("covariance is not positive definite")
	// ErrNotFinite reports a NaN or an infinity in an input.
	ErrNotFinite = errors.New("value is not finite")
	// ErrUnobservable reports rows that do not determine the body step.
	ErrUnobservable = errors.New("rows do not determine forward, left and turn")
	// ErrDegenerate reports a measurement whose model has no defined
	// Jacobian at the current state, such as a landmark at the sensor itself.
	ErrDegenerate = errors.New("measurement is degenerate at this state")
	// ErrShape reports matrices or vectors whose sizes do not fit, such as
	// a covariance with the wrong number of entries. Misuse by the caller
	// panics with it; data of the wrong size is an error wrapping it.
	ErrShape = errors.New("estimator: dimension mismatch")
)
