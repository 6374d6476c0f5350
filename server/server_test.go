package server_test

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"net"
	"sync"
	"testing"
	"time"

	"go.uber.org/goleak"
	"gonum.org/v1/gonum/mat"
	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	reflectpb "google.golang.org/grpc/reflection/grpc_reflection_v1"
	"google.golang.org/grpc/status"
	"google.golang.org/grpc/test/bufconn"
	"google.golang.org/protobuf/proto"

	"sluice/client"
	"sluice/kernels"
	"sluice/kernels/targets"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server"
	"sluice/server/session"
)

// start serves srv over an in-memory listener and returns a connection;
// everything is torn down, and goroutine leaks checked, at cleanup.
func start(t *testing.T, o server.Options, dial ...grpc.DialOption) (*grpc.ClientConn, *server.Server) {
	t.Helper()
	lis := bufconn.Listen(1 << 20)
	srv := server.New(o)
	done := make(chan struct{})
	go func() { _ = srv.Serve(lis); close(done) }()
	conn, err := grpc.NewClient("passthrough:///bufnet", append([]grpc.DialOption{
		grpc.WithContextDialer(func(ctx context.Context, _ string) (net.Conn, error) { return lis.DialContext(ctx) }),
		grpc.WithTransportCredentials(insecure.NewCredentials())}, dial...)...)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		conn.Close()
		srv.Stop()
		<-done
		goleak.VerifyNone(t, goleak.IgnoreCurrent())
	})
	return conn, srv
}

func testCtx(t *testing.T) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	t.Cleanup(cancel)
	return ctx
}

func gaussian2D(t *testing.T) *targets.Gaussian {
	g, err := targets.NewGaussian([]float64{1, -1}, mat.NewSymDense(2, []float64{2, .5, .5, 1}))
	if err != nil {
		t.Fatal(err)
	}
	return g
}

func evaluator(tg targets.Target) client.Evaluator {
	return func(_ context.Context, b *client.Batch) error {
		fill(tg, b.Rows, b.Dim, b.Points, b.Vectors, b.Grad, b.LogDensity, b.Hessian, b.HessVec,
			b.WantLogDensity, b.WantHessian, b.WantHessianVector)
		return nil
	}
}

// fill evaluates what was asked at rows points of a Gaussian target (its
// Hessian of log π is −Q everywhere), or of any target without Hessians.
func fill(tg targets.Target, rows, dim int, points, vectors, grad, logd, hess, hv []float64, wantLog, wantHess, wantHV bool) {
	var ld []float64
	if wantLog {
		ld = logd
	}
	if ld != nil {
		ld = ld[:rows]
	}
	targets.EvalBatch(tg, points[:rows*dim], rows, grad[:rows*dim], ld)
	if !wantHess && !wantHV {
		return
	}
	q := tg.(*targets.Gaussian).Precision()
	for r := range rows {
		for i := range dim {
			var s float64
			for j := range dim {
				if wantHess {
					hess[r*dim*dim+i*dim+j] = -q.At(i, j)
				}
				if wantHV {
					s -= q.At(i, j) * vectors[r*dim+j]
				}
			}
			if wantHV {
				hv[r*dim+i] = s
			}
		}
	}
}

