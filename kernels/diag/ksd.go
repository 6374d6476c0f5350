package diag

import (
	"fmt"
	"math"
)

// IMQ is the inverse multiquadric base kernel of the kernel Stein
// discrepancy (Gorham and Mackey, ICML 2017):
//
//	k(x, y) = (c² + ‖x − y‖²)^β,   c > 0, −1 < β < 0.
//
// The zero value is the usual choice c = 1, β = −½: a zero C means 1 and a
// zero Beta means −½. Any other value outside the ranges above makes the
// methods panic.
type IMQ struct {
	C    float64 // scale c > 0; 0 means 1
	Beta float64 // exponent β in (−1, 0); 0 means −½
}

// params returns c² and β with the zero-value defaults applied, panicking
// on values outside the kernel's range.
func (k IMQ) params() (c2, beta float64) {
	c, beta := k.C, k.Beta
	if c == 0 {
		c = 1
	}
	if beta == 0 {
		beta = -0.5
	}
	if !(c > 0) || math.IsInf(c, 1) || !(beta > -1 && beta < 0) {
		panic(fmt.Sprintf("diag: IMQ kernel needs c > 0 and −1 < β < 0, have c = %v, β = %v", k.C, k.Beta))
	}
	return c * c, beta
}

// Stein returns the Langevin–Stein kernel k₀(x, y) built on the IMQ base
// kernel from two points and their scores sx = ∇log π(x), sy = ∇log π(y)
// (derived here from the definition of Liu, Lee and Jordan 2016): with r = x − y, S = c² + ‖r‖² and d the
// dimension,
//
//	k₀(x, y) = sxᵀsy·S^β + 2β·S^{β−1}·rᵀ(sy − sx) − 2β·d·S^{β−1} − 4β(β−1)·‖r‖²·S^{β−2}.
//
// It is symmetric, needs no normalising constant, and satisfies the Stein
// identity E_{X~π} k₀(X, y) = 0 for every fixed y. All four slices must
// have the same length.
func (k IMQ) Stein(x, sx, y, sy []float64) float64 {
	d := len(x)
	if len(sx) != d || len(y) != d || len(sy) != d {
		panic(fmt.Sprintf("diag: Stein kernel on slices of lengths %d, %d, %d, %d", len(x), len(sx), len(y), len(sy)))
	}
	c2, beta := k.params()
	return steinPair(c2, beta, float64(d), x, sx, y, sy)
}

// steinPair evaluates k₀ for slices already known to have equal lengths.
func steinPair(c2, beta, d float64, x, sx, y, sy []float64) float64 {
	q, a, b := pairSums(x, sx, y, sy)
	return steinValue(c2, beta, d, q, a, b)
}

// pairSums returns ‖x − y‖², sxᵀsy and (x − y)ᵀ(sy − sx), the only
// quantities of a pair that k₀ needs.
func pairSums(x, sx, y, sy []float64) (q, a, b float64) {
	sx = sx[:len(x)]
	y = y[:len(x)]
	sy = sy[:len(x)]
	for i, xi := range x {
		r := xi - y[i]
		q += r * r
		a += sx[i] * sy[i]
		b += r * (sy[i] - sx[i])
	}
	return q, a, b
}

// steinValue is k₀ from the pair sums of pairSums:
//
//	k₀ = S^β·(a + 2β(b − d)/S − 4β(β−1)q/S²),   S = c² + q.
func steinValue(c2, beta, d, q, a, b float64) float64 {
	s := c2 + q
	var sb float64 // S^β
	if beta == -0.5 {
		sb = 1 / math.Sqrt(s)
	} else {
		sb = math.Pow(s, beta)
	}
	inv := 1 / s
	return sb * (a + 2*beta*inv*(b-d) - 4*beta*(beta-1)*q*inv*inv)
}

