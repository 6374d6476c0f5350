package server_test

import (
	"bufio"
	"context"
	"io"
	"net/http"
	"net/http/httptest"
	"strconv"
	"strings"
	"sync/atomic"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/stats"
	"google.golang.org/grpc/status"

	"sluice/client"
	"sluice/server"
	"sluice/server/metrics"
	"sluice/server/session"
	"sluice/server/store"
)

// wireBytes counts a client's payload bytes on the wire, independently of
// the server's own count.
type wireBytes struct{ in, out atomic.Int64 }

func (*wireBytes) TagRPC(ctx context.Context, _ *stats.RPCTagInfo) context.Context   { return ctx }
func (*wireBytes) TagConn(ctx context.Context, _ *stats.ConnTagInfo) context.Context { return ctx }
func (*wireBytes) HandleConn(context.Context, stats.ConnStats)                       {}
func (w *wireBytes) HandleRPC(_ context.Context, s stats.RPCStats) {
	switch p := s.(type) {
	case *stats.InPayload:
		w.in.Add(int64(p.WireLength))
	case *stats.OutPayload:
		w.out.Add(int64(p.WireLength))
	}
}

// scrapeMetrics reads the handler's /metrics into name{labels} → value.
func scrapeMetrics(t *testing.T, m *metrics.Metrics) map[string]float64 {
	t.Helper()
	srv := httptest.NewServer(m.Handler(false))
	defer srv.Close()
	resp, err := http.Get(srv.URL + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer func() { _ = resp.Body.Close() }()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]float64{}
	sc := bufio.NewScanner(strings.NewReader(string(body)))
	for sc.Scan() {
		line := sc.Text()
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		i := strings.LastIndexByte(line, ' ')
		if v, err := strconv.ParseFloat(line[i+1:], 64); err == nil {
			out[line[:i]] = v
		}
	}
	return out
}

// standardNormal evaluates ∇log π(x) = −x (and log π = −|x|²/2 up to a
// constant) of the standard normal.
func standardNormal(calls *int) client.Evaluator {
	return func(_ context.Context, b *client.Batch) error {
		*calls++
		for r := range b.Rows {
			x := b.Point(r)
			s := 0.0
			for j, v := range x {
				if b.WantGradient || b.Grad != nil {
					b.Grad[r*b.Dim+j] = -v
				}
				s += v * v
			}
			if b.WantLogDensity {
				b.LogDensity[r] = -s / 2
			}
		}
		return nil
	}
}

func TestMetricsOfASession(t *testing.T) {
	ctx := secCtx(t)
	m := metrics.New()
	tokens, err := server.ParseTokens(strings.NewReader(goodToken))
	if err != nil {
		t.Fatal(err)
	}
	addr := serveTCP(t, append(server.MetricsOptions(m), tokens.ServerOptions()...)...)
	var wire wireBytes
	conn := dialTCP(t, addr, grpc.WithTransportCredentials(insecure.NewCredentials()),
		client.WithPlaintextToken(goodToken), grpc.WithStatsHandler(&wire))

	calls := 0
	spec := client.Spec{Dim: 2, Chains: 6, Start: []float64{0, 0}, Step: 0.1, Seed: 1, MaxEvaluations: 1000}
	sum, err := client.Run(ctx, conn, spec, standardNormal(&calls))
	if err != nil {
		t.Fatal(err)
	}
	if sum.Reason != client.BudgetSpent {
		t.Fatalf("session ended with %v, want budget spent", sum.Reason)
	}
	// Refusals: a call without a token, and a Plan the handler refuses.
	anon := dialTCP(t, addr, grpc.WithTransportCredentials(insecure.NewCredentials()), grpc.WithStatsHandler(&wire))
	if c := plan(ctx, anon); c != codes.Unauthenticated {
		t.Fatalf("Plan without a token: %v", c)
	}
	if c := plan(ctx, conn); c != codes.InvalidArgument {
		t.Fatalf("empty Plan: %v", c)
	}
	got := scrapeMetrics(t, m)
	// The expected figures come from the client's side of the same
	// calls: the session's summary, its evaluator's calls, and the
	// clients' own count of payload bytes on the wire.
	for name, want := range map[string]float64{
		`sluice_sessions{state="running"}`:                      0,
		`sluice_sessions_finished_total{reason="budget_spent"}`: 1,
		`sluice_evaluations_total`:                              float64(sum.Progress.EvaluationsUsed),
		`sluice_step_seconds_count`:                             float64(calls - 1),
		`sluice_refusals_total{reason="unauthenticated"}`:       1,
		`sluice_refusals_total{reason="invalid_argument"}`:      1,
		`sluice_received_bytes_total`:                           float64(wire.out.Load()),
		`sluice_sent_bytes_total`:                               float64(wire.in.Load()),
	} {
		if v, ok := got[name]; !ok || v != want {
			t.Errorf("%s = %v (present %v), want %v", name, v, ok, want)
		}
	}
	if sum.Progress.EvaluationsUsed != 996 {
		t.Errorf("evaluations used %d, want 996 = 6 chains × 166 steps within the budget of 1000", sum.Progress.EvaluationsUsed)
	}
}