// inProcess builds each kernel exactly as the engine does for a spec with
// no curvature declared (friction 2, inverse mass 1).
var inProcess = map[string]func(dim, chains int, h float64, start []float64, seed uint64) kernels.Kernel{
	"lmc": perChain(func(d int, h float64, x []float64, src *rand.PCG) kernels.Kernel {
		return kernels.NewLMC(d, 1, h, x, src)
	}),
	"kinetic": perChain(func(d int, h float64, x []float64, src *rand.PCG) kernels.Kernel {
		return kernels.NewKinetic(d, 1, h, 0, 0, x, nil, src)
	}),
	"baoab": perChain(func(d int, h float64, x []float64, src *rand.PCG) kernels.Kernel {
		return kernels.NewBAOAB(d, 1, h, 0, 0, x, nil, src)
	}),
	"midpoint": perChain(func(d int, h float64, x []float64, src *rand.PCG) kernels.Kernel {
		return kernels.NewMidpoint(d, 1, h, 0, x, nil, src)
	}),
	"midpoint-overdamped": perChain(func(d int, h float64, x []float64, src *rand.PCG) kernels.Kernel {
		return kernels.NewOverdampedMidpoint(d, 1, h, x, src)
	}),
	"mala": func(d, c int, h float64, x []float64, seed uint64) kernels.Kernel {
		return kernels.NewMALA(d, c, h, 0, x, kernels.NewSource(seed))
	},
	"ozaki": func(d, c int, h float64, x []float64, seed uint64) kernels.Kernel {
		return kernels.NewOzaki(d, c, h, x, kernels.NewSource(seed))
	},
	"ozaki-krylov": func(d, c int, h float64, x []float64, seed uint64) kernels.Kernel {
		return kernels.NewOzakiKrylov(d, c, h, x, 1e-8, 2, kernels.NewSource(seed))
	},
	"sgld": func(d, c int, h float64, x []float64, seed uint64) kernels.Kernel {
		return kernels.NewSGLD(d, c, h, kernels.SGLDSchedule{}, x, kernels.NewSource(seed))
	},
	"sgld-cv": func(d, c int, h float64, x []float64, seed uint64) kernels.Kernel {
		return kernels.NewSGLDCV(d, c, h, kernels.SGLDCVOptions{}, x, kernels.NewSource(seed))
	},
	"svrg": func(d, c int, h float64, x []float64, seed uint64) kernels.Kernel {
		return kernels.NewSVRG(d, c, h, 10, x, kernels.NewSource(seed))
	},
	"hit-and-run": func(d, c int, h float64, x []float64, seed uint64) kernels.Kernel {
		return kernels.NewHitAndRun(d, c, x, kernels.HitAndRunOptions{}, kernels.NewSource(seed))
	},
	"rejection": func(d, c int, h float64, x []float64, seed uint64) kernels.Kernel {
		return kernels.NewRejection(d, c, testEnvelope.Mean, testEnvelope.Scale, testEnvelope.LogBound, kernels.NewSource(seed))
	},
}

// perChain builds a kernel the way the engine builds its chainwise
// kernels: one kernel per chain, chain c drawing from
// kernels.ChainSource(seed, c), batched by kernels.NewBlocks.
func perChain(one func(dim int, h float64, start []float64, src *rand.PCG) kernels.Kernel) func(int, int, float64, []float64, uint64) kernels.Kernel {
	return func(d, c int, h float64, x []float64, seed uint64) kernels.Kernel {
		ks := make([]kernels.Kernel, c)
		for i := range ks {
			row := x
			if len(x) == c*d {
				row = x[i*d : (i+1)*d]
			}
			ks[i] = one(d, h, row, kernels.ChainSource(seed, i))
		}
		return kernels.NewBlocks(ks)
	}
}

// testEnvelope covers gaussian2D (mean (1, −1), precision [[2, .5], [.5, 1]],
// normalised): with scale² ≥ 1/λ_min(Q) the ratio π/q peaks at the mean,
// where log π − log q = ½ log det Q + p log scale (derived; det Q = 1.75),
// plus a little slack.
var testEnvelope = client.Envelope{Mean: []float64{1, -1}, Scale: 1.5, LogBound: 0.5*math.Log(1.75) + 2*math.Log(1.5) + 0.01}