// KSD holds the kernel Stein discrepancy estimates of one set of N draws
// with equal weights (Liu, Lee and Jordan, ICML 2016;
// Gorham and Mackey, ICML 2017):
//
//	KSD²_V = (1/N²) Σ_{i,j} k₀(x_i, x_j)            (≥ 0, biased upward by O(1/N))
//	KSD²_U = (1/(N(N−1))) Σ_{i≠j} k₀(x_i, x_j)     (unbiased for i.i.d. draws, may be negative)
//
// For exact independent draws from π, k₀ is degenerate (E_X k₀(X, y) = 0),
// so KSD²_U has mean 0 and variance 2·E[k₀(X, X′)²]/(N(N−1)) (Hoeffding
// decomposition): N·KSD²_U stays of order one as N grows, while KSD²_V
// has mean E[k₀(X, X)]/N. Both measure how far the draws are
// from π, including any bias of the sampler; Markov chain draws make the
// estimates noisier than independent ones.
type KSD struct {
	// N is the number of draws used.
	N int
	// V2 is the V-statistic KSD²_V; NaN when N = 0.
	V2 float64
	// U2 is the U-statistic KSD²_U; NaN when N < 2.
	U2 float64
}

// V returns the discrepancy √KSD²_V.
func (d KSD) V() float64 { return math.Sqrt(d.V2) }

// U returns the discrepancy √max(KSD²_U, 0).
//
// Deprecated: a negative KSD²_U, which for draws of the target law happens
// more often than not, is shown as a bare 0 with no uncertainty, and a
// target on it is met by noise. Use AssessStein (or StreamKSD.Assess),
// whose SteinResult carries the estimate with its standard error, an upper
// 95 % bound, a test of KSD = 0 and SteinResult.Below for targets.
func (d KSD) U() float64 { return math.Sqrt(math.Max(d.U2, 0)) }

// SteinDiscrepancy returns the V- and U-statistic kernel Stein discrepancy
// of draws (N×dim values, row-major) whose scores ∇log π are in scores
// (same layout): the gradients a session already asked the client for, so
// the estimate costs no extra evaluation. The work is N(N−1)/2 kernel
// evaluations of O(dim) each; nothing is allocated. Lengths that are not
// the same multiple of dim panic. Non-finite inputs give NaN.
func SteinDiscrepancy(kern IMQ, dim int, draws, scores []float64) KSD {
	n := steinShape(dim, draws, scores)
	off, on := steinSums(kern, dim, draws[:n*dim], scores[:n*dim])
	return ksdFromSums(n, off, on)
}

// LinearSteinDiscrepancy returns the linear-time estimate
//
//	KSD²_L = (1/⌊N/2⌋) Σ_{i=1}^{⌊N/2⌋} k₀(x_{2i−1}, x_{2i})
//
// over consecutive pairs of rows (Liu, Lee and Jordan 2016): unbiased for independent
// draws and O(N·dim) work, but noisier: for exact draws its variance is
// 2·E[k₀(X, X′)²]/N against the U-statistic's 2·E[k₀(X, X′)²]/(N(N−1)).
// Consecutive Markov chain draws are correlated; order the rows so that
// paired draws are far apart (e.g. x_i with x_{i+N/2}). The last row is
// unused when N is odd; fewer than two rows give NaN.
func LinearSteinDiscrepancy(kern IMQ, dim int, draws, scores []float64) float64 {
	n := steinShape(dim, draws, scores)
	if n < 2 {
		return math.NaN()
	}
	c2, beta := kern.params()
	var sum float64
	for i := 0; i+1 < n; i += 2 {
		a, b := i*dim, (i+1)*dim
		sum += steinPair(c2, beta, float64(dim), draws[a:b], scores[a:b], draws[b:b+dim], scores[b:b+dim])
	}
	return sum / float64(n/2)
}

func steinShape(dim int, draws, scores []float64) int {
	if dim < 1 {
		panic(fmt.Sprintf("diag: Stein discrepancy in dimension %d", dim))
	}
	if len(draws) != len(scores) || len(draws)%dim != 0 {
		panic(fmt.Sprintf("diag: Stein discrepancy with %d draw values and %d score values in dimension %d", len(draws), len(scores), dim))
	}
	return len(draws) / dim
}

// steinSums returns Σ_{i≠j} k₀(x_i, x_j) and Σ_i k₀(x_i, x_i) over the rows
// of x (scores s), each unordered pair evaluated once.
func steinSums(kern IMQ, dim int, x, s []float64) (off, on float64) {
	c2, beta := kern.params()
	return steinSumsC(c2, beta, dim, x, s)
}

