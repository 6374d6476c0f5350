package server_test

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"syscall"
	"testing"
	"time"

	"gonum.org/v1/gonum/mat"
	"google.golang.org/grpc"

	"sluice/client"
	"sluice/kernels"
	"sluice/kernels/targets"
	"sluice/server"
	"sluice/server/session"
)

// A transportCase is one (dim, chains) point of BenchmarkTransport. Every
// mode runs steps steps per run; the in-process mode, far faster, repeats
// its run inprocReps times per iteration so that it too is long enough to
// time. Step counts are set from the measured floor so that each mode runs
// about 0.3–0.7 s per iteration on two cores, and the whole benchmark
// under 15 s at -benchtime 1x.
type transportCase struct {
	dim, chains int
	steps       int
	inprocReps  int
}

func (c transportCase) name() string { return fmt.Sprintf("dim=%d_chains=%d", c.dim, c.chains) }

var transportCases = []transportCase{
	{dim: 10, chains: 8, steps: 6000, inprocReps: 50},
	{dim: 100, chains: 64, steps: 1200, inprocReps: 4},
	{dim: 1000, chains: 64, steps: 300, inprocReps: 2},
}

const (
	benchSeed = 20240601
	benchStep = 0.1
	// warmSteps is the length of the untimed run of every mode that opens
	// the connections and lets the transport's flow-control windows grow.
	warmSteps = 200
)

// diagGaussian is N(mean, diag(q)⁻¹): the density of targets.Gaussian with
// a diagonal precision, with an O(dim) gradient. targets.Gaussian costs
// dim² per point whatever the precision's sparsity (about 54 ms per step at
// dim 1000, 64 chains, against a 1.2 ms transport floor), which would hide
// the transport; this one keeps the evaluation small next to it.
// benchTarget checks it against targets.Gaussian.
type diagGaussian struct{ mean, q []float64 }

var _ targets.Target = (*diagGaussian)(nil)

func (g *diagGaussian) Dim() int { return len(g.mean) }

func (g *diagGaussian) LogDensity(x []float64) float64 {
	var s float64
	for i, m := range g.mean {
		d := x[i] - m
		s += g.q[i] * d * d
	}
	return -0.5 * s
}

func (g *diagGaussian) GradLogDensity(dst, x []float64) {
	x, dst = x[:len(g.mean)], dst[:len(g.mean)]
	for i, m := range g.mean {
		dst[i] = -(g.q[i] * (x[i] - m))
	}
}

func (g *diagGaussian) Curvature() (m, M float64) {
	m, M = math.Inf(1), 0
	for _, v := range g.q {
		m, M = min(m, v), max(M, v)
	}
	return m, M
}

// benchTarget builds the case's target and checks, on rows random points,
// that its gradient equals targets.Gaussian's with the same mean and
// precision.
func benchTarget(b *testing.B, dim, rows int) targets.Target {
	b.Helper()
	g := &diagGaussian{mean: make([]float64, dim), q: make([]float64, dim)}
	prec := mat.NewSymDense(dim, nil)
	for i := range dim {
		g.mean[i] = float64(i%7)/7 - 0.5
		g.q[i] = 1 + float64(i)/float64(dim) // eigenvalues in [1, 2): h = 0.1 is stable
		prec.SetSym(i, i, g.q[i])
	}
	ref, err := targets.NewGaussian(g.mean, prec)
	if err != nil {
		b.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(1, 2))
	x := make([]float64, rows*dim)
	for i := range x {
		x[i] = 3 * rng.NormFloat64()
	}
	got, want := make([]float64, rows*dim), make([]float64, rows*dim)
	targets.EvalBatch(g, x, rows, got, nil)
	targets.EvalBatch(ref, x, rows, want, nil)
	for i := range want {
		if got[i] != want[i] {
			b.Fatalf("dim %d: gradient %d is %v, targets.Gaussian gives %v", dim, i, got[i], want[i])
		}
	}
	return g
}

// runInproc drives a fresh LMC kernel for steps steps with tg's gradient
// and returns its final positions.
func runInproc(tg targets.Target, c transportCase, start []float64) []float64 {
	k := kernels.NewLMC(c.dim, c.chains, benchStep, start, kernels.NewSource(benchSeed))
	a := kernels.NewAnswer(c.chains, c.dim)
	for range c.steps {
		req := k.Next()
		targets.EvalBatch(tg, req.Points, req.Rows, a.Grad[:req.Rows*c.dim], nil)
		k.Tell(a)
	}
	return k.Positions()
}

// cpuTime is the CPU time, user and system, this process has used: the
// server's work and the client's alike, as both run here. On a machine
// shared with other work, a step's CPU time moves far less than its wall
// time, which also counts the waits for a core.
func cpuTime() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// runSession runs one session of steps steps over conn, answering with
// tg, and returns the summary, the draws of the last step, and the time
// from opening the session to the arrival of its last draw (the rest, the
// final summary with its diagnostics, is computed once per session).
// With full, the client asks for every draw's values instead of letting
// the server name the draws it has just sent as points.
func runSession(ctx context.Context, conn grpc.ClientConnInterface, tg targets.Target, c transportCase, steps int, start []float64, full bool) (*client.Summary, []float64, time.Duration, time.Duration, error) {
	spec := client.Spec{Dim: c.dim, Chains: c.chains, Kernel: "lmc", Start: start, Step: benchStep,
		BurnIn: 0, KeepEvery: 1, DrawsPerChain: int64(steps), Seed: benchSeed, MaxMessageBytes: floorMessageBytes}
	last := make([]float64, c.chains*c.dim)
	eval := func(_ context.Context, bt *client.Batch) error {
		targets.EvalBatch(tg, bt.Points, bt.Rows, bt.Grad, nil)
		return nil
	}
	t0, cpu0 := time.Now(), cpuTime()
	var toLast, cpuToLast time.Duration
	onDraws := client.OnDraws(func(d *client.Draws) {
		if d.Rows > 0 && d.Iterations[0] == int64(steps) {
			copy(last[d.Chains[0]*c.dim:], d.Values)
			toLast, cpuToLast = time.Since(t0), cpuTime()-cpu0
		}
	})
	opts := []client.Option{onDraws}
	if full {
		opts = append(opts, client.FullDraws())
	}
	sum, err := client.Run(ctx, conn, spec, eval, opts...)
	return sum, last, toLast, cpuToLast, err
}