// Transport is transparent: with the same seed, the draws of a session
// over gRPC (bufconn) are bit-identical to driving the same kernel
// in-process with the same target, whole or split into small messages,
// for every kernel; and every kernel's evaluations are counted exactly
// (the project's own cost accounting: one gradient per chain per step,
// two for the midpoint kernels, plus the start and periodic costs the
// kernel registry declares).
func TestTransportIsTransparent(t *testing.T) {
	var seen drawCounter
	conn, _ := start(t, server.Options{}, grpc.WithStreamInterceptor(seen.intercept))
	tg := gaussian2D(t)
	const chains, steps = 8, 300
	for name, build := range inProcess {
		cases := []struct {
			limit  int64
			full   bool
			groups int
		}{{0, false, 0}, {0, true, 0}, {1024 + 3*(8*(2*2+2+1)+16), false, 0}, {1024 + 3*(8*(2*2+2+1)+16), true, 0}} // default, and 3 rows per message even with Hessians
		if pipelines[name] {
			// Chains stepped in pipelined groups: one request at a time,
			// two and four groups.
			cases = append(cases, []struct {
				limit  int64
				full   bool
				groups int
			}{{0, false, 1}, {0, false, 2}, {0, true, 4}, {1024 + 3*(8*(2*2+2+1)+16), false, 4}}...)
		}
		for _, c := range cases {
			limit := c.limit
			seen.reset()
			spec := client.Spec{Dim: 2, Chains: chains, Kernel: name, Start: []float64{0, 0}, Step: 0.2, Seed: 2024,
				BurnIn: 0, DrawsPerChain: steps, MaxMessageBytes: limit, ChainGroups: c.groups}
			switch name {
			case "rejection":
				spec.Envelope, spec.Step = &testEnvelope, 0
			case "hit-and-run":
				spec.Step = 0
			}
			var got []float64
			var seqs int
			var rows int64
			ev := func(ctx context.Context, b *client.Batch) error {
				rows += int64(b.Rows)
				return evaluator(tg)(ctx, b)
			}
			opts := []client.Option{client.OnDraws(func(d *client.Draws) {
				got = append(got, d.Values...)
				seqs++
			})}
			if c.full {
				opts = append(opts, client.FullDraws())
			}
			sum, err := client.Run(testCtx(t), conn, spec, ev, opts...)
			if err != nil {
				t.Fatal(err)
			}
			if sum.Reason != client.DrawsCollected || sum.DrawsReceived != chains*steps {
				t.Fatalf("%s, limit %d: reason %v, %d draws", name, limit, sum.Reason, sum.DrawsReceived)
			}
			k := build(2, chains, 0.2, []float64{0, 0}, 2024)
			perStep := int64(k.EvaluationsPerStep())
			// The registry's accounting: per-step cost, plus a start cost
			// and a periodic cost per chain (MALA's start points, svrg's
			// full-data anchors); kernels with random or searched costs
			// are checked against what the server reported.
			cost, ok := session.CostOf(name)
			if !ok {
				t.Fatalf("no registry entry for %s", name)
			}
			wantRows := perStep*steps + int64(cost.SetupPerChain*chains+cost.CheckRows)
			if cost.Periodic != nil {
				wantRows += int64(cost.Periodic(&session.Spec{AnchorEvery: 10}, steps) * chains)
			}
			if cost.Random {
				wantRows = sum.Progress.EvaluationsUsed
			}
			if rows != wantRows || sum.Progress.EvaluationsUsed != rows {
				t.Fatalf("%s: evaluated %d rows, reported %d, per step %d; want %d", name, rows, sum.Progress.EvaluationsUsed, perStep, wantRows)
			}
			a := kernels.NewAnswer(chains, 2)
			var want []float64
			for k.Steps() < steps {
				req := k.Next()
				a.Reserve(req.Need, req.Rows, 2)
				fill(tg, req.Rows, 2, req.Points, req.Vectors, a.Grad, a.LogDensity, a.Hessian, a.HessVec,
					req.Need.Has(kernels.NeedLogDensity), req.Need.Has(kernels.NeedHessian), req.Need.Has(kernels.NeedHessianVector))
				if k.Tell(a) {
					want = append(want, k.Positions()...)
				}
			}
			if len(got) != len(want) {
				t.Fatalf("%s, limit %d: %d values over gRPC, %d in-process", name, limit, len(got), len(want))
			}
			for i := range want {
				if math.Float64bits(got[i]) != math.Float64bits(want[i]) {
					t.Fatalf("%s, limit %d: value %d differs: %v over gRPC, %v in-process", name, limit, i, got[i], want[i])
				}
			}
			if limit > 0 && seqs < steps*2 {
				t.Fatalf("%s: split run delivered %d draw frames for %d steps of %d chains: not split", name, seqs, steps, chains)
			}
			drawRows, refs := seen.counts()
			carried := seen.carriedRows()
			t.Logf("%s, limit %d, full draws %v, groups %d: %d of %d draws sent by reference, %d carried in Points frames", name, limit, c.full, c.groups, refs, drawRows, carried)
			switch {
			case drawRows != chains*steps:
				t.Fatalf("%s: the interceptor saw %d draws, want %d", name, drawRows, chains*steps)
			case c.full && refs != 0:
				t.Fatalf("%s: %d draws sent by reference to a client that asked for full draws", name, refs)
			case c.full && carried != 0:
				t.Fatalf("%s: %d draws carried in Points frames to a client that asked for Draws frames of their own", name, carried)
			case !c.full && limit == 0 && (c.groups == 1 || !pipelines[name]) && carried != chains*(steps-1):
				// Lock step: every step's draws but the last ride in the
				// next request's Points frame.
				t.Fatalf("%s: %d draws carried in Points frames, want %d", name, carried, chains*(steps-1))
			case !c.full && limit == 0 && c.groups == 2 && carried != chains*(steps-1)/2:
				// Two groups: the first group's draws ride in the second
				// group's Points frame; the second's follow in a frame of
				// their own (a frame carries one Draws).
				t.Fatalf("%s, 2 groups: %d draws carried in Points frames, want %d", name, carried, chains*(steps-1)/2)
			case !c.full && drawsArePoints[name] && refs != chains*(steps-1):
				// Every step's draws but the last go out after the next
				// request, which asks at them; the last go out with
				// Finished, in full.
				t.Fatalf("%s: %d draws sent by reference, want %d", name, refs, chains*(steps-1))
			}
		}
	}
}