// steinSumsC is steinSums with the kernel's parameters given.
func steinSumsC(c2, beta float64, dim int, x, s []float64) (off, on float64) {
	d := float64(dim)
	n := len(x) / dim
	for i := range n {
		xi, si := x[i*dim:(i+1)*dim], s[i*dim:(i+1)*dim]
		var row float64
		for j := i + 1; j < n; j++ {
			row += steinPair(c2, beta, d, xi, si, x[j*dim:(j+1)*dim], s[j*dim:(j+1)*dim])
		}
		off += 2 * row
		on += steinPair(c2, beta, d, xi, si, xi, si)
	}
	return off, on
}

func ksdFromSums(n int, off, on float64) KSD {
	out := KSD{N: n, V2: math.NaN(), U2: math.NaN()}
	if n >= 1 {
		out.V2 = (off + on) / float64(n*n)
	}
	if n >= 2 {
		out.U2 = off / float64(n*(n-1))
	}
	return out
}

// StreamKSD keeps a bounded, evenly thinned subsample of a long run and
// gives its kernel Stein discrepancy on request.
//
// Design: draws arrive in rounds of a fixed number of rows (one row per
// chain, say: one Add per step). Rounds 0, t, 2t, … are kept, with stride
// t = 1 at the start. When a round is due and the store already holds its
// capacity of G = ⌊capacity/rows⌋ rounds, every second kept round is
// dropped (rounds 0, 2t, 4t, … stay) and t doubles. After R rounds the kept
// set is therefore exactly the rounds that are multiples of t, with t the
// smallest power of two for which they fit (⌈R/t⌉ ≤ G; at least ⌈G/2⌉ of
// them once t > 1): an evenly spaced thinning of the whole run, whose
// spacing grows with the run and so keeps Markov chain draws further apart
// as the run gets longer. Every row of a round is kept together, so every
// chain keeps the same share. Result uses all kept draws, so N varies
// between ⌈G/2⌉·rows and G·rows.
//
// Cost: memory 2·G·rows·dim float64 values, fixed at construction. Add
// copies one round (O(rows·dim)) when it is kept and does nothing else;
// the occasional halving moves at most G/2 rounds, O(capacity·dim) about
// log₂(R/G) times over the run, so O(dim) per kept draw amortised. Result
// computes the U- and V-statistic of the kept draws from scratch, in
// K(K−1)/2 kernel evaluations of O(dim) each for K ≤ capacity kept draws,
// and caches it until the next kept round. Nothing allocates after
// construction.
//
// The run starts with the first Add: leave burn-in out. A StreamKSD is not
// safe for concurrent use.
type StreamKSD struct {
	kern        IMQ
	dim, rows   int
	maxRounds   int       // G
	x, s        []float64 // kept draws and scores, maxRounds·rows·dim values each
	kept        int       // kept rounds
	stride      int
	rounds      int // rounds offered
	cached      KSD
	cacheRounds int // kept rounds when cached was computed, −1 for none
}

// NewStreamKSD returns an empty stream for draws in dimension dim arriving
// rows at a time, keeping at most capacity draws (so ⌊capacity/rows⌋
// rounds, which must be at least 2). It panics on an invalid kernel or
// sizes.
func NewStreamKSD(kern IMQ, dim, rows, capacity int) *StreamKSD {
	kern.params()
	if dim < 1 || rows < 1 || capacity/max(rows, 1) < 2 {
		panic(fmt.Sprintf("diag: StreamKSD with dim %d, rows %d, capacity %d (need room for 2 rounds)", dim, rows, capacity))
	}
	g := capacity / rows
	return &StreamKSD{
		kern: kern, dim: dim, rows: rows, maxRounds: g,
		x: make([]float64, g*rows*dim), s: make([]float64, g*rows*dim),
		stride: 1, cacheRounds: -1,
	}
}

