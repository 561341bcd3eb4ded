package readapi

import "errors"

var (
	// ErrMalformedReply is returned by Client methods when a reply does
	// not decode as the protocol says.
	ErrMalformedReply = errors.New("readapi: malformed reply from the service")

	// ErrNoAnswer is returned, wrapped with the subject and address, when
	// no reply came within Timeout.
	ErrNoAnswer = errors.New("readapi: no answer from the service")
)

// ServiceError is a failure the service reported in its answer.
type ServiceError struct {
	Subject string
	Msg     string // the service's message
}

func (e *ServiceError) Error() string { return "service: " + e.Msg }
