package web

import (
	"errors"
	"fmt"
)

var (
	// ErrBadID is returned (as an *IDError, answered with 400) for a sensor
	// id that cannot name a sensor: empty, too long, or not a NATS subject
	// tail (an empty token, white space, a control byte, a wildcard).
	ErrBadID = errors.New("web: invalid sensor id")

	// ErrUnknownSensor is answered with 404 for a valid id with no fit
	// history, ticket or event in the store.
	ErrUnknownSensor = errors.New("web: unknown sensor")

	// ErrBadQuery is returned (as a *QueryError, answered with 400) for a
	// query parameter that does not parse: asof, format, state.
	ErrBadQuery = errors.New("web: bad query parameter")
)

// IDError says why a sensor id was refused. It unwraps to ErrBadID.
type IDError struct {
	ID     string // the id as received, unescaped
	Reason string // e.g. "empty token at byte 3"
}

func (e *IDError) Error() string {
	return fmt.Sprintf("sensor id %q: %s", e.ID, e.Reason)
}

// Unwrap returns ErrBadID.
func (e *IDError) Unwrap() error { return ErrBadID }

// QueryError names a query parameter and the value refused.
type QueryError struct {
	Param, Value, Reason string
}

func (e *QueryError) Error() string {
	return fmt.Sprintf("query %s=%q: %s", e.Param, e.Value, e.Reason)
}

// Unwrap returns ErrBadQuery.
func (e *QueryError) Unwrap() error { return ErrBadQuery }
