package server

import (
	"errors"

	"google.golang.org/grpc"

	"sluice/internal/wire"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
)

// Follow implements the Follow rpc: it streams a session's draws from its
// draw log, in sequence order from the requested number, then the
// session's Finished frame.
func (s *Server) Follow(req *sluicev1.FollowRequest, stream grpc.ServerStreamingServer[sluicev1.FollowResponse]) error {
	s.mu.Lock()
	f, ok := s.logs[req.GetSessionId()]
	s.mu.Unlock()
	if !ok {
		return problem(unknownSession, "session_id", "no session %q is followable here (unknown, not kept, or the server keeps no draws for followers)", req.GetSessionId())
	}
	from := req.GetFromSeq()
	if _, next := f.log.Span(); from > next {
		return problem(outsideLog, "from_seq", "%d is beyond the latest draw (next is %d)", from, next)
	}
	rows := max(1, wire.RowsPerMessage(f.limit, f.dim))
	enc := encoder{maxParams: paramCap(f.limit), maxText: textCap(f.limit)}
	for {
		d, err := f.log.Read(stream.Context(), from, rows)
		switch {
		case errors.Is(err, session.ErrDrawsDropped):
			return problem(outsideLog, "from_seq", "%v", err)
		case errors.Is(err, session.ErrLogClosed):
			fin, _ := f.log.Finished()
			w := enc.frame(&fin).GetFinished()
			return stream.Send(&sluicev1.FollowResponse{Frame: &sluicev1.FollowResponse_Finished{Finished: w}})
		case err != nil:
			return toStatus(err)
		}
		w := enc.frame(&d).GetDraws()
		if err := stream.Send(&sluicev1.FollowResponse{Frame: &sluicev1.FollowResponse_Draws{Draws: w}}); err != nil {
			return err
		}
		from += uint64(d.Rows)
	}
}
