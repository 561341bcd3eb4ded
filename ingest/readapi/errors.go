package readapi

import "errors"

var (
	// ErrMalformedReply is returned by Client methods when a reply does
	// not decode as the protocol says.
	ErrMalformedReply = errors.New("readapi: malformed reply from the service")

	// ErrNoAnswer is returned, wrapped with the subject and address, when
	// no reply came within Timeout.
	ErrNoAnswer = errors.New("readapi: no answer from the service")

	// ErrRefused is returned, wrapped with the subject, when the bus's
	// permissions do not let the client send a request.
	ErrRefused = errors.New("readapi: not permitted on the bus")

	// ErrOtherService is returned (inside a *MismatchError) when the
	// service that answers holds another state file than the one asked
	// about.
	ErrOtherService = errors.New("readapi: the service holds another state file")
)

// MismatchError is returned by Client.CheckHolds: the service at URL
// holds Holds, not Want. It unwraps to ErrOtherService.
type MismatchError struct {
	URL, Want, Holds string
}

func (e *MismatchError) Error() string {
	return "the service at " + e.URL + " holds " + e.Holds + ", not " + e.Want + ": give --servers with the address of the service that holds " + e.Want
}

// Unwrap returns ErrOtherService.
func (e *MismatchError) Unwrap() error { return ErrOtherService }

// ServiceError is a failure the service reported in its answer.
type ServiceError struct {
	Subject string
	Msg     string // the service's message
}

func (e *ServiceError) Error() string { return "service: " + e.Msg }
