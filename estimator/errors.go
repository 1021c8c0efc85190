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
)
