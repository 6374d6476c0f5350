package diag

import (
	"fmt"
	"math"
	"slices"

	"gonum.org/v1/gonum/stat/distuv"
)

// RhatResult holds the R̂ figures of Vehtari et al. 2021, split-R̂, rank normalisation, bulk and folded R̂, all computed
// on the split chains.
type RhatResult struct {
	Classic  float64 // R̂ of the draws as they are (step 2)
	Bulk     float64 // R̂ of the rank-normalised draws (steps 3–4)
	Folded   float64 // R̂ of the rank-normalised |θ − median(θ)| (step 4)
	Reported float64 // max(Bulk, Folded); the draws pass below 1.01
}

// Rhat returns the split-R̂ figures of chains[m][n] (Vehtari et al. 2021:
// split chains, split-R̂, rank normalisation, bulk and folded R̂). Chains must have the same length, at least 4. A constant input,
// or one containing NaN, gives NaN figures.
func Rhat(chains [][]float64) RhatResult {
	var ws workspace
	if !ws.load(chains, 2) {
		return nanRhat()
	}
	return ws.rhat()
}

func nanRhat() RhatResult {
	nan := math.NaN()
	return RhatResult{nan, nan, nan, nan}
}

// rankPair ties a value to its position in the pooled draws.
type rankPair struct {
	v float64
	i int
}

// workspace holds the split chains of one scalar quantity, their pooled
// and sorted draws, and the scratch of every figure computed from them.
// All chain views point into flat buffers laid out in split order, so a
// workspace reused across coordinates allocates nothing after the first.
type workspace struct {
	split  [][]float64 // views of the caller's chains
	n      int         // draws per split chain
	pool   []float64   // split draws, flattened in split order
	sorted []float64   // pool, ascending
	pairs  []rankPair
	spare  []rankPair // sortPairs' scratch, then the folded draws' order
	z      []float64  // rank-normalised pool
	fold   []float64  // |pool − median|, then its rank normalisation
	ind    []float64  // indicator 1[pool ≤ q]
	views  [][]float64
	scores []float64 // Φ⁻¹((r − 3/8)/(S_tot + 1/4)) for r = 1..S_tot
	acov   acovScratch
	trace  *geyerTrace // set by tests
}

// load splits chains and pools their draws. It panics if a split chain
// would have fewer than minHalf draws, and reports false if any draw is NaN.
func (ws *workspace) load(chains [][]float64, minHalf int) bool {
	n := checkChains(chains)
	if n/2 < minHalf {
		panic(fmt.Sprintf("diag: need at least %d draws per chain (%d per split half), have %d", 2*minHalf, minHalf, n))
	}
	ws.split = splitInto(ws.split, chains)
	ws.n = n / 2
	tot := ws.n * len(ws.split)
	ws.pool = growFloats(ws.pool, tot)
	for m, c := range ws.split {
		copy(ws.pool[m*ws.n:], c)
	}
	for _, v := range ws.pool {
		if math.IsNaN(v) {
			return false
		}
	}
	ws.z = ws.rankNormal(ws.z, ws.pool)
	ws.sorted = growFloats(ws.sorted, tot)
	for k, p := range ws.pairs {
		ws.sorted[k] = p.v
	}
	return true
}

// chainsOf returns M' chain views of a flat buffer in split order.
func (ws *workspace) chainsOf(flat []float64) [][]float64 {
	ws.views = ws.views[:0]
	for m := range ws.split {
		ws.views = append(ws.views, flat[m*ws.n:(m+1)*ws.n])
	}
	return ws.views
}

// rankNormal writes into dst the normal scores of the pooled average ranks
// of src (Vehtari et al. 2021, rank normalisation, Blom's offsets):
//
//	z = Φ⁻¹((r − 3/8) / (S_tot + 1/4)),
//
// tied values sharing the mean of their ranks. dst may be src. It leaves
// ws.pairs holding src's values in ascending order with their positions.
func (ws *workspace) rankNormal(dst, src []float64) []float64 {
	dst = growFloats(dst, len(src))
	ws.pairs = ws.pairs[:0]
	for i, v := range src {
		ws.pairs = append(ws.pairs, rankPair{v, i})
	}
	// No NaN here (load refuses them), so < is a total order.
	ws.spare = sortPairs(ws.pairs, ws.spare)
	ws.assignScores(dst, ws.pairs)
	return dst
}

// assignScores writes into dst[p.i] the normal score of every pair's
// average rank in sorted, which holds every value in ascending order
// (equal values, ±0 among them, next to each other). The scores depend
// only on the values, so any such order gives the same dst.
func (ws *workspace) assignScores(dst []float64, sorted []rankPair) {
	tot := len(sorted)
	den := float64(tot) + 0.25
	if len(ws.scores) != tot {
		// Scores of the untied ranks 1..S_tot, shared by every call with
		// this S_tot.
		ws.scores = growFloats(ws.scores, tot)
		for r := range ws.scores {
			ws.scores[r] = distuv.UnitNormal.Quantile((float64(r+1) - 0.375) / den)
		}
	}
	for lo := 0; lo < tot; {
		hi := lo + 1
		for hi < tot && sorted[hi].v == sorted[lo].v {
			hi++
		}
		z := ws.scores[lo]
		if hi > lo+1 {
			r := float64(lo+1+hi) / 2 // mean of ranks lo+1..hi
			z = distuv.UnitNormal.Quantile((r - 0.375) / den)
		}
		for _, p := range sorted[lo:hi] {
			dst[p.i] = z
		}
		lo = hi
	}
}

// radixMin is the fewest values sortPairs sorts by radix; shorter inputs
// go to a comparison sort, cheaper there than the radix passes' counts.
const radixMin = 256

