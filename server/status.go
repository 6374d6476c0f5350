package server

import (
	"context"
	"errors"
	"fmt"

	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"sluice/server/session"
)

// fault is what went wrong, as the adapter tells it to a client. Every
// status the server returns gets its code from statusTable, here and
// nowhere else.
type fault int

const (
	// badInput: the client sent something malformed or inconsistent.
	badInput fault = iota + 1
	// tooLarge: a message or request exceeds a size limit.
	tooLarge
	// noAnswer: the client did not answer in time.
	noAnswer
	// serverFault: a fault of the server itself (a bug or a panic),
	// never of what the client sent.
	serverFault
	// busy: every session slot is taken.
	busy
	// draining: the server is shutting down.
	draining
	// unknownSession: Follow names no session followable here.
	unknownSession
	// outsideLog: Follow asks for draws the log does not (or no longer)
	// hold.
	outsideLog
	// clientGone: the client cancelled the call or its stream broke.
	clientGone
	// deadlineSpent: the call's own deadline passed.
	deadlineSpent
	// wrongToken: a worker presented a wrong session token.
	wrongToken
	// suspended: the client stopped answering and its session was
	// suspended at a checkpoint: it may resume it.
	suspended
)

// statusTable is the one table from faults to status codes.
var statusTable = map[fault]codes.Code{
	badInput:       codes.InvalidArgument,
	tooLarge:       codes.ResourceExhausted,
	noAnswer:       codes.DeadlineExceeded,
	serverFault:    codes.Internal,
	busy:           codes.ResourceExhausted,
	draining:       codes.Unavailable,
	unknownSession: codes.NotFound,
	outsideLog:     codes.OutOfRange,
	clientGone:     codes.Canceled,
	deadlineSpent:  codes.DeadlineExceeded,
	wrongToken:     codes.PermissionDenied,
	suspended:      codes.Unavailable,
}

// kindFault says which fault each engine error kind is.
var kindFault = map[session.Kind]fault{
	session.Invalid:  badInput,
	session.TooLarge: tooLarge,
	session.Timeout:  noAnswer,
	session.Internal: serverFault,
}

// code is f's status code; an unlisted fault is the server's own.
func (f fault) code() codes.Code {
	if c, ok := statusTable[f]; ok {
		return c
	}
	return codes.Internal
}

// problem builds the status for fault f. With a field, the message starts
// with it and a BadRequest detail names it.
func problem(f fault, field, format string, args ...any) error {
	msg := fmt.Sprintf(format, args...)
	if field == "" {
		return status.New(f.code(), msg).Err()
	}
	return withDetail(status.New(f.code(), field+": "+msg), field, msg)
}

// withDetail adds a BadRequest detail naming field to st.
func withDetail(st *status.Status, field, description string) error {
	if d, err := st.WithDetails(&errdetails.BadRequest{FieldViolations: []*errdetails.BadRequest_FieldViolation{
		{Field: field, Description: description}}}); err == nil {
		st = d
	}
	return st.Err()
}

// toStatus maps an engine or transport error to the status the client
// sees. An engine *session.Error carries a BadRequest detail naming the
// field. A status passes through; anything else unknown is the server's
// own fault.
func toStatus(err error) error {
	if err == nil {
		return nil
	}
	if e, ok := session.AsError(err); ok {
		f, ok := kindFault[e.Kind]
		if !ok {
			f = serverFault
		}
		return withDetail(status.New(f.code(), e.Error()), e.Field, e.Reason)
	}
	if _, ok := status.FromError(err); ok {
		return err
	}
	switch {
	case errors.Is(err, session.ErrClientGone), errors.Is(err, context.Canceled):
		return problem(clientGone, "", "%v", err)
	case errors.Is(err, context.DeadlineExceeded):
		return problem(deadlineSpent, "", "%v", err)
	}
	return problem(serverFault, "", "%v", err)
}

// recvError turns an error from Recv into an engine message error: an
// oversize message (which gRPC reports as RESOURCE_EXHAUSTED) becomes a
// TooLarge error naming the frame, anything else passes through (io.EOF
// is a clean close).
func recvError(frame string, err error) error {
	if status.Code(err) == codes.ResourceExhausted {
		return &session.Error{Kind: session.TooLarge, Field: frame, Chain: -1, Coord: -1, Reason: status.Convert(err).Message()}
	}
	return err
}

// canceled reports whether err says the client went away rather than
// that something failed.
func canceled(err error) bool {
	return errors.Is(err, session.ErrClientGone) || errors.Is(err, context.Canceled) || status.Code(err) == statusTable[clientGone]
}
