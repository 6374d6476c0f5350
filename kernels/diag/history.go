package diag

import (
	"fmt"
	"math"
)

// History follows a run of several chains one step at a time in memory
// that does not grow with the number of steps. It keeps two things:
//
// Thinned draws. At most capacity draws per chain, taken every interval-th
// step from the start of the run. When the buffer is full, every second
// kept draw is dropped and the interval doubles, so the kept draws are
// always the draws at steps 0, k, 2k, ... of the whole run (k = Interval),
// between capacity/2 and capacity of them per chain. Summarize computes
// the Vehtari et al. (2021) figures on them.
//
// Batch sums. Per chain and coordinate, the sums of consecutive batches of
// b draws, b a power of two kept at about √n after n steps (Vats, Flegal and Jones 2019
// default b = ⌊√n⌋), at most capacity batches per chain (beyond n ≈
// capacity²/4 the batches grow faster than √n). RunMeans estimates from
// them the Monte Carlo error of the mean of the whole run, with running
// means and variances of every draw.
//
// What the ESS of the thinned draws says about the whole run. The kept
// draws form a chain whose autocorrelation at lag 1 is the full chain's at
// lag k. For an AR(1) chain with coefficient ρ (AR(1) closed form, derived here), n steps
// and n/k kept draws,
//
//	ESS_full = n·(1−ρ)/(1+ρ),  ESS_kept ≈ (n/k)·(1−ρᵏ)/(1+ρᵏ).
//
// When k is well below the autocorrelation time τ (k(1−ρ) ≪ 1) the two
// agree: thinning then discards only redundant draws and ESS_kept is an
// estimate of ESS_full, with no rescaling. When k is comparable to τ or
// above it, the kept draws are nearly independent and ESS_kept saturates
// at about the number of kept draws, chains × Kept, while ESS_full keeps
// growing as n/τ: ESS_kept is then a lower bound of ESS_full (for chains
// whose autocorrelations are positive), never an estimate. R̂ and the
// quantiles are unaffected in kind (they are figures of the kept draws'
// distribution), but their MCSEs are those of the kept draws.
//
// RunMeans has no such saturation, but batch means need b ≫ τ: with
// b ≈ √n they overstate the ESS of a chain whose τ is not well below √n
// (an AR(1) with τ = 1999 after 10⁶ steps, b = 512: about 4.6 times). The
// two are complementary, and the kept draws tell which applies: their own
// autocorrelation time, chains·Kept/ESS_kept, near 1 means k ≳ τ, so the
// thinned ESS is saturated and, when Batch is several times Interval,
// RunMeans is the estimate to use; well above 1 means k ≪ τ, and the
// thinned ESS estimates the whole run's.
//
// A History made by NewDrawHistory keeps the thinned draws only: no batch
// sums and no running moments, so that Add costs nothing between kept
// steps (a copy of the step at kept ones), for a caller that summarises
// the thinned draws and never asks for RunMeans.
//
// The zero value is not usable; call NewHistory or NewDrawHistory. Add
// does not allocate. A History is not safe for concurrent use.
type History struct {
	chains, dim, capacity int
	row                   int  // chains·dim values per step
	drawsOnly             bool // NewDrawHistory: no batch sums, no running moments

	steps    int
	interval int
	kept     int
	buf      []float64 // capacity rows, time-major: buf[(t·chains + c)·dim + j]

	batch   int       // current batch size b
	batches int       // complete batches per chain
	sums    []float64 // capacity rows of batch sums, same layout as buf
	cur     []float64 // one row: sums of the batch being filled
	curN    int
	mu, m2  []float64 // one row each: running mean and sum of squared deviations (Welford)

	ws        workspace
	gather    []float64
	gatherRow []float64 // AddRows' gathered step, for the running moments
	views     [][]float64
}

// minCapacity is the least capacity NewHistory accepts: after a
// compaction at least 8 draws per chain remain, what Summarize needs.
const minCapacity = 16

