package diag

import (
	"math"
	"math/rand/v2"
	"slices"
	"sort"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"
)

const workedVehtari = "worked example of Vehtari et al. (2021), computed for the project"

// Vehtari et al. 2021, split-R̂, rank normalisation, bulk and folded R̂ on the 4 × 20 test array.
func TestRhatMatchesTheoryVector(t *testing.T) {
	w, b, vp := classicStats(SplitChains(workedChains))
	checkAbs(t, "W", w, 0.8357752236, 1e-8, workedVehtari)
	checkAbs(t, "B", b, 3.6524705125, 1e-8, workedVehtari)
	checkAbs(t, "var⁺", vp, 1.1174447525, 1e-8, workedVehtari)
	r := Rhat(workedChains)
	checkAbs(t, "classic split-R̂", r.Classic, 1.1562940317, 1e-8, workedVehtari)
	checkAbs(t, "bulk R̂", r.Bulk, 1.1512578790, 1e-8, workedVehtari)
	checkAbs(t, "folded R̂", r.Folded, 0.9759962374, 1e-8, workedVehtari)
	checkAbs(t, "reported R̂", r.Reported, 1.1512578790, 1e-8, workedVehtari)
	if r.Reported < 1.01 {
		t.Errorf("reported R̂ %v passes the 1.01 threshold; the worked example fails it", r.Reported)
	}
}

// Rank normalisation (Vehtari et al. 2021, rank normalisation): ties get the mean of their
// ranks, z = Φ⁻¹((r − 3/8)/(S + 1/4)), Φ⁻¹ from gonum. Values 3, 1, 2, 2, 5
// have ranks 4, 1, 2.5, 2.5, 5 (worked by hand).
func TestRankNormalTiesAndOffsets(t *testing.T) {
	var ws workspace
	z := ws.rankNormal(nil, []float64{3, 1, 2, 2, 5})
	for i, r := range []float64{4, 1, 2.5, 2.5, 5} {
		want := distuv.UnitNormal.Quantile((r - 0.375) / 5.25)
		checkAbs(t, "rank-normal score", z[i], want, 1e-15, "Blom offsets, hand ranks")
	}
}

// The classic R̂ of a split array written out by hand: two chains of four,
// (0,1,2,3) and (1,2,3,4) split into (0,1),(1,2),(2,3),(3,4): chain means
// 0.5, 1.5, 2.5, 3.5, s² = 0.5 each so W = 0.5; B = 2·var(means) =
// 2·(5/3) = 10/3; var⁺ = W/2 + B/2 = 23/12; R̂ = √(23/6) (derived here).
func TestClassicRhatByHand(t *testing.T) {
	r := Rhat([][]float64{{0, 1, 2, 3}, {1, 2, 3, 4}})
	checkAbs(t, "classic R̂", r.Classic, math.Sqrt(23.0/6), 1e-14, "hand computation")
}

// Degenerate inputs: a constant quantity has no R̂ (W = 0), NaN draws give
// NaN, and too short chains are a programmer error.
func TestRhatDegenerate(t *testing.T) {
	c := Rhat([][]float64{{1, 1, 1, 1}, {1, 1, 1, 1}})
	if !math.IsNaN(c.Classic) || !math.IsNaN(c.Reported) {
		t.Errorf("constant chains: %+v, want NaN", c)
	}
	n := Rhat([][]float64{{1, 2, math.NaN(), 4}, {1, 2, 3, 4}})
	if !math.IsNaN(n.Bulk) || !math.IsNaN(n.Folded) || !math.IsNaN(n.Reported) {
		t.Errorf("NaN draw: %+v, want NaN", n)
	}
	defer func() {
		if recover() == nil {
			t.Error("Rhat of 3-draw chains did not panic")
		}
	}()
	Rhat([][]float64{{1, 2, 3}})
}

// Independent chains from one distribution have R̂ near 1, and a shifted
// chain raises it. Reference (common practice, the large-sample behaviour
// of R̂): for M' split chains of N i.i.d. draws, var⁺/W − 1 = (B/W − 1)/N
// with B/W ≈ F(M'−1, M'(N−1)), so R̂ − 1 has sd ≈ √(2/(M'−1))/(2N); with
// M' = 8, N = 2000 that is 1.3e-4, and |R̂ − 1| < 1e-3 is a 7σ band. A
// scale change of one chain only is invisible to bulk R̂ but shows in the
// folded one.
func TestRhatDetectsLocationAndScale(t *testing.T) {
	r := rand.New(rand.NewPCG(21, 22))
	draw := func(shift, scale float64) [][]float64 {
		chains := make([][]float64, 4)
		for m := range chains {
			chains[m] = make([]float64, 4000)
			for i := range chains[m] {
				chains[m][i] = r.NormFloat64()
				if m == 0 {
					chains[m][i] = shift + scale*chains[m][i]
				}
			}
		}
		return chains
	}
	ok := Rhat(draw(0, 1))
	for _, v := range []float64{ok.Classic, ok.Bulk, ok.Folded} {
		checkAbs(t, "R̂ of i.i.d. chains", v, 1, 1e-3, "F-distribution of B/W, 7σ")
	}
	if loc := Rhat(draw(1, 1)); loc.Bulk < 1.05 {
		t.Errorf("one chain shifted by 1 sd: bulk R̂ = %v, want > 1.05", loc.Bulk)
	}
	sc := Rhat(draw(0, 3))
	if sc.Folded < 1.05 || sc.Reported != sc.Folded {
		t.Errorf("one chain with 3× the sd: %+v, want folded R̂ > 1.05 and reported", sc)
	}
}

