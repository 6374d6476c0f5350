package client

import (
	"context"
	"errors"
	"io"
	"time"

	"google.golang.org/grpc"

	sluicev1 "sluice/proto/sluice/v1"
)

// Follow streams the draws of session sessionID (Registered.SessionID),
// from sequence number fromSeq on, to a consumer other than the session's
// client (the Follow rpc); token is the session's Registered.Token (a wrong
// token and an unknown session both give NOT_FOUND). The server first sends
// the session's header (names, dimension, chains, kernel, budget), which
// goes to the OnFollowHeader callback and to Summary.Header; then each
// block of draws goes to the OnDraws callback (and to Summary.Draws with
// KeepDraws) in sequence order, exactly once, and each progress report,
// placed among the draws where the session made it, to OnProgress (and to
// Summary.Progress); Follow returns the session's summary once its final
// frame arrives. Its Registered is empty and DrawsReceived counts this
// follower's rows. A follower that connects mid-run first gets the latest
// report made before fromSeq; one that falls far behind may miss reports
// (the server keeps its latest few), never draws. A server that sends no
// header leaves Summary.Header nil.
//
// When the stream breaks with UNAVAILABLE (the server restarts, or the
// session is suspended until its client resumes it), Follow follows again
// from the next sequence number it needs, as WithResume bounds. On any
// other error (the context ends, the server answers OUT_OF_RANGE because
// the rows asked for have left its bounded buffer, NOT_FOUND, or
// ErrDrawsLost) Follow returns the error together with a Summary of what
// was received: resume with Follow(ctx, cc, sessionID, token, sum.NextSeq)
// to get every later draw with no loss and no duplicate while the server
// still keeps it. OnRegistered is not called. The call's receive limit is
// DialMaxMessageBytes (a Follow frame can be as large as the server's own
// limit); WithCallOptions changes it.
func Follow(ctx context.Context, cc grpc.ClientConnInterface, sessionID, token string, fromSeq uint64, opts ...Option) (*Summary, error) {
	var cfg config
	for _, o := range opts {
		o(&cfg)
	}
	callOpts := append([]grpc.CallOption{grpc.MaxCallRecvMsgSize(DialMaxMessageBytes)}, cfg.callOpts...)
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	r := runner{cfg: cfg, sum: &Summary{NextSeq: fromSeq}, nextSeq: fromSeq}
	if cfg.keepDraws {
		r.sum.Draws = &DrawSet{}
	}
	pol := cfg.resume.withDefaults()
	for tries := 0; ; tries++ {
		got, err := r.follow(ctx, cc, sessionID, token, callOpts)
		if err == nil {
			return r.sum, nil
		}
		if got {
			tries = 0
		}
		if pol.Attempts < 0 || tries >= pol.Attempts || !resumable(ctx, err) {
			return r.sum, err
		}
		if pol.wait(ctx, tries) != nil {
			return r.sum, err
		}
		r.sum.Resumes++
	}
}

// follow runs one Follow call from r.nextSeq; got reports whether it
// received anything.
func (r *runner) follow(ctx context.Context, cc grpc.ClientConnInterface, sessionID, token string, callOpts []grpc.CallOption) (got bool, err error) {
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	stream, err := sluicev1.NewSluiceServiceClient(cc).Follow(ctx, &sluicev1.FollowRequest{SessionId: sessionID, Token: token, FromSeq: r.nextSeq}, callOpts...)
	if err != nil {
		return false, err
	}
	for {
		f, err := stream.Recv()
		if errors.Is(err, io.EOF) {
			if !r.finished {
				return got, errStreamEnded
			}
			return got, nil
		}
		if err != nil {
			return got, err
		}
		got = true
		switch f := f.GetFrame().(type) {
		case *sluicev1.FollowResponse_Draws:
			if err := r.deliver(f.Draws); err != nil {
				return got, err
			}
		case *sluicev1.FollowResponse_Progress:
			r.sum.Progress = progressFromWire(f.Progress)
			r.progress()
		case *sluicev1.FollowResponse_Header:
			h := headerFromWire(f.Header)
			r.sum.Header = &h
			if r.cfg.onHeader != nil {
				r.cfg.onHeader(&h)
			}
		case *sluicev1.FollowResponse_Finished:
			r.finish(f.Finished)
		}
	}
}

// FollowHeader is what a follower learns of a session before its draws:
// what it samples and the budget it was given, as registered.
type FollowHeader struct {
	SessionID string
	Dim       int
	Chains    int
	Kernel    string
	Names     []string
	Step      float64
	Seed      uint64
	// BurnIn and KeepEvery (≥ 1) are in steps per chain.
	BurnIn, KeepEvery int64
	// DrawsPerChain, MaxEvaluations and MaxTime are the budget; 0 means
	// no limit of that kind (the server may still impose its own time
	// limit, which Progress.TimeLeft reflects).
	DrawsPerChain      int64
	MaxEvaluations     int64
	MaxTime            time.Duration
	EvaluationsPerStep int64
	Wants              Wants
	// FirstSeq and NextSeq are the sequence numbers of the oldest draw
	// the server still kept and of the next to come, when it sent the
	// header.
	FirstSeq, NextSeq uint64
}

// OnFollowHeader calls f with the followed session's header, before any
// draw (Follow only).
func OnFollowHeader(f func(*FollowHeader)) Option { return func(c *config) { c.onHeader = f } }

func headerFromWire(h *sluicev1.FollowHeader) FollowHeader {
	w := h.GetWants()
	m := map[sluicev1.Metric]Metric{sluicev1.Metric_METRIC_TV: TV, sluicev1.Metric_METRIC_W2: W2}[w.GetMetric()]
	return FollowHeader{SessionID: h.GetSessionId(), Dim: int(h.GetDim()), Chains: int(h.GetChains()), Kernel: h.GetKernel(),
		Names: h.GetNames(), Step: h.GetStep(), Seed: h.GetSeed(), BurnIn: h.GetBurnIn(), KeepEvery: h.GetKeepEvery(),
		DrawsPerChain: h.GetDrawsPerChain(), MaxEvaluations: h.GetMaxEvaluations(),
		MaxTime: time.Duration(h.GetMaxSeconds() * float64(time.Second)), EvaluationsPerStep: h.GetEvaluationsPerStep(),
		Wants: Wants{MinBulkESS: w.GetMinBulkEss(), MinTailESS: w.GetMinTailEss(), MaxRhat: w.GetMaxRhat(), MaxKSD: w.GetMaxKsd(),
			Eps: w.GetEps(), Metric: m},
		FirstSeq: h.GetFirstSeq(), NextSeq: h.GetNextSeq()}
}
