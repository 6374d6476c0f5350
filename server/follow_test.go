package server_test

import (
	"context"
	"errors"
	"io"
	"testing"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"sluice/client"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server"
	"sluice/server/session"
)

// followRows reads a Follow stream from seq until it has want rows more
// (or the stream ends), returning the values, the next seq, and the
// stream's end (nil while rows were still coming).
func followRows(ctx context.Context, c sluicev1.SluiceServiceClient, id, token string, from uint64, want int) ([]float64, uint64, *sluicev1.Finished, error) {
	st, err := c.Follow(ctx, &sluicev1.FollowRequest{SessionId: id, Token: token, FromSeq: from})
	if err != nil {
		return nil, from, nil, err
	}
	var vals []float64
	got := 0
	for got < want {
		f, err := st.Recv()
		if errors.Is(err, io.EOF) {
			return vals, from, nil, nil
		}
		if err != nil {
			return vals, from, nil, err
		}
		if fin := f.GetFinished(); fin != nil {
			return vals, from, fin, nil
		}
		d := f.GetDraws()
		if d == nil { // header and progress frames
			continue
		}
		if d.Seq != from {
			return vals, from, nil, errors.New("gap or duplicate in followed draws")
		}
		for i := 0; i+8 <= len(d.Values); i += 8 {
			vals = append(vals, float64frombytes(d.Values[i:]))
		}
		from += uint64(d.Rows)
		got += int(d.Rows)
	}
	return vals, from, nil, nil
}

// A follower that disconnects and comes back with its next sequence
// number gets every draw exactly once, identical to what the session's
// own client received, then the Finished frame.
func TestFollowResumesWithoutLossOrDuplicate(t *testing.T) {
	conn, _ := start(t, server.Options{Limits: session.Limits{FollowBuffer: 4096}})
	ctx := testCtx(t)
	ids := make(chan client.Registered, 1)
	var own []float64
	spec := client.Spec{Dim: 2, Chains: 4, Start: []float64{0, 0}, Step: 0.1, Seed: 8, DrawsPerChain: 300}
	done := make(chan error, 1)
	go func() {
		_, err := client.Run(ctx, conn, spec, evaluator(gaussian2D(t)),
			client.OnRegistered(func(r *client.Registered) { ids <- *r }),
			client.OnDraws(func(d *client.Draws) { own = append(own, d.Values...) }))
		done <- err
	}()
	reg := <-ids
	c := sluicev1.NewSluiceServiceClient(conn)
	var got []float64
	from := uint64(0)
	for _, chunk := range []int{250, 333, 1 << 30} { // disconnect twice mid-stream
		cctx, cancel := context.WithCancel(ctx)
		vals, next, fin, err := followRows(cctx, c, reg.SessionID, reg.Token, from, chunk)
		cancel()
		if err != nil {
			t.Fatal(err)
		}
		got = append(got, vals...)
		from = next
		if fin != nil {
			if fin.Reason != sluicev1.FinishReason_FINISH_REASON_DRAWS_COLLECTED {
				t.Fatalf("finished %v", fin.Reason)
			}
			break
		}
	}
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	if from != 1200 || len(got) != len(own) {
		t.Fatalf("followed %d values up to seq %d; the client got %d values (want 1200 rows)", len(got), from, len(own))
	}
	for i := range own {
		if got[i] != own[i] {
			t.Fatalf("value %d: followed %v, client %v", i, got[i], own[i])
		}
	}
}