// BenchmarkTransport measures, side by side in each iteration, the draws
// per second of one LMC configuration (same target, kernel and seed)
// driven four ways: in-process; as a session of a real server over
// loopback TCP, where the draws the client has just received as points
// are named rather than sent again (the default); the same session with
// every draw's values sent (client.FullDraws); and the bare transport
// floor, an engine-free ping-pong of the same payload each way on the
// same stream type (echoService). A draw is one chain's state after one
// step. tcp/floor is the session's time per step over the floor's per
// round trip (TOOLCHAIN.md aims at ≤ 1.2); full/tcp is what sending the
// draws again costs.
// Every session is checked to deliver chains×steps draws whose last step
// equals the in-process run bit for bit.
func BenchmarkTransport(b *testing.B) {
	for _, c := range transportCases {
		b.Run(c.name(), func(b *testing.B) {
			tg := benchTarget(b, c.dim, c.chains)
			start := make([]float64, c.dim)
			payload := make([]byte, 8*c.dim*c.chains)

			srv := server.New(server.Options{Limits: session.Limits{MaxMessageBytes: floorMessageBytes}})
			tcp := serveLoopback(b, srv.Serve, srv.Stop)
			floor := startFloor(b, c.steps, 1, payload)
			ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
			defer cancel()

			warm := min(c.steps, warmSteps)
			for _, full := range []bool{false, true} {
				if _, _, _, _, err := runSession(ctx, tcp, tg, c, warm, start, full); err != nil {
					b.Fatal(err)
				}
			}
			if err := runFloor(ctx, floor, warm, 1, payload); err != nil {
				b.Fatal(err)
			}

			b.ReportAllocs()
			var inT, tcpT, fullT, floorT, summaryT, tcpC, fullC, floorC time.Duration
			iters := 0
			for b.Loop() {
				t0 := time.Now()
				var want []float64
				for range c.inprocReps {
					want = runInproc(tg, c, start)
				}
				inT += time.Since(t0)

				// The two session modes swap order every iteration, so
				// that neither always runs on the warmer machine.
				for _, full := range []bool{iters%2 == 1, iters%2 == 0} {
					t0 = time.Now()
					sum, got, toLast, cpu, err := runSession(ctx, tcp, tg, c, c.steps, start, full)
					if full {
						fullT += toLast
						fullC += cpu
					} else {
						tcpT += toLast
						tcpC += cpu
						summaryT += time.Since(t0) - toLast
					}
					if err != nil {
						b.Fatal(err)
					}
					if sum.Reason != client.DrawsCollected || sum.DrawsReceived != int64(c.chains*c.steps) {
						b.Fatalf("session: reason %v, %d draws received, want %d", sum.Reason, sum.DrawsReceived, c.chains*c.steps)
					}
					for i := range want {
						if math.Float64bits(got[i]) != math.Float64bits(want[i]) {
							b.Fatalf("last draw (full draws %v), value %d: %v over TCP, %v in-process", full, i, got[i], want[i])
						}
					}
				}

				t0, c0 := time.Now(), cpuTime()
				err := runFloor(ctx, floor, c.steps, 1, payload)
				floorT += time.Since(t0)
				floorC += cpuTime() - c0
				if err != nil {
					b.Fatal(err)
				}
				iters++
			}

			steps := float64(c.steps * iters)
			draws := steps * float64(c.chains)
			inRate := draws * float64(c.inprocReps) / inT.Seconds()
			tcpRate := draws / tcpT.Seconds()
			b.ReportMetric(inRate, "inproc-draws/s")
			b.ReportMetric(tcpRate, "tcp-draws/s")
			b.ReportMetric(steps/floorT.Seconds(), "floor-steps/s")
			b.ReportMetric(tcpRate/inRate, "tcp/inproc")
			b.ReportMetric(tcpT.Seconds()/floorT.Seconds(), "tcp/floor")
			b.ReportMetric(fullT.Seconds()/floorT.Seconds(), "full/floor")
			b.ReportMetric(fullT.Seconds()/tcpT.Seconds(), "full/tcp")
			// CPU time per step of the whole process (server and client):
			// steadier than wall time on a shared machine.
			b.ReportMetric(tcpC.Seconds()*1e6/steps, "cpu-us/step-tcp")
			b.ReportMetric(fullC.Seconds()*1e6/steps, "cpu-us/step-full")
			b.ReportMetric(floorC.Seconds()*1e6/steps, "cpu-us/rtt-floor")
			b.ReportMetric(tcpC.Seconds()/floorC.Seconds(), "cpu-tcp/floor")
			b.ReportMetric(fullC.Seconds()/tcpC.Seconds(), "cpu-full/tcp")
			b.ReportMetric(tcpT.Seconds()*1e6/steps, "us/step-tcp")
			b.ReportMetric(floorT.Seconds()*1e6/steps, "us/rtt-floor")
			b.ReportMetric(summaryT.Seconds()*1e3/float64(iters), "ms-summary/session")
		})
	}
}
