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
// client (the Follow rpc). Each block goes to the OnDraws callback (and to
// Summary.Draws with KeepDraws) in sequence order, exactly once; Follow
// returns the session's summary once its final frame arrives. Its
// Registered is empty and DrawsReceived counts this follower's rows.
//
// On any error (the context ends, the connection drops, the server
// answers OUT_OF_RANGE because the rows asked for have left its bounded
// buffer, NOT_FOUND for an unknown session, or ErrDrawsLost) Follow returns
// the error together with a Summary of what was received: resume with
// Follow(ctx, cc, sessionID, sum.NextSeq) to get every later draw with no
// loss and no duplicate while the server still keeps it. OnRegistered and
// OnProgress are not called: a follower sees draws and the final frame
// only. The call's receive limit is DialMaxMessageBytes (a Follow frame
// can be as large as the server's own limit); WithCallOptions changes it.
func Follow(ctx context.Context, cc grpc.ClientConnInterface, sessionID string, fromSeq uint64, opts ...Option) (*Summary, error) {
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
	stream, err := sluicev1.NewSluiceServiceClient(cc).Follow(ctx, &sluicev1.FollowRequest{SessionId: sessionID, FromSeq: fromSeq}, callOpts...)
	if err != nil {
		return r.sum, err
	}
	for {
		f, err := stream.Recv()
		if errors.Is(err, io.EOF) {
			if !r.finished {
				return r.sum, errors.New("client: follow stream ended without a finished frame")
			}
			return r.sum, nil
		}
		if err != nil {
			return r.sum, err
		}
		switch f := f.GetFrame().(type) {
		case *sluicev1.FollowResponse_Draws:
			if err := r.deliver(f.Draws); err != nil {
				return r.sum, err
			}
		case *sluicev1.FollowResponse_Finished:
			r.finish(f.Finished)
		}
	}
}