// Add offers one round of draws (rows×dim values, row-major) with their
// scores ∇log π (same layout). Only the values are kept, never the slices.
// A round of the wrong length panics.
func (st *StreamKSD) Add(draws, scores []float64) {
	w := st.rows * st.dim
	if len(draws) != w || len(scores) != w {
		panic(fmt.Sprintf("diag: StreamKSD round of %d draw values and %d score values, want %d", len(draws), len(scores), w))
	}
	if st.offer() {
		copy(st.x[st.kept*w:], draws)
		copy(st.s[st.kept*w:], scores)
		st.kept++
	}
}

// AddRows offers one round made of the rows idx of draws and scores (rows
// of dim values, row-major, same layout), in that order: Add of those rows
// gathered, without gathering them when the round is not kept. A nil idx
// offers every row, as Add. It panics when idx does not name as many rows
// as a round has or names a row outside draws or scores.
func (st *StreamKSD) AddRows(draws, scores []float64, idx []int) {
	if idx == nil {
		st.Add(draws, scores)
		return
	}
	d := st.dim
	if len(idx) != st.rows {
		panic(fmt.Sprintf("diag: StreamKSD round of %d rows, want %d", len(idx), st.rows))
	}
	n := min(len(draws), len(scores)) / d
	for _, r := range idx {
		if r < 0 || r >= n {
			panic(fmt.Sprintf("diag: StreamKSD row %d of a round of %d rows", r, n))
		}
	}
	if !st.offer() {
		return
	}
	x, s := st.x[st.kept*st.rows*d:], st.s[st.kept*st.rows*d:]
	for i, r := range idx {
		copy(x[i*d:(i+1)*d], draws[r*d:(r+1)*d])
		copy(s[i*d:(i+1)*d], scores[r*d:(r+1)*d])
	}
	st.kept++
}

// offer counts a round offered and reports whether it is kept, making
// room for it (the halving) when it is: the caller then copies it to
// round st.kept and increments st.kept.
func (st *StreamKSD) offer() bool {
	w := st.rows * st.dim
	r := st.rounds
	st.rounds++
	if r%st.stride != 0 {
		return false
	}
	if st.kept == st.maxRounds {
		for j := 1; 2*j < st.kept; j++ {
			copy(st.x[j*w:(j+1)*w], st.x[2*j*w:(2*j+1)*w])
			copy(st.s[j*w:(j+1)*w], st.s[2*j*w:(2*j+1)*w])
		}
		st.kept = (st.kept + 1) / 2
		st.stride *= 2
		st.cacheRounds = -1
		if r%st.stride != 0 {
			return false
		}
	}
	return true
}

// Result returns the kernel Stein discrepancy of the kept draws (N = Kept)
// on the kernel's own scale, without uncertainty: for figures shown to a
// user or compared with a target, call Assess.
func (st *StreamKSD) Result() KSD {
	if st.cacheRounds != st.kept {
		k := st.kept * st.rows * st.dim
		off, on := steinSums(st.kern, st.dim, st.x[:k], st.s[:k])
		st.cached = ksdFromSums(st.kept*st.rows, off, on)
		st.cacheRounds = st.kept
	}
	return st.cached
}

// CopyFrom makes st a copy of src, which must have the same kernel and
// sizes (it panics otherwise), reusing st's memory: a snapshot of the
// window that another goroutine may assess while src goes on.
func (st *StreamKSD) CopyFrom(src *StreamKSD) {
	if st.kern != src.kern || st.dim != src.dim || st.rows != src.rows || st.maxRounds != src.maxRounds {
		panic("diag: StreamKSD.CopyFrom of a stream of other sizes or kernel")
	}
	k := src.kept * src.rows * src.dim
	copy(st.x, src.x[:k])
	copy(st.s, src.s[:k])
	st.kept, st.stride, st.rounds, st.cached, st.cacheRounds = src.kept, src.stride, src.rounds, src.cached, src.cacheRounds
}

// Seen returns the number of draws offered so far.
func (st *StreamKSD) Seen() int { return st.rounds * st.rows }

// Kept returns the number of draws currently kept.
func (st *StreamKSD) Kept() int { return st.kept * st.rows }

// Stride returns the current thinning: kept rounds are the multiples of
// Stride among the rounds offered.
func (st *StreamKSD) Stride() int { return st.stride }
