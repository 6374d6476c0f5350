package server_test

import (
	"context"
	"net"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/test/bufconn"

	"sluice/client"
	"sluice/server"
)

// benchRow is the simulated cost of one gradient: a sleep standing in for
// a remote simulation, so that eight workers on two cores can run side by
// side.
const benchRow = 20 * time.Millisecond

// timePoolSteps runs 64 chains for warm+steps steps with workers (each
// sleeping perRow per row) and returns the wall time per step after the
// first warm steps, when the speeds are measured.
func timePoolSteps(b *testing.B, spec client.Spec, warm, steps int, workers []poolWorker) (time.Duration, poolResult) {
	b.Helper()
	at, res := timePoolRun(b, spec, warm+steps, workers)
	return at[warm+steps].Sub(at[warm]) / time.Duration(steps), res
}

// timePoolRun runs 64 chains for n steps with workers and returns when
// each step's progress report arrived (at[k] for step k, 1 ≤ k ≤ n).
func timePoolRun(b *testing.B, spec client.Spec, n int, workers []poolWorker) ([]time.Time, poolResult) {
	b.Helper()
	conn := startTB(b)
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
	defer cancel()
	spec.DrawsPerChain, spec.ProgressEverySteps, spec.WorkersOnly = int64(n), 1, true
	at := make([]time.Time, n+1)
	var res poolResult
	var wg sync.WaitGroup
	var kills atomic.Int64
	sum, err := client.Run(ctx, conn, spec, nil,
		client.OnRegistered(func(r *client.Registered) {
			for _, w := range workers {
				wg.Add(1)
				go func() {
					defer wg.Done()
					if err := workSleeping(ctx, conn, r.SessionID, r.Token, w, &kills); err != nil {
						b.Error(err)
					}
				}()
			}
		}),
		client.OnProgress(func(p *client.Progress) {
			if p.Steps >= 1 && p.Steps <= int64(n) && at[p.Steps].IsZero() {
				at[p.Steps] = time.Now()
			}
		}))
	wg.Wait()
	if err != nil {
		b.Fatal(err)
	}
	res.sum, res.kills = sum, kills.Load()
	return at, res
}

// startTB serves a server on an in-memory listener for a benchmark.
func startTB(tb testing.TB) *grpc.ClientConn {
	lis := bufconn.Listen(1 << 20)
	srv := server.New(server.Options{})
	done := make(chan struct{})
	go func() { _ = srv.Serve(lis); close(done) }()
	conn, err := grpc.NewClient("passthrough:///bufnet",
		grpc.WithContextDialer(func(ctx context.Context, _ string) (net.Conn, error) { return lis.DialContext(ctx) }),
		grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		tb.Fatal(err)
	}
	tb.Cleanup(func() { conn.Close(); srv.Stop(); <-done })
	return conn
}

// workSleeping is work with an evaluator that sleeps perRow per row.
func workSleeping(ctx context.Context, conn grpc.ClientConnInterface, id, token string, w poolWorker, kills *atomic.Int64) error {
	return work(ctx, conn, id, token, w, kills)
}

// BenchmarkPoolEfficiency measures the wall time per step of 64 chains
// whose gradient takes benchRow per row, served by one worker, by eight,
// by eight of which one is ten times slower, and by eight of which one is
// killed (its stream cancelled holding rows) at its twentieth batch
// (every fifth step: a share is cut into four parts) and replaced. It
// reports the parallel efficiencies, side by side in one run:
//
//	eff8       = t1 / (8 · t8)          (target ≥ 0.85)
//	eff_slow   = (t1 / 7.1) / t_slow    (ideal: seven full workers and a tenth; target ≥ 0.80)
//	eff_killed = t1 / (8 · t_killed)
//
// The eight-worker runs are timed over the same steps, 3 to 18 (the
// killed one holds three kills there), all before step 20, where the
// server makes its first assessment of the draws (the verdict's figures
// and the Stein discrepancy, on the engine's goroutine, while every
// worker waits for the next request): a cost of the session, the same
// for any number of workers, which a window holding it for one
// configuration only would charge to that configuration. The killed run
// goes on to step 23 and reports that longer window as well
// (eff_killed_to23, ms/step_killed_to23), so the assessment's share shows.
//
// Run with: go test -run '^$' -bench PoolEfficiency -benchtime 1x ./server/
func BenchmarkPoolEfficiency(b *testing.B) {
	spec := client.Spec{Dim: 2, Chains: 64, Start: []float64{0.5, -0.5}, Step: 0.1, Seed: 5}
	eight := func(slow time.Duration, killEvery int) []poolWorker {
		ws := make([]poolWorker, 8)
		for i := range ws {
			ws[i] = poolWorker{perRow: benchRow}
		}
		if slow > 0 {
			ws[7].perRow = slow
		}
		ws[0].killEvery = killEvery
		return ws
	}
	for range b.N {
		t1, _ := timePoolSteps(b, spec, 1, 3, []poolWorker{{perRow: benchRow}})
		t8, _ := timePoolSteps(b, spec, 3, 15, eight(0, 0))
		tSlow, rs := timePoolSteps(b, spec, 3, 15, eight(10*benchRow, 0))
		atKill, rk := timePoolRun(b, spec, 23, eight(0, 20))
		tKill := atKill[18].Sub(atKill[3]) / 15
		tKill23 := atKill[23].Sub(atKill[3]) / 20
		b.ReportMetric(float64(t1.Milliseconds()), "ms/step_1worker")
		b.ReportMetric(float64(t8.Milliseconds()), "ms/step_8workers")
		b.ReportMetric(float64(tSlow.Milliseconds()), "ms/step_1slow")
		b.ReportMetric(float64(tKill.Milliseconds()), "ms/step_killed")
		b.ReportMetric(float64(t1)/(8*float64(t8)), "eff8")
		b.ReportMetric(float64(t1)/7.1/float64(tSlow), "eff_slow")
		b.ReportMetric(float64(t1)/(8*float64(tKill)), "eff_killed")
		b.ReportMetric(float64(tKill23.Milliseconds()), "ms/step_killed_to23")
		b.ReportMetric(float64(t1)/(8*float64(tKill23)), "eff_killed_to23")
		b.ReportMetric(float64(rk.kills), "kills")
		b.ReportMetric(float64(rk.sum.Progress.RowsReissued), "rows_reissued_killed")
		b.ReportMetric(float64(rs.sum.Progress.RowsReissued), "rows_reissued_slow")
	}
}
