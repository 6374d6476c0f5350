package diag

import (
	"math"
	"math/rand/v2"
	"runtime"
	"testing"
)

// The kept draws are exactly the draws at steps 0, k, 2k, ... (reference:
// the definition of the thinned history), k = Interval a power of two,
// with between capacity/2 and capacity of them once the buffer has filled.
func TestHistoryKeepsEvenlyThinnedDraws(t *testing.T) {
	const chains, dim, capacity = 2, 3, 16
	h := NewHistory(chains, dim, capacity)
	step := make([]float64, chains*dim)
	for n := 1; n <= 1000; n++ {
		s := n - 1
		for c := range chains {
			for j := range dim {
				step[c*dim+j] = float64(s*100 + c*10 + j)
			}
		}
		h.Add(step)
		k := h.Interval()
		if h.Steps() != n || k&(k-1) != 0 || h.Kept() != (n+k-1)/k || h.Kept() > capacity || (n > capacity && h.Kept() < capacity/2) {
			t.Fatalf("after %d steps: interval %d, kept %d", n, k, h.Kept())
		}
		for i := range h.Kept() {
			for c := range chains {
				for j := range dim {
					if got, want := h.buf[(i*chains+c)*dim+j], float64(i*k*100+c*10+j); got != want {
						t.Fatalf("after %d steps: kept draw %d of chain %d, coordinate %d = %v, want step %d's %v", n, i, c, j, got, i*k, want)
					}
				}
			}
		}
	}
}

// Batch sums are the sums of consecutive batches of b draws from the
// start (reference: direct sums over the stored draws), b a power of two
// with b² ≤ n < 4b² + b once the capacity does not bind (Vats, Flegal and Jones 2019
// default b ≈ √n), and at most capacity batches when it does.
func TestHistoryBatchSums(t *testing.T) {
	for _, capacity := range []int{1024, 16} {
		const chains, dim = 3, 2
		h := NewHistory(chains, dim, capacity)
		r := rand.New(rand.NewPCG(61, 67))
		var all [][]float64
		for n := 1; n <= 3000; n++ {
			step := make([]float64, chains*dim)
			for i := range step {
				step[i] = r.NormFloat64()
			}
			all = append(all, step)
			h.Add(step)
			b := h.batch
			if b&(b-1) != 0 || h.batches*b+h.curN != n || h.batches > capacity || capacity == 1024 && b*b > n && b > 1 {
				t.Fatalf("capacity %d, after %d steps: b = %d, %d batches + %d", capacity, n, b, h.batches, h.curN)
			}
			if capacity == 1024 && n >= 4*b*b+b {
				t.Fatalf("after %d steps b = %d is below √n/2", n, b)
			}
			if n%97 != 0 && n != 3000 {
				continue
			}
			for k := range h.batches + 1 {
				hi := min((k+1)*b, n)
				if k == h.batches {
					hi = n
				}
				for i := range chains * dim {
					var want float64
					for s := k * b; s < hi; s++ {
						want += all[s][i]
					}
					got := h.cur[i]
					if k < h.batches {
						got = h.sums[k*chains*dim+i]
					}
					checkAbs(t, "batch sum", got, want, 1e-10, "direct sum")
				}
			}
		}
		if capacity == 16 && h.batches < 8 {
			t.Errorf("capacity 16: %d batches, want 8..16", h.batches)
		}
	}
}

// RunMeans equals the RunMean formulas evaluated directly on all draws
// (reference: the formulas of its doc comment, written out on stored
// draws).
func TestHistoryRunMeansMatchesDirect(t *testing.T) {
	const chains, dim, n = 3, 2, 1234
	h := NewHistory(chains, dim, 64)
	if m := h.RunMeans()[0]; !math.IsNaN(m.Mean) || !math.IsNaN(m.ESS) {
		t.Errorf("RunMeans before any step: %+v, want NaN", m)
	}
	r := rand.New(rand.NewPCG(71, 73))
	all := make([][]float64, n)
	for s := range all {
		all[s] = make([]float64, chains*dim)
		for i := range all[s] {
			all[s][i] = r.NormFloat64() + float64(i)
		}
		h.Add(all[s])
	}
	got := h.RunMeans()
	b, a := h.batch, h.batches
	for j := range dim {
		var vals []float64
		for s := range all {
			for c := range chains {
				vals = append(vals, all[s][c*dim+j])
			}
		}
		mu := mean(vals)
		sd := math.Sqrt(variance(vals, mu))
		var bm []float64
		for c := range chains {
			for k := range a {
				var sum float64
				for s := k * b; s < (k+1)*b; s++ {
					sum += all[s][c*dim+j]
				}
				bm = append(bm, sum/float64(b))
			}
		}
		sig2 := float64(b) * variance(bm, mean(bm))
		ess := float64(n*chains) * sd * sd / sig2
		checkAbs(t, "RunMean.Mean", got[j].Mean, mu, 1e-12, "direct")
		checkAbs(t, "RunMean.SD", got[j].SD, sd, 1e-12, "direct")
		checkAbs(t, "RunMean.ESS", got[j].ESS, ess, 1e-9*ess, "direct")
		checkAbs(t, "RunMean.MCSE", got[j].MCSE, math.Sqrt(sig2/float64(n*chains)), 1e-12, "direct")
		if got[j].Batches != a*chains || got[j].Batch != b {
			t.Errorf("batches %d × %d, want %d × %d", got[j].Batches, got[j].Batch, a*chains, b)
		}
	}
}