// pipelines lists the kernels whose chains the server may step in
// pipelined groups (Spec.ChainGroups).
var pipelines = map[string]bool{"lmc": true, "kinetic": true, "baoab": true}

// drawsArePoints lists the kernels whose next request asks at the
// positions a step reached, so every draw but the last is sent by
// reference.
var drawsArePoints = map[string]bool{"lmc": true, "kinetic": true, "baoab": true, "sgld": true, "midpoint": true, "midpoint-overdamped": true,
	"ozaki": true, "ozaki-krylov": true, "sgld-cv": true, "svrg": true}

// drawCounter counts the draws a client receives and those sent by
// reference, from a stream interceptor.
type drawCounter struct {
	mu         sync.Mutex
	rows, refs int
	// carried counts the draws that came inside Points frames.
	carried int
}

func (d *drawCounter) reset() { d.mu.Lock(); d.rows, d.refs, d.carried = 0, 0, 0; d.mu.Unlock() }

func (d *drawCounter) counts() (rows, refs int) {
	d.mu.Lock()
	defer d.mu.Unlock()
	return d.rows, d.refs
}

func (d *drawCounter) carriedRows() int {
	d.mu.Lock()
	defer d.mu.Unlock()
	return d.carried
}

func (d *drawCounter) intercept(ctx context.Context, desc *grpc.StreamDesc, cc *grpc.ClientConn, method string,
	streamer grpc.Streamer, opts ...grpc.CallOption) (grpc.ClientStream, error) {
	s, err := streamer(ctx, desc, cc, method, opts...)
	return &countingStream{ClientStream: s, d: d}, err
}

type countingStream struct {
	grpc.ClientStream
	d *drawCounter
}

func (s *countingStream) RecvMsg(m any) error {
	err := s.ClientStream.RecvMsg(m)
	if err != nil {
		return err
	}
	var r *sluicev1.SessionResponse
	switch m := m.(type) {
	case *sluicev1.SessionResponse:
		r = m
	case interface{ Bytes() []byte }:
		// The Go client's session codec holds a frame as received
		// (internal/codec.Frame): read it here as any client would.
		r = new(sluicev1.SessionResponse)
		if proto.Unmarshal(m.Bytes(), r) != nil {
			return err
		}
	default:
		return err
	}
	w := r.GetDraws()
	if c := r.GetPoints().GetDraws(); c != nil {
		w = c
		s.d.mu.Lock()
		s.d.carried += int(c.GetRows())
		s.d.mu.Unlock()
	}
	if w != nil {
		s.d.mu.Lock()
		s.d.rows += int(w.GetRows())
		for _, row := range w.GetPointRows() {
			if row >= 0 {
				s.d.refs++
			}
		}
		s.d.mu.Unlock()
	}
	return err
}

// Gradient evaluations are counted exactly (chains × steps for LMC, by
// the project's own cost accounting) and a budget is never overshot.
func TestBudgetOverGRPC(t *testing.T) {
	conn, _ := start(t, server.Options{})
	var rows int64
	ev := func(ctx context.Context, b *client.Batch) error {
		rows += int64(b.Rows)
		return evaluator(gaussian2D(t))(ctx, b)
	}
	spec := client.Spec{Dim: 2, Chains: 6, Start: []float64{0, 0}, Step: 0.1, Seed: 1, MaxEvaluations: 1000}
	sum, err := client.Run(testCtx(t), conn, spec, ev)
	if err != nil {
		t.Fatal(err)
	}
	if sum.Reason != client.BudgetSpent || sum.Progress.EvaluationsUsed != 996 || rows != 996 || sum.Progress.Steps != 166 {
		t.Fatalf("reason %v, used %d, evaluated %d, steps %d; want budget spent after 996 = 6 × 166",
			sum.Reason, sum.Progress.EvaluationsUsed, rows, sum.Progress.Steps)
	}
}