// sortPairs sorts ps by value, ascending (no NaN), and returns the
// scratch it used (len(ps) pairs, for the next call). Above radixMin
// values it is a least-significant-digit radix sort, one byte per pass,
// on the order-preserving key of each value's bits (floatKey); a pass
// whose byte is the same for every value is skipped. Equal keys keep
// their order, and −0 comes before +0 (their keys differ; < ties them):
// the values come out ascending as by <, so the ranks are the same as
// any comparison sort's.
func sortPairs(ps, spare []rankPair) []rankPair {
	n := len(ps)
	if n < radixMin {
		slices.SortFunc(ps, func(a, b rankPair) int {
			if a.v < b.v {
				return -1
			}
			if a.v > b.v {
				return 1
			}
			return 0
		})
		return spare
	}
	if cap(spare) < n {
		spare = make([]rankPair, n)
	}
	spare = spare[:n]
	var counts [8][256]int
	for _, p := range ps {
		k := floatKey(p.v)
		for d := range counts {
			counts[d][byte(k>>(8*d))]++
		}
	}
	src, dst := ps, spare
	for d := range counts {
		c := &counts[d]
		if c[byte(floatKey(ps[0].v)>>(8*d))] == n {
			continue // every value has this byte
		}
		sum := 0
		for b, v := range c {
			c[b] = sum
			sum += v
		}
		shift := uint(8 * d)
		for _, p := range src {
			b := byte(floatKey(p.v) >> shift)
			dst[c[b]] = p
			c[b]++
		}
		src, dst = dst, src
	}
	if &src[0] != &ps[0] {
		copy(ps, src)
	}
	return spare
}

// floatKey maps a float64 to a uint64 whose unsigned order is the
// float's order (−0 just below +0): the sign bit set on non-negative
// values, every bit flipped on negative ones.
func floatKey(v float64) uint64 {
	b := math.Float64bits(v)
	return b ^ (uint64(int64(b)>>63) | 1<<63)
}

// rhat computes the figures of steps 2–4 on a loaded workspace.
func (ws *workspace) rhat() RhatResult {
	var r RhatResult
	r.Classic = classicRhat(ws.split)
	r.Bulk = classicRhat(ws.chainsOf(ws.z))
	med := quantile7(ws.sorted, 0.5)
	if math.IsInf(med, 0) || math.IsNaN(med) {
		// |θ − median| is not defined at the draws equal to an
		// infinite median (NaN: halfway between −∞ and +∞).
		r.Folded = math.NaN()
	} else {
		ws.fold = growFloats(ws.fold, len(ws.pool))
		ws.assignScores(ws.fold, ws.foldOrder(med))
		r.Folded = classicRhat(ws.chainsOf(ws.fold))
	}
	r.Reported = math.Max(r.Bulk, r.Folded)
	if math.IsNaN(r.Bulk) || math.IsNaN(r.Folded) {
		r.Reported = math.NaN()
	}
	return r
}

// foldOrder returns the pairs (|v − med|, position) of the pooled draws
// in ascending order of |v − med|, from ws.pairs (the draws ascending, as
// load leaves them) without sorting again: v − med is non-decreasing
// along ws.pairs (rounding is monotone), so |v − med| falls over the
// draws below med and rises over the rest, and merging the two runs
// sorts them.
func (ws *workspace) foldOrder(med float64) []rankPair {
	ps := ws.pairs
	n := len(ps)
	if cap(ws.spare) < n {
		ws.spare = make([]rankPair, n)
	}
	out := ws.spare[:n]
	p := 0 // first draw ≥ med
	for p < n && ps[p].v < med {
		p++
	}
	lo, hi := p-1, p
	for k := range out {
		if hi == n || (lo >= 0 && med-ps[lo].v <= ps[hi].v-med) {
			out[k] = rankPair{math.Abs(ps[lo].v - med), ps[lo].i}
			lo--
		} else {
			out[k] = rankPair{math.Abs(ps[hi].v - med), ps[hi].i}
			hi++
		}
	}
	return out
}

// classicStats returns W, B and var⁺ of an M×N array (Vehtari et al. 2021, split-R̂):
//
//	W = mean_m s_m²,  B = N·var_m(θ̄_m),  var⁺ = ((N−1)/N)·W + B/N.
func classicStats(chains [][]float64) (w, b, varPlus float64) {
	n := len(chains[0])
	means := make([]float64, len(chains))
	for m, c := range chains {
		means[m] = mean(c)
		w += variance(c, means[m])
	}
	w /= float64(len(chains))
	b = float64(n) * variance(means, mean(means))
	varPlus = float64(n-1)/float64(n)*w + b/float64(n)
	return w, b, varPlus
}

// classicRhat is √(var⁺/W) (Vehtari et al. 2021, split-R̂); NaN when W is zero.
func classicRhat(chains [][]float64) float64 {
	w, _, varPlus := classicStats(chains)
	if !(w > 0) {
		return math.NaN()
	}
	return math.Sqrt(varPlus / w)
}

// quantile7 is the linear-interpolation quantile of sorted x ("type 7",
// Vehtari et al. 2021, bulk- and tail-ESS): h = α(S−1), x[⌊h⌋] + (h − ⌊h⌋)(x[⌊h⌋+1] − x[⌊h⌋]).
func quantile7(sorted []float64, alpha float64) float64 {
	h := alpha * float64(len(sorted)-1)
	lo := math.Floor(h)
	i := int(lo)
	if i+1 >= len(sorted) {
		return sorted[len(sorted)-1]
	}
	return sorted[i] + (h-lo)*(sorted[i+1]-sorted[i])
}
