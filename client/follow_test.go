package client

import (
	"context"
	"errors"
	"slices"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	sluicev1 "sluice/proto/sluice/v1"
)

// testCtx bounds a test's calls (a safety net in minutes, not a timing).
func testCtx(t *testing.T) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	t.Cleanup(cancel)
	return ctx
}

func TestDialPlainTextOnlyToLoopback(t *testing.T) {
	for target, local := range map[string]bool{
		"127.0.0.1:7070": true, "127.3.4.5:1": true, "[::1]:7070": true, "localhost:7070": true,
		"dns:///127.0.0.1:7070": true, "unix:///tmp/sluice.sock": true, "passthrough:///localhost:1": true,
		"10.0.0.8:7070": false, "sluice.example:7070": false, "[2001:db8::1]:7070": false, "0.0.0.0:7070": false,
	} {
		if isLocal(target) != local {
			t.Errorf("isLocal(%q) = %v, want %v", target, !local, local)
		}
		cc, err := Dial(target)
		if (err == nil) != local {
			t.Errorf("Dial(%q): err %v, want refused = %v", target, err, !local)
		}
		if cc != nil {
			_ = cc.Close()
		}
	}
	for _, opt := range []DialOption{WithInsecure(), WithTLS(nil)} {
		cc, err := Dial("sluice.example:7070", opt)
		if err != nil {
			t.Fatal(err)
		}
		_ = cc.Close()
	}
	if _, err := Dial("127.0.0.1:7070", WithMaxMessageBytes(0)); err == nil {
		t.Error("a zero message limit was accepted")
	}
}

// drawsFrame returns rows draws of dim 1 whose values are their sequence
// numbers, chain seq%2 and iteration seq/2+1.
func drawsFrame(seq uint64, rows int) *sluicev1.Draws {
	v := make([]float64, rows)
	ch := make([]int32, rows)
	it := make([]int64, rows)
	for i := range rows {
		v[i] = float64(seq) + float64(i)
		ch[i] = int32((seq + uint64(i)) % 2)
		it[i] = int64((seq+uint64(i))/2 + 1)
	}
	return &sluicev1.Draws{Seq: seq, Rows: int32(rows), Dim: 1, Values: putFloats(nil, v), Chains: ch, Iterations: it}
}

// A session that fails before the server's final frame still hands back
// what arrived: the acknowledgement, the draws (with KeepDraws), the last
// progress, and the error status as the server sent it.
func TestRunFailureReturnsPartialResults(t *testing.T) {
	cc := startFake(t, &fakeServer{session: func(s grpc.BidiStreamingServer[sluicev1.SessionRequest, sluicev1.SessionResponse]) error {
		if _, err := s.Recv(); err != nil {
			return err
		}
		for _, f := range []*sluicev1.SessionResponse{
			{Frame: &sluicev1.SessionResponse_Registered{Registered: &sluicev1.Registered{SessionId: "s1", Names: []string{"x"}}}},
			{Frame: &sluicev1.SessionResponse_Draws{Draws: drawsFrame(0, 3)}},
			{Frame: &sluicev1.SessionResponse_Progress{Progress: &sluicev1.Progress{Steps: 7, EvaluationsUsed: 14}}},
			{Frame: &sluicev1.SessionResponse_Draws{Draws: drawsFrame(3, 2)}},
		} {
			if err := s.Send(f); err != nil {
				return err
			}
		}
		return status.Error(codes.Internal, "lost the engine")
	}})
	var blocks int
	sum, err := Run(testCtx(t), cc, Spec{Dim: 1, Chains: 2, Start: []float64{0}, Step: 0.1},
		func(context.Context, *Batch) error { return nil }, KeepDraws(), OnDraws(func(*Draws) { blocks++ }))
	if status.Code(err) != codes.Internal {
		t.Fatalf("error %v, want the server's INTERNAL status", err)
	}
	if sum == nil || sum.Reason != "" || sum.Registered.SessionID != "s1" || sum.Progress.Steps != 7 ||
		sum.Progress.EvaluationsUsed != 14 || sum.DrawsReceived != 5 || sum.NextSeq != 5 || blocks != 2 {
		t.Fatalf("partial summary %+v after %d blocks", sum, blocks)
	}
	if d := sum.Draws; d == nil || d.Rows() != 5 || !slices.Equal(d.Values, []float64{0, 1, 2, 3, 4}) ||
		!slices.Equal(d.Chains, []int{0, 1, 0, 1, 0}) || !slices.Equal(d.Iterations, []int64{1, 1, 2, 2, 3}) || d.Row(4)[0] != 4 {
		t.Fatalf("kept draws %+v", sum.Draws)
	}
}