// rawSession opens a stream and registers reg, returning the stream.
func rawSession(t *testing.T, conn *grpc.ClientConn, reg *sluicev1.Register) sluicev1.SluiceService_SessionClient {
	t.Helper()
	st, err := sluicev1.NewSluiceServiceClient(conn).Session(testCtx(t))
	if err != nil {
		t.Fatal(err)
	}
	if err := st.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Register{Register: reg}}); err != nil {
		t.Fatal(err)
	}
	return st
}

func floatBytes(v ...float64) []byte {
	var b []byte
	for _, x := range v {
		u := math.Float64bits(x)
		for i := range 8 {
			b = append(b, byte(u>>(8*i)))
		}
	}
	return b
}

// goodRegister is a valid session stepping its 3 chains in one request
// at a time (chain_groups 1), so that every request has 3 rows.
func goodRegister() *sluicev1.Register {
	return &sluicev1.Register{Dim: 2, Chains: 3, Start: floatBytes(0, 0), StartRows: 1, Step: 0.1, Seed: 5, ChainGroups: 1}
}

// badAnswer answers the first request correctly and then corrupts the
// second with edit.
func badAnswer(edit func(*sluicev1.Evaluations)) func(t *testing.T, st sluicev1.SluiceService_SessionClient) {
	return func(t *testing.T, st sluicev1.SluiceService_SessionClient) {
		n := 0
		for {
			f, err := st.Recv()
			if err != nil {
				return
			}
			p := f.GetPoints()
			if p == nil {
				continue
			}
			n++
			ev := &sluicev1.Evaluations{RequestId: p.RequestId, FirstRow: p.FirstRow, Rows: p.Rows, Dim: p.Dim,
				Gradients: make([]byte, len(p.Points))}
			if n == 2 {
				edit(ev)
			}
			if st.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{Evaluations: ev}}) != nil || n == 2 {
				return
			}
		}
	}
}

// finalStatus drains the stream and returns its status and whether a
// Finished frame with reason FAILED came first.
func finalStatus(st sluicev1.SluiceService_SessionClient) (*status.Status, bool) {
	failed := false
	for {
		f, err := st.Recv()
		if err != nil {
			return status.Convert(err), failed
		}
		if f.GetFinished().GetReason() == sluicev1.FinishReason_FINISH_REASON_FAILED {
			failed = true
		}
	}
}

func fieldOf(st *status.Status) string {
	for _, d := range st.Details() {
		if br, ok := d.(*errdetails.BadRequest); ok && len(br.FieldViolations) > 0 {
			return br.FieldViolations[0].Field
		}
	}
	return ""
}