// NewHistory returns a History for the given number of chains and
// coordinates keeping at most capacity draws and capacity batch sums per
// chain (an odd capacity is rounded up; at least 16). Its memory is about
// 2·capacity·chains·dim float64 values, plus the scratch of Summarize
// (about 11·capacity·chains values once called; Reserve).
func NewHistory(chains, dim, capacity int) *History {
	if chains < 1 || dim < 1 || capacity < minCapacity {
		panic(fmt.Sprintf("diag: NewHistory(%d, %d, %d) needs chains, dim ≥ 1 and capacity ≥ %d", chains, dim, capacity, minCapacity))
	}
	capacity += capacity % 2
	row := chains * dim
	return &History{
		chains: chains, dim: dim, capacity: capacity, row: row,
		interval: 1, batch: 1,
		buf:  make([]float64, capacity*row),
		sums: make([]float64, capacity*row),
		cur:  make([]float64, row),
		mu:   make([]float64, row),
		m2:   make([]float64, row),
	}
}

// Add records one step of every chain: step[c·dim + j] is coordinate j of
// chain c. It panics if len(step) ≠ chains·dim.
func (h *History) Add(step []float64) {
	if len(step) != h.row {
		panic(fmt.Sprintf("diag: History.Add got %d values, want chains·dim = %d", len(step), h.row))
	}
	if dst := h.keep(); dst != nil {
		copy(dst, step)
	}
	h.steps++
	if h.drawsOnly {
		return
	}
	inv := 1 / float64(h.steps) // one division per step, not per value
	for i, x := range step {
		d := x - h.mu[i]
		h.mu[i] += d * inv
		h.m2[i] += d * (x - h.mu[i])
		h.cur[i] += x
	}
	h.curN++
	if h.curN < h.batch {
		return
	}
	copy(h.sums[h.batches*h.row:], h.cur)
	clear(h.cur)
	h.curN = 0
	h.batches++
	if h.batches == h.capacity || 4*h.batch*h.batch <= h.steps {
		h.mergeBatches()
	}
}

// keep returns the row of buf the current step's draws go to, making
// room when the buffer is full, or nil when the step's draws are not kept.
func (h *History) keep() []float64 {
	if h.steps%h.interval != 0 {
		return nil
	}
	if h.kept == h.capacity {
		for i := 1; i < h.capacity/2; i++ {
			copy(h.buf[i*h.row:(i+1)*h.row], h.buf[2*i*h.row:(2*i+1)*h.row])
		}
		h.kept = h.capacity / 2
		h.interval *= 2
	}
	// The step is a multiple of the doubled interval too: the full buffer
	// ended at step (capacity−1)·k and capacity is even.
	h.kept++
	return h.buf[(h.kept-1)*h.row : h.kept*h.row]
}

// AddRows records one step made of the rows idx of step (rows of dim
// values), in that order: Add of those rows gathered, without gathering
// them at the steps whose draws are not kept (for a History made by
// NewDrawHistory, every step but one in Interval). A nil idx adds every
// row, as Add. It panics when idx does not name one row per chain or
// names a row outside step.
func (h *History) AddRows(step []float64, idx []int) {
	if idx == nil {
		h.Add(step)
		return
	}
	if len(idx) != h.chains {
		panic(fmt.Sprintf("diag: History.AddRows got %d rows, want chains = %d", len(idx), h.chains))
	}
	d := h.dim
	for _, r := range idx {
		if r < 0 || r >= len(step)/d {
			panic(fmt.Sprintf("diag: History.AddRows row %d of a step of %d rows", r, len(step)/d))
		}
	}
	if !h.drawsOnly { // the running moments need the whole step
		if h.gatherRow == nil {
			h.gatherRow = make([]float64, h.row)
		}
		for i, r := range idx {
			copy(h.gatherRow[i*d:(i+1)*d], step[r*d:(r+1)*d])
		}
		h.Add(h.gatherRow)
		return
	}
	if dst := h.keep(); dst != nil {
		for i, r := range idx {
			copy(dst[i*d:(i+1)*d], step[r*d:(r+1)*d])
		}
	}
	h.steps++
}

