package session

import (
	"fmt"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

	"sluice/kernels/diag"
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
						m.hist.AddRows(x, m.histIdx)
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

// A session with no target whose client takes at least 2 ms per answer
// (an expensive gradient, the case the service is for) sees measured
// figures in its progress from early on: its steps pay for the
// judgements by wall time (paidFor), where the step-count model alone,
// which assumes a gradient that costs nothing, would wait about 16 000
// steps at 8 × 10. A slower machine only makes the steps dearer, so the
// check cannot fail for load. The draws equal those of a client that
// answers at once (the figures' cadence is all that differs).
func TestSlowClientSeesFiguresEarly(t *testing.T) {
	const dim, chains = 10, 8
	spec := Spec{Dim: dim, Chains: chains, Start: make([]float64, dim), StartRows: 1, Step: 0.1, Seed: 21,
		BurnIn: 10, DrawsPerChain: 150, ProgressEverySteps: 10}
	var first int64 = -1
	var draws [2][]float64
	for i, delay := range []time.Duration{2 * time.Millisecond, 0} {
		o := gaussian(1)
		slow := func(p *Points, ev *Evaluations) {
			time.Sleep(delay)
			o(p, ev)
		}
		tr, _, err := drive(t, mustNew(t, spec, Limits{}), slow)
		if err != nil {
			t.Fatal(err)
		}
		for _, d := range tr.draws {
			draws[i] = append(draws[i], d.Values...)
		}
		if i == 0 {
			for _, p := range tr.progress {
				if len(p.Parameters) > 0 && p.Parameters[0].BulkESS > 0 {
					first = p.Steps
					break
				}
			}
		}
	}
	if first < 0 || first > 120 {
		t.Fatalf("first measured progress at step %d, want by step 120 of 160", first)
	}
	if len(draws[0]) == 0 || !slices.Equal(draws[0], draws[1]) {
		t.Fatal("draws depend on the client's speed")
	}
}

// The Stein window has room for eight rounds of the chains it follows, so
// that after it halves its rounds (diag.StreamKSD) it holds four, the
// fewest diag.AssessStein assesses, at every shape: before, 64 chains ×
// dim 1000 had room for 3.5 rounds and the assessment was never defined.
// And such a session's final report carries a defined one.
func TestSteinWindowHoldsFourRounds(t *testing.T) {
	for _, c := range [][2]int{{1, 1}, {8, 10}, {64, 100}, {64, 1000}, {512, 1000}, {4, 100000}, {2048, 3}} {
		ksdCap, ksdChains, _, _ := monitorSizes(c[1], c[0])
		if ksdChains < 1 || ksdChains > c[0] || ksdCap < 8*ksdChains || ksdCap > max(maxKSDPoints, 16) {
			t.Errorf("chains %d dim %d: window of %d draws from %d chains", c[0], c[1], ksdCap, ksdChains)
		}
	}
	const dim, chains = 1000, 64
	spec := Spec{Dim: dim, Chains: chains, Start: make([]float64, dim), StartRows: 1, Step: 0.1, Seed: 22,
		BurnIn: 20, DrawsPerChain: 300}
	_, res, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	st := res.Finished.Progress.Stein
	if st == nil || st.State == diag.SteinUndefined {
		t.Fatalf("final Stein assessment at %d × %d: %+v, want a defined one", chains, dim, st)
	}
}