// Bad input over a real stream gets INVALID_ARGUMENT (or
// RESOURCE_EXHAUSTED for size) naming the field, while a healthy session
// on the same server keeps going; no goroutine outlives the sessions
// (checked at cleanup).
func TestBadInputNamesFieldAndSparesOtherSessions(t *testing.T) {
	conn, _ := start(t, server.Options{Limits: session.Limits{MaxMessageBytes: 64 << 10}})

	// A healthy session runs throughout: it pauses mid-run until every
	// bad session below has ended, then finishes its budget.
	healthy := make(chan error, 1)
	running, badDone := make(chan struct{}), make(chan struct{})
	var healthySum *client.Summary
	go func() {
		spec := client.Spec{Dim: 2, Chains: 4, Start: []float64{0, 0}, Step: 0.1, Seed: 3, MaxEvaluations: 4000}
		n := 0
		var err error
		healthySum, err = client.Run(testCtx(t), conn, spec, func(ctx context.Context, b *client.Batch) error {
			if n++; n == 10 {
				close(running)
				select {
				case <-badDone:
				case <-time.After(3 * time.Minute):
				}
			}
			return evaluator(gaussian2D(t))(ctx, b)
		})
		healthy <- err
	}()
	<-running

	nan := math.NaN()
	cases := []struct {
		name   string
		reg    func(*sluicev1.Register)
		answer func(*testing.T, sluicev1.SluiceService_SessionClient)
		code   codes.Code
		field  string
		failed bool // a FAILED Finished frame precedes the status
	}{
		{"zero chains", func(r *sluicev1.Register) { r.Chains = 0 }, nil, codes.InvalidArgument, "register.chains", false},
		{"negative step", func(r *sluicev1.Register) { r.Step = -1 }, nil, codes.InvalidArgument, "register.step", false},
		{"ragged start bytes", func(r *sluicev1.Register) { r.Start = r.Start[:9] }, nil, codes.InvalidArgument, "register.start", false},
		{"wrong dimension", nil, badAnswer(func(e *sluicev1.Evaluations) { e.Dim = 3 }), codes.InvalidArgument, "evaluations.dim", true},
		{"NaN gradient", nil, badAnswer(func(e *sluicev1.Evaluations) { e.Gradients = floatBytes(0, 0, 0, nan, 0, 0) }), codes.InvalidArgument, "evaluations.gradients", true},
		{"Inf gradient", nil, badAnswer(func(e *sluicev1.Evaluations) { e.Gradients = floatBytes(math.Inf(1), 0, 0, 0, 0, 0) }), codes.InvalidArgument, "evaluations.gradients", true},
		{"stale request id", nil, badAnswer(func(e *sluicev1.Evaluations) { e.RequestId-- }), codes.InvalidArgument, "evaluations.request_id", true},
		{"oversize message", nil, badAnswer(func(e *sluicev1.Evaluations) { e.Gradients = make([]byte, 128<<10) }), codes.ResourceExhausted, "evaluations", true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			reg := goodRegister()
			if tc.reg != nil {
				tc.reg(reg)
			}
			st := rawSession(t, conn, reg)
			if tc.answer != nil {
				tc.answer(t, st)
			}
			s, failed := finalStatus(st)
			if s.Code() != tc.code || fieldOf(s) != tc.field {
				t.Fatalf("status %v %q (field %q), want %v naming %q", s.Code(), s.Message(), fieldOf(s), tc.code, tc.field)
			}
			if failed != tc.failed {
				t.Fatalf("failed Finished frame sent: %v, want %v", failed, tc.failed)
			}
		})
	}
	// The NaN case names the chain and coordinate in its message.
	st := rawSession(t, conn, goodRegister())
	badAnswer(func(e *sluicev1.Evaluations) { e.Gradients = floatBytes(0, 0, 0, nan, 0, 0) })(t, st)
	if s, _ := finalStatus(st); s.Message() != "evaluations.gradients (chain 1, coordinate 1): value NaN is not finite" {
		t.Fatalf("NaN message %q", s.Message())
	}

	close(badDone)
	if err := <-healthy; err != nil {
		t.Fatalf("healthy session: %v", err)
	}
	if healthySum.Reason != client.BudgetSpent || healthySum.Progress.EvaluationsUsed != 4000 {
		t.Fatalf("healthy session ended %v after %d evaluations", healthySum.Reason, healthySum.Progress.EvaluationsUsed)
	}
}

func TestFirstFrameMustRegister(t *testing.T) {
	conn, _ := start(t, server.Options{})
	st, err := sluicev1.NewSluiceServiceClient(conn).Session(testCtx(t))
	if err != nil {
		t.Fatal(err)
	}
	_ = st.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Stop{Stop: &sluicev1.Stop{}}})
	if s, _ := finalStatus(st); s.Code() != codes.InvalidArgument || fieldOf(s) != "register" {
		t.Fatalf("status %v field %q", s.Code(), fieldOf(s))
	}
}

// An evaluator error stops the session cleanly: the summary arrives and
// Run returns the evaluator's error.
func TestEvaluatorErrorStopsSession(t *testing.T) {
	conn, _ := start(t, server.Options{})
	boom := errors.New("solver diverged")
	n := 0
	// One request per step (ChainGroups 1): the tenth request is the tenth step's.
	sum, err := client.Run(testCtx(t), conn, client.Spec{Dim: 2, Chains: 2, Start: []float64{0, 0}, Step: 0.1, Seed: 1, ChainGroups: 1},
		func(ctx context.Context, b *client.Batch) error {
			if n++; n == 10 {
				return boom
			}
			return evaluator(gaussian2D(t))(ctx, b)
		})
	if !errors.Is(err, boom) || sum == nil || sum.Reason != client.Stopped || sum.Progress.Steps != 9 {
		t.Fatalf("err %v, summary %+v", err, sum)
	}
}

