package python_test

// The Go client's Dial, Plan and Follow against a real `sluice serve` on
// loopback (the server started for the Python client's tests).

import (
	"context"
	"math"
	"slices"
	"sync"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"sluice/client"
)

func TestGoClientAgainstServer(t *testing.T) {
	root := moduleRoot(t)
	srv := startServer(t, root)
	cc, err := client.Dial(srv.addr) // loopback: plain text allowed
	if err != nil {
		t.Fatal(err)
	}
	defer cc.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()

	t.Run("plan", func(t *testing.T) {
		// The total-variation rule of Dalalyan (2017) for unadjusted
		// Langevin with a Gaussian start (recalled from memory): T =
		// (4 log(1/e) + p log(M/m)) / (2m), h = e^2 / (M^2 p T), K =
		// ceil(T/h). The server plans for e = 0.9·eps, keeping a tenth of
		// eps for the shift of its mode search's start: for m = 1, M = 4,
		// p = 2, eps = 0.1, e = 0.09, T = 6.202185578423634,
		// h = 4.081222607730081e-05 and K = 151969.
		p, err := client.Plan(ctx, cc, client.PlanSpec{Curvature: client.Curvature{StrongConvexity: 1, Smoothness: 4},
			Dim: 2, Eps: 0.1, Metric: client.TV})
		if err != nil {
			t.Fatal(err)
		}
		e := 0.09
		T := (4*math.Log(1/e) + 2*math.Log(4)) / 2
		h := e * e / (16 * 2 * T)
		if math.Abs(p.Horizon-T) > 1e-9*T || math.Abs(p.Step-h) > 1e-9*h || p.Iterations != int64(math.Ceil(T/h)) ||
			p.Iterations != 151969 || p.Seconds != -1 || !p.ConstantsRecalled || p.Bound.Metric != client.TV || p.Bound.Value > 0.1 {
			t.Fatalf("plan %+v; want T %v, h %v, K 151969", p, T, h)
		}
		_, err = client.Plan(ctx, cc, client.PlanSpec{Curvature: client.Curvature{StrongConvexity: 1, Smoothness: 4},
			Dim: 2, Eps: 0.7, Metric: client.TV})
		if status.Code(err) != codes.InvalidArgument {
			t.Fatalf("eps 0.7 in TV: %v, want INVALID_ARGUMENT", err)
		}
	})

	t.Run("follow", func(t *testing.T) {
		// A follower attached as soon as the session is registered gets
		// exactly the session's draws, in the same order, and its summary.
		spec := client.Spec{Dim: 2, Chains: 4, Start: []float64{1, -1}, Step: 0.2, BurnIn: 20, DrawsPerChain: 300,
			Seed: 11, Names: []string{"a", "b"}}
		var (
			wg       sync.WaitGroup
			followed *client.Summary
			ferr     error
		)
		sum, err := client.Run(ctx, cc, spec, func(_ context.Context, b *client.Batch) error {
			for i, x := range b.Points {
				b.Grad[i] = -x // N(0, I)
			}
			return nil
		}, client.KeepDraws(), client.OnRegistered(func(r *client.Registered) {
			wg.Add(1)
			go func() {
				defer wg.Done()
				followed, ferr = client.Follow(ctx, cc, r.SessionID, r.Token, 0, client.KeepDraws())
			}()
		}))
		wg.Wait()
		if err != nil || ferr != nil {
			t.Fatalf("session: %v; follower: %v", err, ferr)
		}
		if sum.Reason != client.DrawsCollected || sum.DrawsReceived != 4*300 || sum.Draws.Rows() != 4*300 {
			t.Fatalf("session summary %+v", sum)
		}
		if followed.Reason != sum.Reason || followed.DrawsReceived != sum.DrawsReceived ||
			!slices.Equal(followed.Draws.Values, sum.Draws.Values) || !slices.Equal(followed.Draws.Chains, sum.Draws.Chains) ||
			!slices.Equal(followed.Draws.Iterations, sum.Draws.Iterations) || !slices.Equal(followed.Parameters, sum.Parameters) {
			t.Fatalf("follower saw %d draws and %+v; the session %d and %+v", followed.DrawsReceived, followed.Parameters,
				sum.DrawsReceived, sum.Parameters)
		}
		// The server's summary is over the same draws the client kept.
		for j, p := range sum.Parameters {
			var mean float64
			for i := range sum.Draws.Rows() {
				mean += sum.Draws.Row(i)[j]
			}
			mean /= float64(sum.Draws.Rows())
			if math.Abs(mean-p.Mean) > 1e-12*(1+math.Abs(mean)) || p.Count != 1200 {
				t.Fatalf("%s: server mean %v over %d, kept draws %v", p.Name, p.Mean, p.Count, mean)
			}
		}
	})

	t.Run("failure", func(t *testing.T) {
		// A non-finite gradient ends the session with INVALID_ARGUMENT
		// (the wire API: every value must be finite); the draws made
		// before it come back with the error.
		steps := 0
		sum, err := client.Run(ctx, cc, client.Spec{Dim: 1, Chains: 2, Start: []float64{0}, Step: 0.1, Seed: 3},
			func(_ context.Context, b *client.Batch) error {
				steps++
				for i, x := range b.Points {
					b.Grad[i] = -x
					if steps == 50 {
						b.Grad[i] = math.NaN()
					}
				}
				return nil
			}, client.KeepDraws())
		if status.Code(err) != codes.InvalidArgument || sum == nil || sum.Reason != client.Failed {
			t.Fatalf("error %v, summary %+v", err, sum)
		}
		if sum.DrawsReceived == 0 || int64(sum.Draws.Rows()) != sum.DrawsReceived || sum.NextSeq != uint64(sum.DrawsReceived) {
			t.Fatalf("partial draws: %d received, %d kept", sum.DrawsReceived, sum.Draws.Rows())
		}
	})
}
