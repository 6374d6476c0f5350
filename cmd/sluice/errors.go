package main

import (
	"errors"
	"fmt"
	"slices"
	"strings"

	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
)

// describeError returns err as a user reads it: for an error from the
// server (a gRPC status), the server's own message, the code in plain
// words and the fields its BadRequest detail names, without the
// "rpc error: code = … desc = …" wrapping; anything else as it is.
func describeError(err error) string {
	st, ok := status.FromError(err)
	if !ok || st.Code() == codes.OK {
		return err.Error()
	}
	// FromError gives a wrapped status the whole chain's text as its
	// message; the innermost status carries the server's own words.
	var inner interface{ GRPCStatus() *status.Status }
	if errors.As(err, &inner) && inner.GRPCStatus() != nil {
		st = inner.GRPCStatus()
	}
	var fields []string
	for _, d := range st.Details() {
		if br, ok := d.(*errdetails.BadRequest); ok {
			for _, v := range br.GetFieldViolations() {
				if f := v.GetField(); f != "" && !slices.Contains(fields, f) {
					fields = append(fields, f)
				}
			}
		}
	}
	s := fmt.Sprintf("%s (%s", st.Message(), codeWords(st.Code()))
	switch len(fields) {
	case 0:
	case 1:
		s += "; field " + fields[0]
	default:
		s += "; fields " + strings.Join(fields, ", ")
	}
	return s + ")"
}

// codeWords says what a status code means, in words.
func codeWords(c codes.Code) string {
	switch c {
	case codes.InvalidArgument:
		return "invalid input"
	case codes.ResourceExhausted:
		return "over a server limit"
	case codes.DeadlineExceeded:
		return "took too long"
	case codes.NotFound:
		return "not found"
	case codes.OutOfRange:
		return "out of range"
	case codes.Unavailable:
		return "server unavailable"
	case codes.Canceled:
		return "cancelled"
	case codes.FailedPrecondition:
		return "not possible in the current state"
	case codes.Unimplemented:
		return "not supported by this server"
	case codes.Internal:
		return "internal server error"
	case codes.Unauthenticated, codes.PermissionDenied:
		return "not allowed"
	case codes.AlreadyExists:
		return "already exists"
	case codes.Aborted:
		return "aborted"
	}
	return "server error " + strings.ToLower(c.String())
}
