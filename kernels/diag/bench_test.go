package diag

import (
	"fmt"
	"math/rand/v2"
	"runtime"
	"testing"
)

// 4 chains × 20000 draws, one coordinate: every figure of Vehtari et al. (2021).
func BenchmarkSummarize4x20000(b *testing.B) {
	for _, rho := range []float64{0.5, 0.99} {
		b.Run(map[float64]string{0.5: "ar0.5", 0.99: "ar0.99"}[rho], func(b *testing.B) {
			chains := ar1Chains(rand.New(rand.NewPCG(1, 2)), 4, 20000, rho)
			x := make([]float64, 0, 80000)
			for _, c := range chains {
				x = append(x, c...)
			}
			b.ReportAllocs()
			for b.Loop() {
				Summarize(x, 4, 1)
			}
		})
	}
}

// ESS of 8 split chains of 10000: AR(0.5) stops after a few lags (direct
// sums only); random walks keep Geyer's sequence positive for thousands of
// lags (FFT path).
func BenchmarkESS(b *testing.B) {
	r := rand.New(rand.NewPCG(3, 4))
	walks := make([][]float64, 4)
	for m := range walks {
		walks[m] = make([]float64, 20000)
		x := 0.0
		for i := range walks[m] {
			x += r.NormFloat64()
			walks[m][i] = x
		}
	}
	for _, c := range []struct {
		name   string
		chains [][]float64
	}{{"ar0.5", ar1Chains(r, 4, 20000, 0.5)}, {"ar0.99", ar1Chains(r, 4, 20000, 0.99)}, {"randomwalk", walks}} {
		b.Run(c.name, func(b *testing.B) {
			split := SplitChains(c.chains)
			b.ReportAllocs()
			for b.Loop() {
				ESS(split)
			}
		})
	}
}

// The two ways of getting autocovariances of 8 chains of 10000, for the
// crossover directLags: one lag by direct sums, all lags by FFT.
func BenchmarkAutocov(b *testing.B) {
	split := SplitChains(ar1Chains(rand.New(rand.NewPCG(5, 6)), 4, 20000, 0.5))
	var s acovScratch
	s.means = make([]float64, len(split))
	for m, c := range split {
		s.means[m] = mean(c)
	}
	b.Run("direct-one-lag", func(b *testing.B) {
		for b.Loop() {
			s.reset(split)
			s.at(7)
		}
	})
	b.Run("fft-all-lags", func(b *testing.B) {
		b.ReportAllocs()
		for b.Loop() {
			s.reset(split)
			s.allLags()
		}
	})
}

func BenchmarkHistoryAdd(b *testing.B) {
	h := NewHistory(4, 2, 8192)
	step := make([]float64, 8)
	b.ReportAllocs()
	for b.Loop() {
		step[0]++
		h.Add(step)
	}
}

// 10⁶ steps of 4 chains × 2 coordinates per iteration, with the heap kept
// by the History and the bytes allocated while adding reported.
func BenchmarkHistoryMillion(b *testing.B) {
	const chains, dim, capacity, n = 4, 2, 8192, 1000000
	noise := make([]float64, 1<<16)
	r := rand.New(rand.NewPCG(7, 8))
	for i := range noise {
		noise[i] = r.NormFloat64()
	}
	b.ReportAllocs()
	var retained, during, peak uint64
	for b.Loop() {
		var m0, m1, m2 runtime.MemStats
		runtime.GC()
		runtime.ReadMemStats(&m0)
		h := NewHistory(chains, dim, capacity)
		runtime.ReadMemStats(&m1)
		x := make([]float64, chains*dim)
		for s := range n {
			for i := range x {
				x[i] = 0.5*x[i] + noise[(s*8+i)&(len(noise)-1)]
			}
			h.Add(x)
		}
		runtime.ReadMemStats(&m2)
		during = m2.TotalAlloc - m1.TotalAlloc
		peak = m2.HeapAlloc - m0.HeapAlloc
		runtime.GC()
		runtime.ReadMemStats(&m2)
		retained = m2.HeapAlloc - m0.HeapAlloc
		runtime.KeepAlive(h)
	}
	b.ReportMetric(float64(retained), "retained-B")
	b.ReportMetric(float64(peak), "heap-growth-B")
	b.ReportMetric(float64(during), "alloc-while-adding-B")
}

// Summarize of a full History (4 chains × 8192 kept × 2 coordinates).
func BenchmarkHistorySummarize(b *testing.B) {
	h := NewHistory(4, 2, 8192)
	r := rand.New(rand.NewPCG(9, 10))
	x := make([]float64, 8)
	for range 100000 {
		for i := range x {
			x[i] = 0.5*x[i] + r.NormFloat64()
		}
		h.Add(x)
	}
	b.ReportAllocs()
	for b.Loop() {
		h.Summarize()
		h.RunMeans()
	}
}

// Summarize of the windows a session judges in `sluice bench` (the
// monitor's sizes for its three shapes, chains × dim × kept draws per
// chain): AR(0.9) chains, every coordinate its own.
func BenchmarkHistorySummarizeWindows(b *testing.B) {
	for _, c := range []struct{ chains, dim, kept int }{{8, 10, 2000}, {64, 100, 164}, {64, 1000, 16}} {
		b.Run(fmt.Sprintf("%dx%dx%d", c.chains, c.dim, c.kept), func(b *testing.B) {
			h := NewHistory(c.chains, c.dim, max(16, c.kept))
			r := rand.New(rand.NewPCG(11, 12))
			x := make([]float64, c.chains*c.dim)
			for range c.kept {
				for i := range x {
					x[i] = 0.9*x[i] + r.NormFloat64()
				}
				h.Add(x)
			}
			b.ReportAllocs()
			for b.Loop() {
				h.Summarize()
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(c.chains*c.dim*c.kept), "ns/value")
		})
	}
}