// A consumer asking for draws that have left the bounded buffer gets
// OUT_OF_RANGE naming from_seq, not a silent gap; an unknown session gets
// NOT_FOUND.
func TestFollowBehindBufferIsOutOfRange(t *testing.T) {
	conn, _ := start(t, server.Options{Limits: session.Limits{FollowBuffer: 40}})
	ctx := testCtx(t)
	spec := client.Spec{Dim: 2, Chains: 4, Start: []float64{0, 0}, Step: 0.1, Seed: 8, DrawsPerChain: 100}
	sum, err := client.Run(ctx, conn, spec, evaluator(gaussian2D(t)))
	if err != nil {
		t.Fatal(err)
	}
	c := sluicev1.NewSluiceServiceClient(conn)
	_, _, _, err = followRows(ctx, c, sum.Registered.SessionID, sum.Registered.Token, 0, 10)
	if s := status.Convert(err); s.Code() != codes.OutOfRange || fieldOf(s) != "from_seq" {
		t.Fatalf("from 0 with 40 kept of 400: %v (field %q), want OUT_OF_RANGE on from_seq", err, fieldOf(s))
	}
	// The last 40 rows are still there, then the Finished frame.
	vals, next, fin, err := followRows(ctx, c, sum.Registered.SessionID, sum.Registered.Token, 360, 1<<30)
	if err != nil || len(vals) != 80 || next != 400 || fin == nil {
		t.Fatalf("tail: %d values, next %d, finished %v, err %v", len(vals), next, fin != nil, err)
	}
	_, _, _, err = followRows(ctx, c, sum.Registered.SessionID, sum.Registered.Token, 401, 1)
	if status.Code(err) != codes.OutOfRange {
		t.Fatalf("beyond the end: %v", err)
	}
	// An unknown id and a known id with a wrong or missing token get the
	// same answer: the token's secrecy protects the id.
	var msgs []string
	for _, c2 := range [][2]string{{"no-such-session", sum.Registered.Token}, {sum.Registered.SessionID, "wrong"},
		{sum.Registered.SessionID, ""}, {sum.Registered.SessionID, sum.Registered.Token[1:]}} {
		_, _, _, err = followRows(ctx, c, c2[0], c2[1], 0, 1)
		s := status.Convert(err)
		if s.Code() != codes.NotFound || fieldOf(s) != "session_id" {
			t.Fatalf("session %q token %q: %v", c2[0], c2[1], err)
		}
		msgs = append(msgs, s.Message())
	}
	for _, m := range msgs[1:] {
		if m != msgs[0] {
			t.Fatalf("answers differ: %q and %q", msgs[0], m)
		}
	}
	if len(sum.Registered.SessionID) != 32 || len(sum.Registered.Token) != 32 || sum.Registered.SessionID == sum.Registered.Token {
		t.Fatalf("id %q and token %q: want two distinct 128-bit hex values", sum.Registered.SessionID, sum.Registered.Token)
	}
}

// The header comes first with the registered figures; progress reports
// come among the draws exactly where the session made them: each
// report's draws_sent equals the rows received before it. With a report
// every 25 steps, 30 burn-in steps and 60 kept steps, the session makes
// floor(90/25) = 3 reports, all still kept when the follower reads the
// finished session from the start.
func TestFollowSendsHeaderAndPlacesProgress(t *testing.T) {
	conn, _ := start(t, server.Options{Limits: session.Limits{FollowBuffer: 4096}})
	ctx := testCtx(t)
	spec := client.Spec{Dim: 2, Chains: 3, Start: []float64{0, 0}, Step: 0.1, Seed: 8, BurnIn: 30, DrawsPerChain: 60,
		ProgressEverySteps: 25, MaxEvaluations: 1000, Names: []string{"a", "b"}, Wants: client.Wants{MinBulkESS: 1e9}}
	sum, err := client.Run(ctx, conn, spec, evaluator(gaussian2D(t)))
	if err != nil {
		t.Fatal(err)
	}
	st, err := sluicev1.NewSluiceServiceClient(conn).Follow(ctx, &sluicev1.FollowRequest{SessionId: sum.Registered.SessionID, Token: sum.Registered.Token})
	if err != nil {
		t.Fatal(err)
	}
	var frames, rows, reports int
	var lastSteps int64
	for {
		f, err := st.Recv()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		frames++
		switch f := f.GetFrame().(type) {
		case *sluicev1.FollowResponse_Header:
			h := f.Header
			if frames != 1 || h.SessionId != sum.Registered.SessionID || h.Dim != 2 || h.Chains != 3 || h.Kernel != "lmc" ||
				len(h.Names) != 2 || h.Names[1] != "b" || h.BurnIn != 30 || h.KeepEvery != 1 || h.DrawsPerChain != 60 ||
				h.MaxEvaluations != 1000 || h.Seed != 8 || h.Step != 0.1 || h.EvaluationsPerStep != 3 ||
				h.GetWants().GetMinBulkEss() != 1e9 || h.FirstSeq != 0 || h.NextSeq != 180 {
				t.Fatalf("frame %d: header %v", frames, h)
			}
		case *sluicev1.FollowResponse_Progress:
			reports++
			p := f.Progress
			if p.DrawsSent != int64(rows) || p.Steps != int64(25*reports) || p.Steps <= lastSteps {
				t.Errorf("report %d at %d rows: steps %d, draws_sent %d", reports, rows, p.Steps, p.DrawsSent)
			}
			lastSteps = p.Steps
		case *sluicev1.FollowResponse_Draws:
			if frames == 1 {
				t.Fatal("draws before the header")
			}
			rows += int(f.Draws.Rows)
		case *sluicev1.FollowResponse_Finished:
			if rows != 180 || reports != 3 {
				t.Fatalf("finished after %d rows and %d reports, want 180 and 3", rows, reports)
			}
			return
		}
	}
	t.Fatal("no finished frame")
}
