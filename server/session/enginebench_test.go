package session

import (
	"context"
	"fmt"
	"testing"
	"time"

	"sluice/kernels"
)

// BenchmarkEngineStep measures the engine's own work per step, with no
// transport: a whole session (Run, as the server runs it, with the
// server's follow ring of 100 000 rows and its default diagnostics) whose
// client answers inside send, in process, against the same lmc kernel
// stepped alone with the same gradient (built as the engine builds it,
// one kernel per chain on its own stream), side by side in each
// iteration. The session is timed from New to its last draw (the final
// summary, once per session, apart), as `sluice bench` times it; its
// draw log is kept to the end of the benchmark, as a server keeps a
// finished session's for its followers. engine/kernel is the session's
// time per step over the bare kernel's: what the engine adds is the
// draws' copies (the follow ring), the running diagnostics and the
// checks. cpu-us/step-engine counts the process's CPU time over the
// sessions (background judgements included) and faults/step its minor
// page faults, memory touched for the first time (unix only). The shapes
// and step counts are those of `sluice bench`, and a longer session at
// 64 × 1000 for the steady state.
func BenchmarkEngineStep(b *testing.B) {
	for _, c := range []struct{ chains, dim, steps int }{{8, 10, 2000}, {64, 100, 400}, {64, 1000, 100}, {64, 1000, 800}} {
		b.Run(fmt.Sprintf("chains=%d_dim=%d_steps=%d", c.chains, c.dim, c.steps), func(b *testing.B) {
			prec := make([]float64, c.dim) // a diagonal precision
			for i := range prec {
				prec[i] = 1 + float64(i%10)/10
			}
			grad := func(x, g []float64) {
				for i, v := range x {
					g[i] = -prec[i%c.dim] * v
				}
			}
			spec := Spec{Dim: c.dim, Chains: c.chains, Kernel: "lmc", Start: make([]float64, c.dim), StartRows: 1, Step: 0.05,
				KeepEvery: 1, DrawsPerChain: int64(c.steps), Seed: 7, DrawReferences: true, ChainGroups: 1}
			lim := Limits{MaxMessageBytes: 64 << 20, FollowBuffer: 100000}
			var logs []*DrawLog // kept as a server keeps them for followers
			defer func() { logs = nil }()
			// session returns its time from New to its last draw, and the
			// process's CPU time and page faults over the same span.
			session := func() (wall, cpu time.Duration, faults int64) {
				cpu0, f0, _ := processUsage()
				t0 := time.Now()
				s, err := New("bench", spec, lim)
				if err != nil {
					b.Fatal(err)
				}
				in := make(chan Message, 4)
				var evs [4]Evaluations
				var grads [4][]float64
				send := func(f Frame) error {
					if d, ok := f.(*Draws); ok && d.Rows > 0 && d.Iterations[d.Rows-1] == int64(c.steps) {
						wall = time.Since(t0)
						cpu1, f1, _ := processUsage()
						cpu, faults = cpu1-cpu0, f1-f0
					}
					p, ok := f.(*Points)
					if !ok {
						return nil
					}
					i := p.RequestID % 4
					grads[i] = append(grads[i][:0], p.Points[:p.Rows*p.Dim]...)
					grad(p.Points[:p.Rows*p.Dim], grads[i])
					evs[i] = Evaluations{RequestID: p.RequestID, FirstRow: p.FirstRow, Rows: p.Rows, Dim: p.Dim, Grad: grads[i]}
					in <- Message{Evaluations: &evs[i]}
					return nil
				}
				res, err := s.Run(context.Background(), in, send)
				if err != nil || res.Finished.Reason != DrawsCollected && res.Finished.Reason != CheckFailed {
					b.Fatalf("session: %v, %v", res.Finished.Reason, err)
				}
				logs = append(logs, s.DrawLog())
				return wall, cpu, faults
			}
			kernel := func() {
				ks := make([]kernels.Kernel, c.chains)
				for i := range ks {
					ks[i] = kernels.NewLMC(c.dim, 1, spec.Step, spec.Start, kernels.ChainSource(spec.Seed, i))
				}
				k := kernels.NewBlocks(ks)
				a := kernels.NewAnswer(c.chains, c.dim)
				for range c.steps {
					req := k.Next()
					grad(req.Points[:req.Rows*c.dim], a.Grad[:req.Rows*c.dim])
					k.Tell(a)
				}
			}
			session()
			kernel()
			var sT, sCPU, kT time.Duration
			var faults int64
			for b.Loop() {
				w, cpu, f := session()
				sT, sCPU, faults = sT+w, sCPU+cpu, faults+f
				t0 := time.Now()
				kernel()
				kT += time.Since(t0)
			}
			steps := float64(c.steps * b.N)
			b.ReportMetric(sT.Seconds()*1e6/steps, "us/step-engine")
			b.ReportMetric(kT.Seconds()*1e6/steps, "us/step-kernel")
			b.ReportMetric(float64(sT)/float64(kT), "engine/kernel")
			if _, _, ok := processUsage(); ok {
				b.ReportMetric(sCPU.Seconds()*1e6/steps, "cpu-us/step-engine")
				b.ReportMetric(float64(faults)/steps, "faults/step")
			}
		})
	}
}