// History.Summarize is Summarize of the thinned draws (reference: the same
// draws collected by hand at steps 0, k, 2k, ...).
func TestHistorySummarizeIsSummaryOfKeptDraws(t *testing.T) {
	const chains, dim, n = 4, 2, 5000
	h := NewHistory(chains, dim, 256)
	if h.Summarize() != nil {
		t.Fatal("Summarize of an empty history is not nil")
	}
	r := rand.New(rand.NewPCG(81, 83))
	all := make([][]float64, n)
	x := make([]float64, chains*dim)
	for s := range all {
		for i := range x {
			x[i] = 0.7*x[i] + r.NormFloat64()
		}
		all[s] = append([]float64(nil), x...)
		h.Add(x)
	}
	k, kept := h.Interval(), h.Kept()
	flat := make([]float64, 0, chains*kept*dim)
	for c := range chains {
		for i := range kept {
			flat = append(flat, all[i*k][c*dim:(c+1)*dim]...)
		}
	}
	want := Summarize(flat, chains, dim)
	got := h.Summarize()
	for j := range dim {
		if got[j] != want[j] {
			t.Errorf("coordinate %d: History.Summarize %+v, Summarize of kept draws %+v", j, got[j], want[j])
		}
	}
}

func TestHistoryAddDoesNotAllocate(t *testing.T) {
	h := NewHistory(4, 2, 16) // small: compactions and merges happen during the count
	step := make([]float64, 8)
	var s float64
	allocs := testing.AllocsPerRun(10000, func() {
		s++
		for i := range step {
			step[i] = s + float64(i)
		}
		h.Add(step)
	})
	if allocs != 0 {
		t.Errorf("History.Add allocates %v times per call, want 0", allocs)
	}
	if h.Interval() < 256 {
		t.Errorf("interval %d after 10⁴ steps with capacity 16: compaction not exercised", h.Interval())
	}
}

