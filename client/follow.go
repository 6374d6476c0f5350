package client

import (
	"context"
	"errors"
	"io"

	"google.golang.org/grpc"

	sluicev1 "sluice/proto/sluice/v1"
)

// Follow streams the draws of session sessionID (Registered.SessionID),
// from sequence number fromSeq on, to a consumer other than the session's
// client (the Follow rpc); token is the session's Registered.Token (a wrong
// token and an unknown session both give NOT_FOUND). Each block goes to
// the OnDraws callback (and to Summary.Draws with KeepDraws) in sequence
// order, exactly once; Follow returns the session's summary once its final
// frame arrives. Its Registered is empty and DrawsReceived counts this
// follower's rows.
//
// When the stream breaks with UNAVAILABLE (the server restarts, or the
// session is suspended until its client resumes it), Follow follows again
// from the next sequence number it needs, as WithResume bounds. On any
// other error (the context ends, the server answers OUT_OF_RANGE because
// the rows asked for have left its bounded buffer, NOT_FOUND, or
// ErrDrawsLost) Follow returns the error together with a Summary of what
// was received: resume with Follow(ctx, cc, sessionID, token, sum.NextSeq)
// to get every later draw with no loss and no duplicate while the server
// still keeps it. OnRegistered and OnProgress are not called: a follower
// sees draws and the final frame only. The call's receive limit is
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
		case *sluicev1.FollowResponse_Finished:
			r.finish(f.Finished)
		}
	}
}
