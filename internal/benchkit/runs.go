package benchkit

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"time"

	"google.golang.org/grpc"

	"sluice/client"
	"sluice/kernels"
	"sluice/kernels/targets"
)

// Seed and Step are those of every Go run: the same seed gives the same
// draws in-process, in the fused loop and over the wire.
const (
	Seed = 20240601
	Step = 0.1
)

// Shape is a number of chains and a dimension.
type Shape struct {
	Chains int `json:"chains"`
	Dim    int `json:"dim"`
}

func (s Shape) String() string { return fmt.Sprintf("%d × %d", s.Chains, s.Dim) }

// SessionRun is one session over the wire.
type SessionRun struct {
	// ToLastDraw is the time from opening the session to the arrival of
	// its last draw; Total adds the final summary, which the server
	// computes once per session.
	ToLastDraw, Total time.Duration
	// CPUToLastDraw is the CPU time of the whole process (every thread,
	// user and system) over ToLastDraw, if HasCPU.
	CPUToLastDraw time.Duration
	HasCPU        bool
	// Last holds the draws of the last step, chains × dim.
	Last    []float64
	Summary *client.Summary
}

// RunSession runs one lmc session of steps steps (every step kept, from
// a start at the origin) over conn, its chains in groups chain groups (0:
// the server chooses; Spec.ChainGroups), answering with tg's gradient,
// and checks that it delivered chains × steps draws.
func RunSession(ctx context.Context, conn grpc.ClientConnInterface, s Shape, tg targets.Target, steps, groups int) (SessionRun, error) {
	spec := client.Spec{Dim: s.Dim, Chains: s.Chains, Kernel: "lmc", Start: make([]float64, s.Dim), Step: Step,
		KeepEvery: 1, DrawsPerChain: int64(steps), Seed: Seed, MaxMessageBytes: MessageBytes, ChainGroups: min(groups, s.Chains)}
	run := SessionRun{Last: make([]float64, s.Chains*s.Dim)}
	eval := func(_ context.Context, bt *client.Batch) error {
		targets.EvalBatch(tg, bt.Points, bt.Rows, bt.Grad, nil)
		return nil
	}
	c0, ok0 := processCPU()
	t0 := time.Now()
	onDraws := client.OnDraws(func(d *client.Draws) {
		for r := range d.Rows {
			if d.Iterations[r] == int64(steps) {
				copy(run.Last[d.Chains[r]*s.Dim:(d.Chains[r]+1)*s.Dim], d.Values[r*s.Dim:(r+1)*s.Dim])
				run.ToLastDraw = time.Since(t0)
				c1, ok1 := processCPU()
				run.CPUToLastDraw, run.HasCPU = c1-c0, ok0 && ok1
			}
		}
	})
	sum, err := client.Run(ctx, conn, spec, eval, onDraws)
	run.Total = time.Since(t0)
	run.Summary = sum
	if err != nil {
		return run, err
	}
	if (sum.Reason != client.DrawsCollected && sum.Reason != client.CheckFailed) || sum.DrawsReceived != int64(s.Chains*steps) {
		return run, fmt.Errorf("session %v: ended with %q after %d draws, want %d", s, sum.Reason, sum.DrawsReceived, s.Chains*steps)
	}
	return run, nil
}

// RunKernel drives a fresh lmc kernel in-process for steps steps from
// the origin, with tg's gradient, and returns its final positions. The
// kernel is built as the engine builds it: one per chain, chain c on
// kernels.ChainSource(Seed, c), batched by kernels.NewBlocks.
func RunKernel(s Shape, tg targets.Target, steps int) []float64 {
	ks := make([]kernels.Kernel, s.Chains)
	for c := range ks {
		ks[c] = kernels.NewLMC(s.Dim, 1, Step, make([]float64, s.Dim), kernels.ChainSource(Seed, c))
	}
	k := kernels.NewBlocks(ks)
	a := kernels.NewAnswer(s.Chains, s.Dim)
	for range steps {
		req := k.Next()
		targets.EvalBatch(tg, req.Points, req.Rows, a.Grad[:req.Rows*s.Dim], nil)
		k.Tell(a)
	}
	return k.Positions()
}

// RunFused makes the steps of RunKernel in one plain loop: for every
// chain and coordinate, the gradient of g and the update
// x += h·∇log π(x) + √(2h)·ξ, with ξ from the same random streams in the
// same order (each chain's own, coordinate by coordinate). It returns the
// final positions, equal to RunKernel's.
func RunFused(s Shape, g *DiagGaussian, steps int) []float64 {
	if g.Dim() != s.Dim {
		panic(fmt.Sprintf("benchkit: RunFused: target of dimension %d for shape %v", g.Dim(), s))
	}
	x := make([]float64, s.Chains*s.Dim)
	rngs := make([]*rand.Rand, s.Chains)
	for c := range rngs {
		rngs[c] = rand.New(kernels.ChainSource(Seed, c))
	}
	h, sc := Step, math.Sqrt(2*Step)
	mean, q := g.Mean, g.Q
	for range steps {
		for c := range s.Chains {
			row := x[c*s.Dim : (c+1)*s.Dim]
			rng := rngs[c]
			for i := range row {
				gi := -(q[i] * (row[i] - mean[i]))
				row[i] += h*gi + sc*rng.NormFloat64()
			}
		}
	}
	return x
}