// followLog serves a session of n draws of dim 1 in blocks of 3 from the
// requested sequence number; when cut > 0 the first call ends with
// UNAVAILABLE once it has sent the rows before cut.
func followLog(n, cut uint64) *fakeServer {
	calls := 0
	return &fakeServer{follow: func(r *sluicev1.FollowRequest, s grpc.ServerStreamingServer[sluicev1.FollowResponse]) error {
		calls++
		if r.GetSessionId() != "s1" || r.GetToken() != "t1" {
			return status.Error(codes.NotFound, "no session with this id and token")
		}
		for seq := r.GetFromSeq(); seq < n; seq += 3 {
			if calls == 1 && cut > 0 && seq >= cut {
				return status.Error(codes.Unavailable, "connection dropped")
			}
			if err := s.Send(&sluicev1.FollowResponse{Frame: &sluicev1.FollowResponse_Draws{Draws: drawsFrame(seq, int(min(3, n-seq)))}}); err != nil {
				return err
			}
		}
		return s.Send(&sluicev1.FollowResponse{Frame: &sluicev1.FollowResponse_Finished{Finished: &sluicev1.Finished{
			Reason:     sluicev1.FinishReason_FINISH_REASON_DRAWS_COLLECTED,
			Parameters: []*sluicev1.ParameterSummary{{Name: "x", Mean: float64(n-1) / 2, Count: int64(n)}}}}})
	}}
}

// A follower that loses its connection resumes from NextSeq and gets
// every later draw exactly once (the Follow rpc's contract in the wire
// API): by hand when resuming is off, by itself by default.
func TestFollowResumesWithoutLossOrDuplicate(t *testing.T) {
	cc := startFake(t, followLog(10, 6))
	first, err := Follow(testCtx(t), cc, "s1", "t1", 0, KeepDraws(), WithResume(ResumePolicy{Attempts: -1}))
	if status.Code(err) != codes.Unavailable || first == nil || first.NextSeq != 6 || first.Reason != "" {
		t.Fatalf("first follow: %v, %+v", err, first)
	}
	rest, err := Follow(testCtx(t), cc, "s1", "t1", first.NextSeq, KeepDraws())
	if err != nil || rest.Reason != DrawsCollected || rest.NextSeq != 10 || rest.DrawsReceived != 4 {
		t.Fatalf("resumed follow: %v, %+v", err, rest)
	}
	all := append(slices.Clone(first.Draws.Values), rest.Draws.Values...)
	if !slices.Equal(all, []float64{0, 1, 2, 3, 4, 5, 6, 7, 8, 9}) {
		t.Fatalf("draws %v", all)
	}
	if len(rest.Parameters) != 1 || rest.Parameters[0].Mean != 4.5 {
		t.Fatalf("summary parameters %+v", rest.Parameters)
	}
	for _, c := range [][2]string{{"nope", "t1"}, {"s1", "wrong"}, {"s1", ""}} {
		if _, err := Follow(testCtx(t), startFake(t, followLog(10, 0)), c[0], c[1], 0); status.Code(err) != codes.NotFound {
			t.Fatalf("session %q token %q: %v", c[0], c[1], err)
		}
	}
	auto, err := Follow(testCtx(t), startFake(t, followLog(10, 6)), "s1", "t1", 0, KeepDraws(), WithResume(ResumePolicy{First: time.Millisecond}))
	if err != nil || auto.Resumes != 1 || auto.NextSeq != 10 || !slices.Equal(auto.Draws.Values, []float64{0, 1, 2, 3, 4, 5, 6, 7, 8, 9}) {
		t.Fatalf("follow resuming by itself: %v, %+v", err, auto)
	}
}

