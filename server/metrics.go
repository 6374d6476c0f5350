package server

import (
	"context"
	"strings"
	"time"
	"unicode"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/stats"
	"google.golang.org/grpc/status"

	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/metrics"
)

// MetricsOptions returns the gRPC options that feed m (add them to
// Options.GRPCOptions, before any authentication interceptor so that its
// refusals are counted):
//
//   - a stats handler counting message bytes received and sent, as on the
//     wire;
//   - interceptors counting calls that end with a refusal (the codes in
//     refusalCodes), by code;
//   - on the Session rpc, an observer of the frames: a session counts as
//     running from its Registered frame to the end of its call, its
//     Finished frame's reason is counted (a call that ends after
//     registering without one counts as "aborted"), the rows of every
//     evaluation frame are counted, and the time between the first frames
//     of consecutive requests for points is one step.
func MetricsOptions(m *metrics.Metrics) []grpc.ServerOption {
	return []grpc.ServerOption{
		grpc.StatsHandler(byteCounter{m}),
		grpc.ChainUnaryInterceptor(func(ctx context.Context, req any, _ *grpc.UnaryServerInfo, h grpc.UnaryHandler) (any, error) {
			resp, err := h(ctx, req)
			countRefusal(m, err)
			return resp, err
		}),
		grpc.ChainStreamInterceptor(func(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, h grpc.StreamHandler) error {
			if info.FullMethod != sluicev1.SluiceService_Session_FullMethodName {
				err := h(srv, ss)
				countRefusal(m, err)
				return err
			}
			o := &observedSession{ServerStream: ss, m: m}
			err := h(srv, o)
			countRefusal(m, err)
			if o.registered {
				m.AddSessions(metrics.Running, -1)
				if !o.finished {
					m.SessionFinished("aborted")
				}
			}
			return err
		}),
	}
}

// refusalCodes are the status codes counted as refusals: the client's
// fault, or the server declining work.
var refusalCodes = map[codes.Code]bool{
	codes.Unauthenticated: true, codes.PermissionDenied: true, codes.InvalidArgument: true,
	codes.ResourceExhausted: true, codes.FailedPrecondition: true, codes.OutOfRange: true,
	codes.Unavailable: true,
}

func countRefusal(m *metrics.Metrics, err error) {
	if c := status.Code(err); refusalCodes[c] {
		m.Refused(snake(c.String()))
	}
}

// snake turns "ResourceExhausted" into "resource_exhausted".
func snake(s string) string {
	var b strings.Builder
	for i, r := range s {
		if unicode.IsUpper(r) {
			if i > 0 {
				b.WriteByte('_')
			}
			r = unicode.ToLower(r)
		}
		b.WriteRune(r)
	}
	return b.String()
}

// observedSession watches a Session stream's frames. The handler has one
// sending and one receiving goroutine; SendMsg's fields are touched only
// by the sender, RecvMsg touches none.
type observedSession struct {
	grpc.ServerStream
	m          *metrics.Metrics
	lastPoints time.Time
	registered bool
	finished   bool
}

func (o *observedSession) RecvMsg(msg any) error {
	err := o.ServerStream.RecvMsg(msg)
	if err != nil {
		return err
	}
	switch r := msg.(type) {
	case *request: // the session's reader (wireframes.go)
		if rows, ok := r.evaluationRows(); ok {
			o.m.Evaluations(int64(rows))
		}
	case *sluicev1.SessionRequest:
		if e := r.GetEvaluations(); e != nil {
			o.m.Evaluations(int64(e.GetRows()))
		}
	}
	return nil
}

func (o *observedSession) SendMsg(msg any) error {
	if p, ok := msg.(*pointsFrame); ok && p.p.FirstRow == 0 { // sent by hand (wireframes.go)
		o.step()
	}
	if r, ok := msg.(*sluicev1.SessionResponse); ok {
		switch {
		case r.GetRegistered() != nil:
			if !o.registered {
				o.registered = true
				o.m.AddSessions(metrics.Running, 1)
			}
		case r.GetPoints() != nil && r.GetPoints().GetFirstRow() == 0:
			o.step()
		case r.GetFinished() != nil:
			if !o.finished {
				o.finished = true
				reason := strings.ToLower(strings.TrimPrefix(r.GetFinished().GetReason().String(), "FINISH_REASON_"))
				o.m.SessionFinished(reason)
			}
		}
	}
	return o.ServerStream.SendMsg(msg)
}

// step times a step: the time since the last request's first Points
// frame.
func (o *observedSession) step() {
	now := time.Now()
	if !o.lastPoints.IsZero() {
		o.m.Step(now.Sub(o.lastPoints))
	}
	o.lastPoints = now
}

// byteCounter is a stats.Handler counting payload bytes on the wire.
type byteCounter struct{ m *metrics.Metrics }

func (byteCounter) TagRPC(ctx context.Context, _ *stats.RPCTagInfo) context.Context   { return ctx }
func (byteCounter) TagConn(ctx context.Context, _ *stats.ConnTagInfo) context.Context { return ctx }
func (byteCounter) HandleConn(context.Context, stats.ConnStats)                       {}

func (b byteCounter) HandleRPC(_ context.Context, s stats.RPCStats) {
	switch p := s.(type) {
	case *stats.InPayload:
		b.m.Received(p.WireLength)
	case *stats.OutPayload:
		b.m.Sent(p.WireLength)
	}
}
