package fusion

import (
	"errors"
	"fmt"
)

// FieldError says which field of a configuration or an input was wrong. Path
// is the snake_case field path of the wire API and the configuration file
// (for instance "wheels[1].counts_per_m"); Err says what was wrong and wraps
// the kind of error (ErrConfig, ErrBadSample, ...), so that errors.Is sees
// the kind and errors.As finds the field.
type FieldError struct {
	Path string
	Err  error
}

// Error returns Err's text ("kind: path: what" when FieldErrorf made it).
func (e *FieldError) Error() string {
	return e.Err.Error()
}

// Unwrap returns the cause.
func (e *FieldError) Unwrap() error { return e.Err }

// FieldErrorf makes a FieldError of the given kind (a sentinel such as
// ErrConfig) whose text is "kind: path: message".
func FieldErrorf(kind error, path, format string, args ...any) error {
	return &FieldError{Path: path, Err: fmt.Errorf("%w: %s: %s", kind, path, fmt.Sprintf(format, args...))}
}

// FieldOf returns the field path carried by err, or "" if none. A nil
// err returns at once: errors.As's target escapes, and the service asks
// this of every verdict (one allocation a sample).
func FieldOf(err error) string {
	if err == nil {
		return ""
	}
	var fe *FieldError
	if errors.As(err, &fe) {
		return fe.Path
	}
	return ""
}