// mergeBatches adds adjacent pairs of batch sums, doubling b. An unpaired
// last batch becomes the start of the batch being filled.
func (h *History) mergeBatches() {
	r := h.row
	half := h.batches / 2
	for i := range half {
		dst, a, b := h.sums[i*r:(i+1)*r], h.sums[2*i*r:(2*i+1)*r], h.sums[(2*i+1)*r:(2*i+2)*r]
		for j := range dst {
			dst[j] = a[j] + b[j]
		}
	}
	if h.batches%2 == 1 {
		copy(h.cur, h.sums[(h.batches-1)*r:h.batches*r])
		h.curN = h.batch
	}
	h.batches = half
	h.batch *= 2
}

// CopyFrom makes h a copy of src, which must have the same chains, dim
// and capacity and keep the same (both made by NewHistory, or both by
// NewDrawHistory; it panics otherwise), reusing h's memory: a snapshot
// that another goroutine may summarise while src goes on. It copies only
// the rows in use, O(kept·chains·dim).
func (h *History) CopyFrom(src *History) {
	if h.chains != src.chains || h.dim != src.dim || h.capacity != src.capacity || h.drawsOnly != src.drawsOnly {
		panic("diag: History.CopyFrom of a history of other sizes")
	}
	copy(h.buf, src.buf[:src.kept*src.row])
	copy(h.sums, src.sums[:src.batches*src.row])
	copy(h.cur, src.cur)
	copy(h.mu, src.mu)
	copy(h.m2, src.m2)
	h.steps, h.interval, h.kept = src.steps, src.interval, src.kept
	h.batch, h.batches, h.curN = src.batch, src.batches, src.curN
}

// Reserve sizes the scratch of Summarize for a full buffer now (about
// 11·capacity·chains values), so that summarising never needs more later:
// a history's memory then stays flat from the start instead of growing
// with the kept draws until the first summary of a full buffer.
func (h *History) Reserve() {
	n := h.chains * h.capacity
	h.gather = growFloats(h.gather, n)
	ws := &h.ws
	for _, b := range []*[]float64{&ws.pool, &ws.sorted, &ws.z, &ws.fold, &ws.ind, &ws.scores, &ws.acov.dev} {
		*b = growFloats(*b, n)
	}
	if cap(ws.pairs) < n {
		ws.pairs = make([]rankPair, 0, n)
	}
	if cap(ws.spare) < n {
		ws.spare = make([]rankPair, n)
	}
}

// NewDrawHistory returns a History that keeps the thinned draws only, as
// NewHistory's does (the same draws, the same Summarize), without the
// batch sums and running moments: its memory is about
// capacity·chains·dim values plus the scratch of Summarize, and its
// RunMeans panics.
func NewDrawHistory(chains, dim, capacity int) *History {
	if chains < 1 || dim < 1 || capacity < minCapacity {
		panic(fmt.Sprintf("diag: NewDrawHistory(%d, %d, %d) needs chains, dim ≥ 1 and capacity ≥ %d", chains, dim, capacity, minCapacity))
	}
	capacity += capacity % 2
	return &History{chains: chains, dim: dim, capacity: capacity, row: chains * dim, drawsOnly: true,
		interval: 1, batch: 1, buf: make([]float64, capacity*chains*dim)}
}

// Steps is the number of steps added so far.
func (h *History) Steps() int { return h.steps }

// Interval is the number of steps between kept draws.
func (h *History) Interval() int { return h.interval }

// Kept is the number of draws kept per chain.
func (h *History) Kept() int { return h.kept }

// Summarize returns the Vehtari et al. (2021) figures of every coordinate computed
// on the kept draws (see the type's comment for what their ESS means), or
// nil while fewer than 8 draws per chain are kept.
func (h *History) Summarize() []Summary {
	return h.SummarizeUntil(nil)
}