func TestMetricsCountAbortedSessions(t *testing.T) {
	ctx, cancel := context.WithCancel(secCtx(t))
	defer cancel()
	m := metrics.New()
	srv, addr := serveTCPServer(t, server.MetricsOptions(m)...)
	conn := dialTCP(t, addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	calls := 0
	spec := client.Spec{Dim: 2, Chains: 2, Start: []float64{0, 0}, Step: 0.1, Seed: 2, MaxEvaluations: 1 << 40}
	eval := standardNormal(&calls)
	_, err := client.Run(ctx, conn, spec, func(ctx context.Context, b *client.Batch) error {
		if calls == 20 {
			cancel() // the client goes away mid-session
		}
		return eval(ctx, b)
	})
	if status.Code(err) != codes.Canceled {
		t.Fatalf("client ended with %v, want Canceled", err)
	}
	// The server's handler sees the cancellation on its own time;
	// GracefulStop returns once every handler has (no stop request is
	// sent to the session, unlike Shutdown).
	srv.GRPCServer().GracefulStop()
	got := scrapeMetrics(t, m)
	if got[`sluice_sessions_finished_total{reason="aborted"}`] != 1 || got[`sluice_sessions{state="running"}`] != 0 {
		t.Errorf("aborted %v, running %v; want 1 and 0", got[`sluice_sessions_finished_total{reason="aborted"}`], got[`sluice_sessions{state="running"}`])
	}
}

// countingStore counts the checkpoints written through it and their bytes.
type countingStore struct {
	store.Store
	puts, bytes atomic.Int64
}

func (c *countingStore) Put(ctx context.Context, id string, rec store.Record) error {
	err := c.Store.Put(ctx, id, rec)
	if err == nil {
		c.puts.Add(1)
		c.bytes.Add(int64(len(rec.State)))
	}
	return err
}

// The server's own metrics read real values: while a session runs, the
// memory budget in use is what the server reserved for it (> 0), and back
// to 0 once it ended; every checkpoint written is one sample of the
// checkpoint time and size histograms, whose size sum is the bytes the
// store received.
func TestMetricsOfCheckpointsAndMemory(t *testing.T) {
	m := metrics.New()
	st := &countingStore{Store: openState(t)}
	conn, srv := start(t, server.Options{Metrics: m, FollowRetention: -1, Limits: session.Limits{FollowBuffer: 4096},
		State: server.StateOptions{Store: st}})
	tg := gaussian2D(t)
	var requests int
	var during map[string]float64
	var used int64
	eval := func(ctx context.Context, b *client.Batch) error {
		requests++
		if requests == 30 {
			during, used = scrapeMetrics(t, m), srv.Used()
		}
		return evaluator(tg)(ctx, b)
	}
	sum, err := client.Run(testCtx(t), conn, survivalSpec(), eval)
	if err != nil || !collected(sum.Reason) {
		t.Fatalf("session: %v, %+v", err, sum)
	}
	const inUse = "sluice_memory_budget_in_use_bytes"
	if during[inUse] <= 0 || during[inUse] != float64(used) {
		t.Errorf("memory in use while the session ran: %v, want the server's reservation %d > 0", during[inUse], used)
	}
	if during["sluice_checkpoint_bytes_count"] < 1 {
		t.Errorf("no checkpoint counted after %d requests (the first precedes the first request)", requests)
	}
	waitFor(t, "the session's reservation to be released", func() bool { return srv.Used() == 0 })
	after := scrapeMetrics(t, m)
	if after[inUse] != 0 {
		t.Errorf("memory in use after the session: %v, want 0", after[inUse])
	}
	puts, bytes := float64(st.puts.Load()), float64(st.bytes.Load())
	if puts < 2 || after["sluice_checkpoint_bytes_count"] != puts || after["sluice_checkpoint_seconds_count"] != puts ||
		after["sluice_checkpoint_bytes_sum"] != bytes {
		t.Errorf("checkpoints: %v counted (%v timed), %v bytes; the store got %v of %v bytes (want at least the first and the last)",
			after["sluice_checkpoint_bytes_count"], after["sluice_checkpoint_seconds_count"], after["sluice_checkpoint_bytes_sum"], puts, bytes)
	}
	t.Logf("%v checkpoints of %v bytes in all; memory in use while running %v bytes", puts, bytes, during[inUse])
}
