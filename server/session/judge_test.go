package session

import (
	"fmt"
	"math/rand/v2"
	"testing"
	"time"
)

// BenchmarkJudgeCostModel times judgements of the monitor's windows at
// the shapes of `sluice bench` after 20, 100 and 400 kept steps of AR(0.9)
// draws (scores of N(0, I)), with and without the Stein assessment, and
// reports each beside the cost model of judge.go (judgeWork): model/measured
// near 1 says the cadence's share holds on this machine; above 1 the
// cadence is more conservative than needed, below 1 it undercounts.
func BenchmarkJudgeCostModel(b *testing.B) {
	for _, c := range []struct{ chains, dim int }{{8, 10}, {64, 100}, {64, 1000}} {
		for _, k := range []int{20, 100, 400} {
			for _, stein := range []bool{false, true} {
				b.Run(fmt.Sprintf("%dx%d/k=%d/stein=%v", c.chains, c.dim, k, stein), func(b *testing.B) {
					names := make([]string, c.dim)
					for i := range names {
						names[i] = fmt.Sprint("x", i)
					}
					m := newMonitor(c.dim, c.chains, names)
					r := rand.New(rand.NewPCG(1, 2))
					x, g := make([]float64, c.chains*c.dim), make([]float64, c.chains*c.dim)
					for range k {
						for i := range x {
							x[i] = 0.9*x[i] + r.NormFloat64()
							g[i] = -x[i]
						}
						m.hist.Add(pick(m.histIdx, m.dim, x, &m.histX))
						m.addKSD(x, g)
					}
					model := m.judgeWork(stein, steinReplicates)
					var spent time.Duration
					for b.Loop() {
						t0 := time.Now()
						m.judge(1, k, stein, steinReplicates)
						spent += time.Since(t0)
					}
					measured := float64(spent.Nanoseconds()) / float64(b.N)
					b.ReportMetric(model/1e6, "model-ms")
					b.ReportMetric(model/measured, "model/measured")
				})
			}
		}
	}
}