func TestHealthReflectionAndAdmission(t *testing.T) {
	conn, srv := start(t, server.Options{MaxSessions: 1})
	ctx := testCtx(t)
	h, err := healthpb.NewHealthClient(conn).Check(ctx, &healthpb.HealthCheckRequest{Service: server.ServiceName})
	if err != nil || h.Status != healthpb.HealthCheckResponse_SERVING {
		t.Fatalf("health %v %v", h, err)
	}
	rc, err := reflectpb.NewServerReflectionClient(conn).ServerReflectionInfo(ctx)
	if err != nil {
		t.Fatal(err)
	}
	_ = rc.Send(&reflectpb.ServerReflectionRequest{MessageRequest: &reflectpb.ServerReflectionRequest_ListServices{}})
	r, err := rc.Recv()
	if err != nil {
		t.Fatal(err)
	}
	found := false
	for _, s := range r.GetListServicesResponse().GetService() {
		found = found || s.Name == server.ServiceName
	}
	_ = rc.CloseSend()
	if !found {
		t.Fatalf("reflection does not list %s", server.ServiceName)
	}

	// One slot: a second concurrent session is refused; on shutdown the
	// first finishes with reason SHUTDOWN and still gets its summary.
	started := make(chan struct{})
	var once sync.Once
	done := make(chan *client.Summary, 1)
	go func() {
		sum, err := client.Run(ctx, conn, client.Spec{Dim: 2, Chains: 2, Start: []float64{0, 0}, Step: 0.1, Seed: 1},
			func(ctx context.Context, b *client.Batch) error {
				once.Do(func() { close(started) })
				time.Sleep(time.Millisecond)
				return evaluator(gaussian2D(t))(ctx, b)
			})
		if err != nil {
			t.Errorf("session ended by shutdown: %v", err)
		}
		done <- sum
	}()
	<-started
	_, err = client.Run(ctx, conn, client.Spec{Dim: 1, Chains: 1, Start: []float64{0}, Step: 0.1}, evaluator(gaussian2D(t)))
	if status.Code(err) != codes.ResourceExhausted {
		t.Fatalf("second session: %v, want RESOURCE_EXHAUSTED", err)
	}
	sctx, cancel := context.WithTimeout(ctx, 2*time.Minute)
	defer cancel()
	srv.Shutdown(sctx)
	sum := <-done
	if sum == nil || sum.Reason != client.Shutdown {
		t.Fatalf("summary after shutdown: %+v", sum)
	}
}

func float64frombytes(b []byte) float64 {
	var u uint64
	for i := range 8 {
		u |= uint64(b[i]) << (8 * i)
	}
	return math.Float64frombits(u)
}

// With more parameters than one message can summarise, Progress and
// Finished carry the first ones and say how many were left out, instead
// of failing the send.
func TestManyParametersFitTheMessageLimit(t *testing.T) {
	// The budget counts a dense dim×dim metric for gradient kernels (3 GiB
	// here): raise the per-session limit above the default of 1 GiB.
	conn, _ := start(t, server.Options{Limits: session.Limits{MaxSessionBytes: 4 << 30}})
	const dim = 20000
	spec := client.Spec{Dim: dim, Chains: 1, Start: make([]float64, dim), Step: 0.1, Seed: 1, DrawsPerChain: 20,
		MaxMessageBytes: 1 << 20, ProgressEverySteps: 10}
	sum, err := client.Run(testCtx(t), conn, spec, func(_ context.Context, b *client.Batch) error {
		for i, x := range b.Points {
			b.Grad[i] = -x
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	kept := len(sum.Parameters)
	// Twenty draws of one chain do not mix on 20000 parameters: the
	// verdict may fail the mixing check, and then says so in the reason.
	if (sum.Reason != client.DrawsCollected && sum.Reason != client.CheckFailed) || kept == 0 || kept+sum.ParametersOmitted != dim || sum.Parameters[0].Name != "theta[0]" {
		t.Fatalf("reason %v, %d parameters kept, %d omitted", sum.Reason, kept, sum.ParametersOmitted)
	}
}