// Run resumes a session whose stream broke with UNAVAILABLE by itself: the
// new stream's first frame is Resume with the session's id, token and the
// next sequence number it needs, and OnDraws sees every draw once, in
// order; OnRegistered is called once.
func TestRunResumesAfterUnavailable(t *testing.T) {
	streams := 0
	var resume *sluicev1.Resume
	cc := startFake(t, &fakeServer{session: func(s grpc.BidiStreamingServer[sluicev1.SessionRequest, sluicev1.SessionResponse]) error {
		f, err := s.Recv()
		if err != nil {
			return err
		}
		streams++
		send := func(fs ...*sluicev1.SessionResponse) error {
			for _, f := range fs {
				if err := s.Send(f); err != nil {
					return err
				}
			}
			return nil
		}
		reg := &sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Registered{Registered: &sluicev1.Registered{
			SessionId: "s1", ResumeToken: "t1", Names: []string{"x"}, Resumed: streams > 1}}}
		switch streams {
		case 1:
			if f.GetRegister() == nil {
				return status.Error(codes.InvalidArgument, "want register")
			}
			if err := send(reg, &sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Draws{Draws: drawsFrame(0, 3)}}); err != nil {
				return err
			}
			return status.Error(codes.Unavailable, "server going away")
		case 2:
			resume = f.GetResume()
			return send(reg, &sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Draws{Draws: drawsFrame(3, 2)}},
				&sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Finished{Finished: &sluicev1.Finished{
					Reason: sluicev1.FinishReason_FINISH_REASON_DRAWS_COLLECTED}}})
		}
		return status.Error(codes.Internal, "too many streams")
	}})
	var regs int
	sum, err := Run(testCtx(t), cc, Spec{Dim: 1, Chains: 2, Start: []float64{0}, Step: 0.1},
		func(context.Context, *Batch) error { return nil }, KeepDraws(), OnRegistered(func(*Registered) { regs++ }),
		WithResume(ResumePolicy{First: time.Millisecond}))
	if err != nil {
		t.Fatal(err)
	}
	if resume == nil || resume.GetSessionId() != "s1" || resume.GetToken() != "t1" || resume.GetNextSeq() != 3 {
		t.Fatalf("resume frame %+v", resume)
	}
	if sum.Reason != DrawsCollected || sum.Resumes != 1 || regs != 1 || !sum.Registered.Resumed ||
		!slices.Equal(sum.Draws.Values, []float64{0, 1, 2, 3, 4}) {
		t.Fatalf("summary %+v, %d registrations", sum, regs)
	}
}

// A repeated or skipped sequence number is a fault, never silently
// accepted.
func TestFollowDetectsGaps(t *testing.T) {
	cc := startFake(t, &fakeServer{follow: func(r *sluicev1.FollowRequest, s grpc.ServerStreamingServer[sluicev1.FollowResponse]) error {
		for _, seq := range []uint64{r.GetFromSeq(), r.GetFromSeq() + 4} {
			if err := s.Send(&sluicev1.FollowResponse{Frame: &sluicev1.FollowResponse_Draws{Draws: drawsFrame(seq, 3)}}); err != nil {
				return err
			}
		}
		return nil
	}})
	sum, err := Follow(testCtx(t), cc, "s1", "t1", 2)
	if !errors.Is(err, ErrDrawsLost) || sum.NextSeq != 5 || sum.DrawsReceived != 3 {
		t.Fatalf("gap: %v, %+v", err, sum)
	}
}