// 10⁶ steps of 4 chains of three independent AR(1) coordinates,
// ρ = (0.5, 0.9, 0.999), capacity 8192, so the kept draws are every
// k = 128th (AR(1) closed form, derived here gives the references: τ = (1+ρ)/(1−ρ), and a
// thinned AR(1) is AR(1) with coefficient ρᵏ).
//
// Memory: the history's heap stays what NewHistory allocated (about
// 2·capacity·chains·dim·8 B = 1.5 MiB); feeding 10⁶ steps must allocate
// nothing (a run kept whole would be 96 MB).
//
// ESS of the whole run, from RunMeans: target S(1−ρ)/(1+ρ), S = 4·10⁶, for
// ρ = 0.5 and 0.9. Tolerance: 4·√(2/(B−1)) (relative sd of a batch-means
// variance with B batch means, common practice) plus the relative bias of
// batch means for an AR(1), 2ρ/(b(1−ρ²)) (derived from
// Σ_{t≠0}|t|ρ^t = 2ρ/(1−ρ)² over τ). For ρ = 0.999, b = 512 is far below
// τ = 1999 and batch means are not checked.
//
// ESS of the kept draws, from Summarize: target (chains·Kept)(1−ρᵏ)/(1+ρᵏ).
// For ρ = 0.5 and 0.9 (ρᵏ ≈ 0) this is the saturation at the kept count,
// far below the whole run's ESS; for ρ = 0.999 (k ≪ τ) it is close to the
// whole run's ESS, 2001. Tolerance: Bartlett's formula as in
// TestBulkESSOfAR1, with L the lag at which Geyer's sequence stopped.
func TestHistoryMillionSteps(t *testing.T) {
	const chains, dim, capacity, n = 4, 3, 8192, 1000000
	rhos := [dim]float64{0.5, 0.9, 0.999}
	var before, after runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&before)
	h := NewHistory(chains, dim, capacity)
	r := rand.New(rand.NewPCG(91, 97))
	x := make([]float64, chains*dim)
	for i := range x {
		x[i] = r.NormFloat64() / math.Sqrt(1-rhos[i%dim]*rhos[i%dim])
	}
	var mid runtime.MemStats
	runtime.ReadMemStats(&mid)
	for range n {
		h.Add(x)
		for i := range x {
			x[i] = rhos[i%dim]*x[i] + r.NormFloat64()
		}
	}
	runtime.ReadMemStats(&after)
	allocated := after.TotalAlloc - mid.TotalAlloc
	runtime.GC()
	runtime.ReadMemStats(&after)
	retained := int64(after.HeapAlloc) - int64(before.HeapAlloc)
	footprint := int64(2*capacity*chains*dim*8 + 3*chains*dim*8)
	t.Logf("10⁶ steps × %d chains × %d: %d B allocated while adding, %d B retained (footprint %d B), heap in use %d B, interval %d, kept %d",
		chains, dim, allocated, retained, footprint, after.HeapInuse, h.Interval(), h.Kept())
	if allocated > 64<<10 {
		t.Errorf("adding 10⁶ steps allocated %d B, want none", allocated)
	}
	if retained > 2*footprint {
		t.Errorf("retained %d B after 10⁶ steps, want about the footprint %d B", retained, footprint)
	}
	if h.Interval() != 128 || h.Kept() != (n+127)/128 {
		t.Fatalf("interval %d, kept %d; want 128, %d", h.Interval(), h.Kept(), (n+127)/128)
	}

	run := h.RunMeans()
	sum := h.Summarize()
	k, kept := float64(h.Interval()), float64(chains*h.Kept())
	col := make([][]float64, chains)
	for j, rho := range rhos {
		full := chains * n * (1 - rho) / (1 + rho)
		if rho < 0.99 {
			b := float64(run[j].Batch)
			tol := 4*math.Sqrt(2/float64(run[j].Batches-1)) + 2*rho/(b*(1-rho*rho))
			checkAbs(t, "whole-run ESS/target", run[j].ESS/full, 1, tol, "AR(1) closed form, batch means")
		}
		rk := math.Pow(rho, k)
		want := kept * (1 - rk) / (1 + rk)
		// Recompute both ESSs of the kept draws with a trace, for the
		// truncation lag L of Bartlett's formula.
		for c := range chains {
			col[c] = col[c][:0]
			for i := range h.Kept() {
				col[c] = append(col[c], h.buf[(i*chains+c)*dim+j])
			}
		}
		var ws workspace
		var tr geyerTrace
		ws.load(col, minHalf)
		for _, e := range []struct {
			name     string
			chains   [][]float64
			fromSumm float64
		}{{"kept-draw ESS_mean", ws.split, sum[j].MeanESS}, {"kept-draw bulk-ESS", ws.chainsOf(ws.z), sum[j].BulkESS}} {
			got := geyerESS(e.chains, &ws.acov, &tr)
			checkAbs(t, e.name+" (Summarize vs traced)", e.fromSumm, got, 1e-9*got, "same computation")
			lags := len(tr.rho) - 1
			tol := 4 * math.Sqrt(2*float64(2*lags+1)/kept)
			checkAbs(t, e.name+"/thinned target", got/want, 1, tol, "AR(1) closed form, thinned, Bartlett")
			t.Logf("ρ = %v: %s / thinned target = %.4f ± %.4f (L = %d)", rho, e.name, got/want, tol, lags)
		}
		t.Logf("ρ = %v: whole run ESS %.0f (batch means %.0f, %d batches of %d); kept-draw ESS %.0f, bulk %.0f (thinned target %.0f, kept %v)",
			rho, full, run[j].ESS, run[j].Batches, run[j].Batch, sum[j].MeanESS, sum[j].BulkESS, want, kept)
	}
}

// SummarizeUntil with a stop that never fires is Summarize; one that
// fires gives up with nil.
func TestSummarizeUntilStops(t *testing.T) {
	h := NewHistory(2, 3, 64)
	r := rand.New(rand.NewPCG(111, 113))
	x := make([]float64, 6)
	for range 100 {
		for i := range x {
			x[i] = 0.5*x[i] + r.NormFloat64()
		}
		h.Add(x)
	}
	want := h.Summarize()
	got := h.SummarizeUntil(func() bool { return false })
	for j := range want {
		if got[j].Mean != want[j].Mean || got[j].BulkESS != want[j].BulkESS || got[j].Rhat.Reported != want[j].Rhat.Reported {
			t.Errorf("coordinate %d: %+v, want %+v", j, got[j], want[j])
		}
	}
	calls := 0
	if s := h.SummarizeUntil(func() bool { calls++; return calls > 1 }); s != nil {
		t.Errorf("stopped at the second coordinate: %d summaries, want none", len(s))
	}
}

// Reserve sizes the summaries' scratch for a full buffer at once and
// changes no figure: a reserved history summarises as an unreserved one,
// bit for bit, and its scratch already holds chains·capacity values.
func TestHistoryReserve(t *testing.T) {
	a, b := NewHistory(3, 2, 64), NewHistory(3, 2, 64)
	b.Reserve()
	if n := 3 * 64; cap(b.ws.pool) < n || cap(b.ws.pairs) < n || cap(b.ws.spare) < n || cap(b.gather) < n {
		t.Fatalf("reserved scratch: pool %d, pairs %d, spare %d, gather %d, want %d each", cap(b.ws.pool), cap(b.ws.pairs), cap(b.ws.spare), cap(b.gather), n)
	}
	r := rand.New(rand.NewPCG(115, 117))
	x := make([]float64, 6)
	for range 150 {
		for i := range x {
			x[i] = 0.7*x[i] + r.NormFloat64()
		}
		a.Add(x)
		b.Add(x)
	}
	sa, sb := a.Summarize(), b.Summarize()
	for j := range sa {
		if sa[j] != sb[j] {
			t.Errorf("coordinate %d: %+v reserved, %+v not", j, sb[j], sa[j])
		}
	}
}
