package server

import (
	"context"
	"errors"

	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"sluice/server/session"
)

// kindCode is the one table from engine error kinds to status codes.
var kindCode = map[session.Kind]codes.Code{
	session.Invalid:  codes.InvalidArgument,
	session.TooLarge: codes.ResourceExhausted,
	session.Timeout:  codes.DeadlineExceeded,
	session.Internal: codes.Internal,
}

// toStatus maps an engine or transport error to the status the client
// sees. An engine *session.Error carries a BadRequest detail naming the
// field.
func toStatus(err error) error {
	if err == nil {
		return nil
	}
	if e, ok := session.AsError(err); ok {
		code, ok := kindCode[e.Kind]
		if !ok {
			code = codes.Internal
		}
		st := status.New(code, e.Error())
		if d, derr := st.WithDetails(&errdetails.BadRequest{FieldViolations: []*errdetails.BadRequest_FieldViolation{
			{Field: e.Field, Description: e.Reason}}}); derr == nil {
			st = d
		}
		return st.Err()
	}
	if _, ok := status.FromError(err); ok {
		return err
	}
	switch {
	case errors.Is(err, session.ErrClientGone), errors.Is(err, context.Canceled):
		return status.Error(codes.Canceled, err.Error())
	case errors.Is(err, context.DeadlineExceeded):
		return status.Error(codes.DeadlineExceeded, err.Error())
	}
	return status.Error(codes.Internal, err.Error())
}

// withField builds a status with code and a BadRequest detail naming
// field.
func withField(code codes.Code, field, format string, args ...any) error {
	st := status.Newf(code, field+": "+format, args...)
	if d, err := st.WithDetails(&errdetails.BadRequest{FieldViolations: []*errdetails.BadRequest_FieldViolation{
		{Field: field, Description: st.Message()}}}); err == nil {
		st = d
	}
	return st.Err()
}

// recvError turns an error from Recv into an engine message error: an
// oversize message becomes a TooLarge error naming the frame, anything
// else passes through (io.EOF is a clean close).
func recvError(frame string, err error) error {
	if status.Code(err) == codes.ResourceExhausted {
		return &session.Error{Kind: session.TooLarge, Field: frame, Chain: -1, Coord: -1, Reason: status.Convert(err).Message()}
	}
	return err
}