// referenceRankNormal is rankNormal as first written: a comparison sort of
// (value, position) pairs by <, then the scores of the average ranks
// (Vehtari et al. 2021, rank normalisation, Blom's offsets).
func referenceRankNormal(src []float64) []float64 {
	tot := len(src)
	ps := make([]rankPair, tot)
	for i, v := range src {
		ps[i] = rankPair{v, i}
	}
	slices.SortFunc(ps, func(a, b rankPair) int {
		if a.v < b.v {
			return -1
		}
		if a.v > b.v {
			return 1
		}
		return 0
	})
	den := float64(tot) + 0.25
	dst := make([]float64, tot)
	for lo := 0; lo < tot; {
		hi := lo + 1
		for hi < tot && ps[hi].v == ps[lo].v {
			hi++
		}
		r := float64(lo+1+hi) / 2
		z := distuv.UnitNormal.Quantile((r - 0.375) / den)
		for _, p := range ps[lo:hi] {
			dst[p.i] = z
		}
		lo = hi
	}
	return dst
}

// rankTestData draws n values with many ties, both zeros, infinities,
// subnormals and values of every magnitude and sign.
func rankTestData(r *rand.Rand, n int) []float64 {
	x := make([]float64, n)
	for i := range x {
		switch r.IntN(8) {
		case 0:
			x[i] = float64(r.IntN(5) - 2) // ties among small integers
		case 1:
			x[i] = []float64{0, math.Copysign(0, -1), math.Inf(1), math.Inf(-1), 5e-324, -5e-324}[r.IntN(6)]
		case 2:
			x[i] = math.Float64frombits(r.Uint64()&^(0x7ff<<52) | uint64(r.IntN(0x7ff))<<52) // any finite bits
		default:
			x[i] = r.NormFloat64()
		}
	}
	return x
}

// The radix sort behind rankNormal orders values as < does: the sorted
// values equal sort.Float64s' (±0 compare equal), and the scores equal a
// comparison sort's bit for bit, on random data with ties, ±0, infinities
// and sizes on both sides of radixMin, up to 2·10⁵ values.
func TestRankNormalMatchesComparisonSort(t *testing.T) {
	r := rand.New(rand.NewPCG(21, 22))
	var ws workspace
	for _, n := range []int{1, 2, 7, radixMin - 1, radixMin, radixMin + 1, 1000, 4097, 200000} {
		x := rankTestData(r, n)
		want := referenceRankNormal(x)
		got := ws.rankNormal(nil, x)
		for i := range want {
			if math.Float64bits(got[i]) != math.Float64bits(want[i]) {
				t.Fatalf("n = %d, value %d (%v): score %v, comparison sort gives %v", n, i, x[i], got[i], want[i])
			}
		}
		sorted := slices.Clone(x)
		sort.Float64s(sorted)
		for k, p := range ws.pairs {
			if p.v != sorted[k] || x[p.i] != p.v {
				t.Fatalf("n = %d, place %d: %v (from position %d), sort.Float64s has %v", n, k, p.v, p.i, sorted[k])
			}
		}
	}
}

// The folded R̂ from merging the sorted draws' two runs equals the one from
// rank-normalising |θ − median| afresh (Vehtari et al. 2021, folded R̂),
// bit for bit, on draws with ties and both zeros.
func TestFoldedRhatMatchesSortedFold(t *testing.T) {
	r := rand.New(rand.NewPCG(23, 24))
	for _, n := range []int{8, 100, 2000} {
		chains := make([][]float64, 4)
		for c := range chains {
			chains[c] = make([]float64, n)
			for i := range chains[c] {
				chains[c][i] = float64(r.IntN(7)-3) * 0.5 // ties, and 0 at the median
				if r.IntN(3) == 0 {
					chains[c][i] = r.NormFloat64()
				}
				if chains[c][i] == 0 && r.IntN(2) == 0 {
					chains[c][i] = math.Copysign(0, -1)
				}
			}
		}
		var ws workspace
		if !ws.load(chains, 2) {
			t.Fatal("load refused finite draws")
		}
		got := ws.rhat()
		med := quantile7(ws.sorted, 0.5)
		fold := make([]float64, len(ws.pool))
		for i, v := range ws.pool {
			fold[i] = math.Abs(v - med)
		}
		want := classicRhat(ws.chainsOf(referenceRankNormal(fold)))
		if math.Float64bits(got.Folded) != math.Float64bits(want) {
			t.Errorf("n = %d: folded R̂ %v, from a fresh sort %v", n, got.Folded, want)
		}
	}
}
