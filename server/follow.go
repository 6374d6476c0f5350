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
// session's Finished frame. The request must carry the session's token: a
// wrong token and an unknown id get the same NOT_FOUND. A session stopped
// without finishing (client gone, server shutting down, with state kept)
// ends the call with UNAVAILABLE: follow again once it is resumed.
func (s *Server) Follow(req *sluicev1.FollowRequest, stream grpc.ServerStreamingServer[sluicev1.FollowResponse]) error {
	f, err := s.followable(stream.Context(), req.GetSessionId(), req.GetToken())
	if err != nil {
		return err
	}
	from := req.GetFromSeq()
	// A restored session re-makes the draws after its checkpoint, so a
	// follower may be ahead of its log: it waits for them.
	if _, next := f.log.Span(); from > next && !f.resumed {
		return problem(outsideLog, "from_seq", "%d is beyond the latest draw (next is %d)", from, next)
	}
	rows := max(1, wire.RowsPerMessage(f.limit, f.dim))
	enc := encoder{maxParams: paramCap(f.limit)}
	for {
		d, err := f.log.Read(stream.Context(), from, rows)
		switch {
		case errors.Is(err, session.ErrDrawsDropped):
			return problem(outsideLog, "from_seq", "%v", err)
		case errors.Is(err, session.ErrLogSuspended):
			return problem(draining, "", "%v", err)
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
