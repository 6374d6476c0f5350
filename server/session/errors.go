package session

import (
	"errors"
	"fmt"
)

// Kind classifies an Error for the transport's status table.
type Kind int

const (
	// Invalid: the client sent something malformed or inconsistent.
	Invalid Kind = iota + 1
	// TooLarge: a request or message exceeds a size limit.
	TooLarge
	// Timeout: the client did not answer in time.
	Timeout
	// Internal: a fault of the server itself, never of what the client
	// sent.
	Internal
)

func (k Kind) String() string {
	switch k {
	case Invalid:
		return "invalid"
	case TooLarge:
		return "too large"
	case Timeout:
		return "timeout"
	case Internal:
		return "internal"
	}
	return fmt.Sprintf("Kind(%d)", int(k))
}

// Error is an error caused by what the client sent (or failed to send). It
// names the field, and the chain and coordinate when the problem is one
// value of an array.
type Error struct {
	Kind Kind
	// Field is the wire name of the offending field, such as
	// "register.step" or "evaluations.gradients".
	Field string
	// Chain and Coord locate a bad array value; -1 when not applicable.
	Chain, Coord int
	// Reason says what is wrong, in words for a person.
	Reason string
}

func (e *Error) Error() string {
	loc := ""
	switch {
	case e.Chain >= 0 && e.Coord >= 0:
		loc = fmt.Sprintf(" (chain %d, coordinate %d)", e.Chain, e.Coord)
	case e.Chain >= 0:
		loc = fmt.Sprintf(" (chain %d)", e.Chain)
	case e.Coord >= 0:
		loc = fmt.Sprintf(" (coordinate %d)", e.Coord)
	}
	return fmt.Sprintf("%s%s: %s", e.Field, loc, e.Reason)
}

// BadField returns an Invalid error for field, with reason formatted as by
// fmt.Sprintf. Transports use it for malformed arrays they cannot decode.
func BadField(field, format string, args ...any) *Error {
	return &Error{Kind: Invalid, Field: field, Chain: -1, Coord: -1, Reason: fmt.Sprintf(format, args...)}
}

func badValue(field string, chain, coord int, format string, args ...any) *Error {
	return &Error{Kind: Invalid, Field: field, Chain: chain, Coord: coord, Reason: fmt.Sprintf(format, args...)}
}

// AsError returns the *Error inside err, if any.
func AsError(err error) (*Error, bool) {
	var e *Error
	ok := errors.As(err, &e)
	return e, ok
}

// ErrClientGone is returned by Run when the client's stream ended (closed,
// cancelled or broken) before the session finished.
var ErrClientGone = errors.New("session: client went away")
