package server_test

import (
	"context"
	"errors"
	"math"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"sluice/client"
	"sluice/server"
)

// poolWorker is a worker of a pool run: it sleeps perRow per row before
// answering (a simulated speed) and, when killEvery > 0, has its stream
// cancelled in the middle of its killEvery-th batch, after which a fresh
// worker attaches in its place.
type poolWorker struct {
	perRow    time.Duration
	killEvery int
}

// gradOfStdNormal is ∇log π for N(0, I): −x.
func gradOfStdNormal(b *client.Batch) {
	for i, x := range b.Points {
		b.Grad[i] = -x
	}
}

// work runs w against the session until it ends, replacing the worker
// each time it is killed; kills counts them.
func work(ctx context.Context, conn grpc.ClientConnInterface, id, token string, w poolWorker, kills *atomic.Int64) error {
	for range 100000 { // bounded: each pass answers at least one batch or ends
		wctx, cancel := context.WithCancel(ctx)
		n := 0
		err := client.Work(wctx, conn, id, token, func(ctx context.Context, b *client.Batch) error {
			n++
			if w.killEvery > 0 && n == w.killEvery {
				cancel() // the stream dies holding this batch
				return ctx.Err()
			}
			if w.perRow > 0 {
				time.Sleep(time.Duration(b.Rows) * w.perRow)
			}
			gradOfStdNormal(b)
			return nil
		})
		cancel()
		switch {
		case err == nil:
			return nil // the session ended
		case errors.Is(err, context.Canceled) && ctx.Err() == nil:
			kills.Add(1)
			continue
		case status.Code(err) == codes.NotFound:
			return nil // it ended while the replacement attached
		default:
			return err
		}
	}
	return errors.New("work: too many replacements")
}

// poolResult is what the owner of a pool run received.
type poolResult struct {
	draws []float64
	sum   *client.Summary
	kills int64
}

// runPool runs spec with the given workers; with none, the owner
// evaluates everything itself.
func runPool(ctx context.Context, conn grpc.ClientConnInterface, spec client.Spec, workers []poolWorker) (poolResult, error) {
	var res poolResult
	var wg sync.WaitGroup
	var kills atomic.Int64
	errs := make(chan error, len(workers))
	spec.WorkersOnly = len(workers) > 0
	own := func(_ context.Context, b *client.Batch) error { gradOfStdNormal(b); return nil }
	sum, err := client.Run(ctx, conn, spec, own,
		client.OnRegistered(func(r *client.Registered) {
			for _, w := range workers {
				wg.Add(1)
				go func() {
					defer wg.Done()
					if err := work(ctx, conn, r.SessionID, r.Token, w, &kills); err != nil {
						errs <- err
					}
				}()
			}
		}),
		client.OnDraws(func(d *client.Draws) { res.draws = append(res.draws, d.Values...) }))
	wg.Wait()
	close(errs)
	if err == nil {
		err = <-errs
	}
	res.sum, res.kills = sum, kills.Load()
	return res, err
}

func poolSpec() client.Spec {
	return client.Spec{Dim: 3, Chains: 24, Start: []float64{1, -1, 0.5}, Step: 0.1, Seed: 99,
		BurnIn: 5, DrawsPerChain: 20, ProgressEverySteps: 1}
}

func sameDraws(t *testing.T, what string, want, got []float64) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("%s: %d values, the one-client run has %d", what, len(got), len(want))
	}
	for i := range want {
		if math.Float64bits(got[i]) != math.Float64bits(want[i]) {
			t.Fatalf("%s: value %d is %v, the one-client run has %v", what, i, got[i], want[i])
		}
	}
}

// Over gRPC, 1, 3 and 8 workers of different speeds (the owner only
// consuming) give, bit for bit, the draws of one client answering
// everything: the kernel draws the noise and sees complete answers.
func TestAttachDrawsEqualOneClient(t *testing.T) {
	conn, _ := start(t, server.Options{})
	ctx := testCtx(t)
	spec := poolSpec()
	one, err := runPool(ctx, conn, spec, nil)
	if err != nil {
		t.Fatal(err)
	}
	speeds := []time.Duration{0, 300 * time.Microsecond, 50 * time.Microsecond, time.Millisecond}
	for _, n := range []int{1, 3, 8} {
		var ws []poolWorker
		for i := range n {
			ws = append(ws, poolWorker{perRow: speeds[i%len(speeds)]})
		}
		got, err := runPool(ctx, conn, spec, ws)
		if err != nil {
			t.Fatalf("%d workers: %v", n, err)
		}
		if !collected(got.sum.Reason) {
			t.Fatalf("%d workers: reason %v", n, got.sum.Reason)
		}
		sameDraws(t, "pool", one.draws, got.draws)
		if len(got.sum.Progress.Workers) == 0 {
			t.Fatalf("%d workers: the progress report lists no worker", n)
		}
	}
}

// Workers whose streams are cancelled in the middle of a batch every few
// batches, each replaced by a fresh one: no draw is lost or duplicated
// (the client checks the sequence numbers) and the draws equal the
// one-client run's.
func TestAttachWorkersKilledMidRun(t *testing.T) {
	conn, _ := start(t, server.Options{})
	ctx := testCtx(t)
	spec := poolSpec()
	one, err := runPool(ctx, conn, spec, nil)
	if err != nil {
		t.Fatal(err)
	}
	ws := []poolWorker{{killEvery: 5}, {perRow: 100 * time.Microsecond}, {killEvery: 9}}
	got, err := runPool(ctx, conn, spec, ws)
	if err != nil {
		t.Fatal(err)
	}
	if got.kills == 0 {
		t.Fatal("no worker was killed")
	}
	if got.sum.DrawsReceived != int64(spec.Chains)*spec.DrawsPerChain {
		t.Fatalf("%d draws received, want %d", got.sum.DrawsReceived, int64(spec.Chains)*spec.DrawsPerChain)
	}
	sameDraws(t, "killed workers", one.draws, got.draws)
	if got.sum.Progress.RowsReissued == 0 {
		t.Fatal("no row reissued, though workers died holding rows")
	}
}

// Attach names what is wrong: an unknown session is NOT_FOUND, a wrong
// token PERMISSION_DENIED, a first frame that is not attach
// INVALID_ARGUMENT naming the field.
func TestAttachRefusals(t *testing.T) {
	conn, _ := start(t, server.Options{})
	ctx := testCtx(t)
	nop := func(context.Context, *client.Batch) error { return nil }
	if err := client.Work(ctx, conn, "no-such-session", server.NewSessionToken(), nop); status.Code(err) != codes.NotFound {
		t.Fatalf("unknown session: %v, want NOT_FOUND", err)
	}
	spec := poolSpec()
	spec.WorkersOnly = true
	var got error
	_, err := client.Run(ctx, conn, spec, nil, client.OnRegistered(func(r *client.Registered) {
		got = client.Work(ctx, conn, r.SessionID, r.Token+"x", nop)
		// A worker with the right token then serves the session.
		go func() {
			_ = client.Work(ctx, conn, r.SessionID, r.Token, func(_ context.Context, b *client.Batch) error { gradOfStdNormal(b); return nil })
		}()
	}))
	if err != nil {
		t.Fatal(err)
	}
	if status.Code(got) != codes.PermissionDenied {
		t.Fatalf("wrong token: %v, want PERMISSION_DENIED", got)
	}
}