// SummarizeUntil is Summarize asking stop (when not nil) before each
// coordinate; once it reports true it gives up and returns nil. For a
// caller that no longer needs the figures.
func (h *History) SummarizeUntil(stop func() bool) []Summary {
	if h.kept < 2*minHalf {
		return nil
	}
	h.gather = growFloats(h.gather, h.chains*h.kept)
	h.views = h.views[:0]
	for c := range h.chains {
		h.views = append(h.views, h.gather[c*h.kept:(c+1)*h.kept])
	}
	out := make([]Summary, h.dim)
	for j := range out {
		if stop != nil && stop() {
			return nil
		}
		for c, v := range h.views {
			for t := range v {
				v[t] = h.buf[(t*h.chains+c)*h.dim+j]
			}
		}
		out[j] = h.ws.summary(h.views)
	}
	return out
}

// RunMean holds figures of the mean of one coordinate over every draw of
// every chain added so far (S = chains × Steps draws).
type RunMean struct {
	Mean float64 // mean of all S draws
	SD   float64 // their standard deviation, divisor S − 1
	// ESS = min(S·SD²/σ̂², S·log₁₀ S), with σ̂² the batch-means estimate of the asymptotic
	// variance pooled over chains about the mean of all batch means:
	// σ̂² = (b/(a·M − 1))·Σ_{m,k} (Ȳ_{m,k} − Ȳ)², a complete batches of b
	// draws per chain (the draws of an incomplete last batch are left out
	// of σ̂² only).
	ESS     float64
	MCSE    float64 // SD/√ESS (= √(σ̂²/S) unless the cap S·log₁₀ S on ESS applies)
	Batches int     // a·M, the number of batch means behind σ̂²
	Batch   int     // b
}

// RunMeans returns the RunMean of every coordinate. Every figure is NaN
// before the first step; ESS and MCSE are NaN while fewer than two batches
// are complete or when a coordinate is constant. The relative standard error of σ̂² is about √(2/(a·M − 1))
// and its relative bias about −(Σ_{t≠0}|t|ρ_t)/(τ·b) (common practice for
// batch means), small when b ≫ τ.
//
// It panics on a History made by NewDrawHistory, which keeps no running
// moments.
func (h *History) RunMeans() []RunMean {
	if h.drawsOnly {
		panic("diag: RunMeans of a History made by NewDrawHistory")
	}
	out := make([]RunMean, h.dim)
	n := float64(h.steps)
	tot := n * float64(h.chains)
	nb := h.batches * h.chains
	if h.steps == 0 {
		nan := math.NaN()
		for j := range out {
			out[j] = RunMean{nan, nan, nan, nan, 0, h.batch}
		}
		return out
	}
	for j := range out {
		var mu float64
		for c := range h.chains {
			mu += h.mu[c*h.dim+j]
		}
		mu /= float64(h.chains)
		var ss float64
		for c := range h.chains {
			d := h.mu[c*h.dim+j] - mu
			ss += h.m2[c*h.dim+j] + n*d*d
		}
		r := RunMean{Mean: mu, SD: math.Sqrt(ss / (tot - 1)), Batches: nb, Batch: h.batch, ESS: math.NaN(), MCSE: math.NaN()}
		if nb >= 2 {
			b := float64(h.batch)
			var ybar float64
			for k := range h.batches {
				for c := range h.chains {
					ybar += h.sums[(k*h.chains+c)*h.dim+j] / b
				}
			}
			ybar /= float64(nb)
			var q float64
			for k := range h.batches {
				for c := range h.chains {
					d := h.sums[(k*h.chains+c)*h.dim+j]/b - ybar
					q += d * d
				}
			}
			sig2 := b * q / float64(nb-1)
			if sig2 > 0 {
				r.ESS = capESS(tot*r.SD*r.SD/sig2, int(tot))
				r.MCSE = r.SD / math.Sqrt(r.ESS)
			}
		}
		out[j] = r
	}
	return out
}
