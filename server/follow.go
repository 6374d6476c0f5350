package server

import (
	"errors"

	"google.golang.org/grpc"

	"sluice/internal/wire"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
)

// MaxSessionIDBytes caps the session id a Follow request may name.
const MaxSessionIDBytes = 128

// Follow implements the Follow rpc: it sends the session's header, then
// its draws from the requested sequence number on, in order, with its
// progress reports placed among them where the session made them, then
// the session's Finished frame. The request must carry the session's
// token: a wrong token and an unknown id get the same NOT_FOUND. A session
// stopped without finishing (client gone, server shutting down, with state
// kept) ends the call with UNAVAILABLE: follow again once it is resumed.
func (s *Server) Follow(req *sluicev1.FollowRequest, stream grpc.ServerStreamingServer[sluicev1.FollowResponse]) error {
	if n := len(req.GetSessionId()); n > MaxSessionIDBytes {
		return problem(badInput, "session_id", "is %d bytes long, the limit is %d", n, MaxSessionIDBytes)
	}
	f, err := s.followable(stream.Context(), req.GetSessionId(), req.GetToken())
	if err != nil {
		return err
	}
	from := req.GetFromSeq()
	// A restored session re-makes the draws after its checkpoint, so a
	// follower may be ahead of its log: it waits for them.
	first, next := f.log.Span()
	if from > next && !f.resumed {
		return problem(outsideLog, "from_seq", "%d is beyond the latest draw (next is %d)", from, next)
	}
	head := headerToWire(f.log.Header())
	head.FirstSeq, head.NextSeq = first, next
	if err := stream.Send(&sluicev1.FollowResponse{Frame: &sluicev1.FollowResponse_Header{Header: head}}); err != nil {
		return err
	}
	rows := max(1, wire.RowsPerMessage(f.limit, f.dim))
	enc := encoder{maxParams: paramCap(f.limit), maxText: textCap(f.limit)}
	cur := f.log.Cursor(from)
	for {
		ev, err := f.log.ReadEvent(stream.Context(), &cur, rows)
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
		var msg *sluicev1.FollowResponse
		if ev.Progress != nil {
			msg = &sluicev1.FollowResponse{Frame: &sluicev1.FollowResponse_Progress{Progress: enc.progress(ev.Progress)}}
		} else {
			msg = &sluicev1.FollowResponse{Frame: &sluicev1.FollowResponse_Draws{Draws: enc.frame(ev.Draws).GetDraws()}}
		}
		if err := stream.Send(msg); err != nil {
			return err
		}
	}
}

// headerToWire converts a draw log's header (its sequence numbers are set
// by the caller).
func headerToWire(h session.Header) *sluicev1.FollowHeader {
	w := h.Wants
	return &sluicev1.FollowHeader{SessionId: h.SessionID, Dim: int32(h.Dim), Chains: int32(h.Chains), Kernel: h.Kernel,
		Names: h.Names, Step: h.Step, Seed: h.Seed, BurnIn: h.BurnIn, KeepEvery: h.KeepEvery, DrawsPerChain: h.DrawsPerChain,
		MaxEvaluations: h.MaxEvaluations, MaxSeconds: h.MaxTime.Seconds(), EvaluationsPerStep: int64(h.EvaluationsPerStep),
		Wants: &sluicev1.Wants{MinBulkEss: w.MinBulkESS, MinTailEss: w.MinTailESS, MaxRhat: w.MaxRhat, MaxKsd: w.MaxKSD,
			Eps: w.Eps, Metric: metricToWire[w.Metric]}}
}