// The header reaches OnFollowHeader before any draw, and each progress
// report reaches OnProgress in its place among the draws; the summary
// keeps the header (and, from the final frame, the final report).
func TestFollowDeliversHeaderAndProgressInOrder(t *testing.T) {
	cc := startFake(t, &fakeServer{follow: func(r *sluicev1.FollowRequest, s grpc.ServerStreamingServer[sluicev1.FollowResponse]) error {
		frames := []*sluicev1.FollowResponse{
			{Frame: &sluicev1.FollowResponse_Header{Header: &sluicev1.FollowHeader{SessionId: "s1", Dim: 1, Chains: 2,
				Names: []string{"x"}, MaxSeconds: 1.5, DrawsPerChain: 3, Wants: &sluicev1.Wants{Metric: sluicev1.Metric_METRIC_W2}}}},
			{Frame: &sluicev1.FollowResponse_Progress{Progress: &sluicev1.Progress{Steps: 1, DrawsSent: 0}}},
			{Frame: &sluicev1.FollowResponse_Draws{Draws: drawsFrame(0, 3)}},
			{Frame: &sluicev1.FollowResponse_Progress{Progress: &sluicev1.Progress{Steps: 2, DrawsSent: 3}}},
			{Frame: &sluicev1.FollowResponse_Draws{Draws: drawsFrame(3, 3)}},
			{Frame: &sluicev1.FollowResponse_Finished{Finished: &sluicev1.Finished{Reason: sluicev1.FinishReason_FINISH_REASON_DRAWS_COLLECTED}}},
		}
		for _, f := range frames {
			if err := s.Send(f); err != nil {
				return err
			}
		}
		return nil
	}})
	var order []string
	sum, err := Follow(testCtx(t), cc, "s1", "t1", 0,
		OnFollowHeader(func(h *FollowHeader) { order = append(order, "header "+h.Names[0]) }),
		OnProgress(func(p *Progress) { order = append(order, "progress "+string(rune('0'+p.Steps))) }),
		OnDraws(func(d *Draws) { order = append(order, "draws "+string(rune('0'+d.Seq))) }))
	if err != nil {
		t.Fatal(err)
	}
	want := []string{"header x", "progress 1", "draws 0", "progress 2", "draws 3"}
	if !slices.Equal(order, want) {
		t.Fatalf("callbacks %q, want %q", order, want)
	}
	h := sum.Header
	if h == nil || h.Chains != 2 || h.MaxTime != 1500*time.Millisecond || h.DrawsPerChain != 3 || h.Wants.Metric != W2 ||
		sum.Reason != DrawsCollected || sum.NextSeq != 6 {
		t.Fatalf("summary %+v, header %+v", sum, h)
	}
}

func TestPlanDecodesTheAnswer(t *testing.T) {
	cc := startFake(t, &fakeServer{plan: func(_ context.Context, r *sluicev1.PlanRequest) (*sluicev1.PlanResponse, error) {
		if r.GetEps() <= 0 {
			return nil, status.Error(codes.InvalidArgument, "eps must be > 0")
		}
		return &sluicev1.PlanResponse{Step: 0.01, Iterations: 600, Evaluations: 1200, Seconds: -1,
			Bound:       &sluicev1.Bound{Metric: sluicev1.Metric_METRIC_W2, Value: r.GetEps(), Source: sluicev1.BoundSource_BOUND_SOURCE_DECLARED},
			Assumptions: []string{"m-strongly convex"}, ConstantsRecalled: true}, nil
	}})
	spec := PlanSpec{Curvature: Curvature{StrongConvexity: 1, Smoothness: 4}, Dim: 2, Eps: 0.1, Metric: W2, Chains: 2}
	p, err := Plan(testCtx(t), cc, spec)
	if err != nil || p.Step != 0.01 || p.Iterations != 600 || p.Evaluations != 1200 || p.Seconds != -1 ||
		p.Bound.Metric != W2 || p.Bound.Value != 0.1 || !p.Bound.Guaranteed || !p.ConstantsRecalled || len(p.Assumptions) != 1 {
		t.Fatalf("plan %+v, %v", p, err)
	}
	spec.Eps = 0
	if _, err := Plan(testCtx(t), cc, spec); status.Code(err) != codes.InvalidArgument {
		t.Fatalf("bad eps: %v", err)
	}
}
