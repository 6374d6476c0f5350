package diag

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/stat/distuv"
)

// minHalf is the fewest draws per split chain the ESS figures accept.
const minHalf = 4

// BulkESS is the ESS of the rank-normalised split chains (Vehtari et al.
// 2021). Chains need at least 8 draws each. NaN for constant input or
// input containing NaN.
func BulkESS(chains [][]float64) float64 {
	var ws workspace
	if !ws.load(chains, minHalf) {
		return math.NaN()
	}
	return geyerESS(ws.chainsOf(ws.z), &ws.acov, ws.trace)
}

// TailESS is min{ESS(1[θ ≤ q̂₀.₀₅]), ESS(1[θ ≤ q̂₀.₉₅])} on the split
// chains, q̂ the type-7 quantiles of the pooled draws (Vehtari et al. 2021, bulk- and tail-ESS).
func TailESS(chains [][]float64) float64 {
	var ws workspace
	if !ws.load(chains, minHalf) {
		return math.NaN()
	}
	return math.Min(ws.indicatorESS(quantile7(ws.sorted, 0.05)), ws.indicatorESS(quantile7(ws.sorted, 0.95)))
}

// MeanESS is the ESS of the raw split chains, the one that goes with the
// mean (Vehtari et al. 2021, MCSE of the mean): ESS(SplitChains(chains)).
func MeanESS(chains [][]float64) float64 {
	var ws workspace
	if !ws.load(chains, minHalf) {
		return math.NaN()
	}
	return geyerESS(ws.split, &ws.acov, ws.trace)
}

// MeanMCSE is the Monte Carlo standard error of the mean of all split
// draws (Vehtari et al. 2021, MCSE of the mean):
//
//	MCSE = sd(θ) / √ESS_mean,  sd over all S_tot split draws, divisor S_tot − 1.
func MeanMCSE(chains [][]float64) float64 {
	var ws workspace
	if !ws.load(chains, minHalf) {
		return math.NaN()
	}
	return stdDev(ws.pool, mean(ws.pool)) / math.Sqrt(geyerESS(ws.split, &ws.acov, nil))
}

// QuantileMCSE is the Monte Carlo standard error of the α-quantile of the
// pooled split draws (Vehtari et al. 2021, MCSE of a quantile), 0 < α < 1:
//
//	E_q = ESS(1[θ ≤ q̂_α])
//	a = Beta⁻¹(Φ(−1); E_q·α + 1, E_q·(1−α) + 1),  b = Beta⁻¹(Φ(1); same)
//	MCSE = (θ_(min(⌈b·S_tot⌉, S_tot)) − θ_(max(⌊a·S_tot⌋, 1))) / 2
//
// with θ_(i) the i-th smallest split draw.
func QuantileMCSE(chains [][]float64, alpha float64) float64 {
	checkAlpha(alpha)
	var ws workspace
	if !ws.load(chains, minHalf) {
		return math.NaN()
	}
	return ws.quantileMCSE(alpha, ws.indicatorESS(quantile7(ws.sorted, alpha))).mcse
}

func checkAlpha(alpha float64) {
	if !(alpha > 0 && alpha < 1) {
		panic(fmt.Sprintf("diag: quantile level %v outside (0, 1)", alpha))
	}
}

// indicatorESS is the ESS of 1[θ ≤ q] on the split chains.
func (ws *workspace) indicatorESS(q float64) float64 {
	ws.ind = growFloats(ws.ind, len(ws.pool))
	for i, v := range ws.pool {
		ws.ind[i] = 0
		if v <= q {
			ws.ind[i] = 1
		}
	}
	return geyerESS(ws.chainsOf(ws.ind), &ws.acov, nil)
}

// quantileParts are the intermediate values of Vehtari et al. 2021, MCSE of a quantile.
type quantileParts struct {
	eq, a, b, lo, hi, mcse float64
}

// quantileMCSE applies Vehtari et al. 2021, MCSE of a quantile given E_q.
func (ws *workspace) quantileMCSE(alpha, eq float64) quantileParts {
	p := quantileParts{eq: eq}
	if !(eq > 0) || math.IsInf(eq, 0) {
		nan := math.NaN()
		p.a, p.b, p.lo, p.hi, p.mcse = nan, nan, nan, nan, nan
		return p
	}
	beta := distuv.Beta{Alpha: eq*alpha + 1, Beta: eq*(1-alpha) + 1}
	p.a = beta.Quantile(distuv.UnitNormal.CDF(-1))
	p.b = beta.Quantile(distuv.UnitNormal.CDF(1))
	tot := len(ws.sorted)
	lo := max(int(math.Floor(p.a*float64(tot))), 1)
	hi := min(int(math.Ceil(p.b*float64(tot))), tot)
	p.lo, p.hi = ws.sorted[lo-1], ws.sorted[hi-1]
	p.mcse = (p.hi - p.lo) / 2
	return p
}

// Summary holds the Vehtari et al. (2021) figures of one scalar quantity. Every
// figure is computed on the split chains: with an odd number of draws per
// chain the middle draw of each chain is left out of all of them.
type Summary struct {
	Mean     float64 // mean of all split draws
	SD       float64 // their standard deviation, divisor S_tot − 1
	MeanESS  float64 // ESS of the raw split chains (step 7)
	MeanMCSE float64 // SD / √MeanESS (step 7)

	Q05, Median, Q95             float64 // type-7 quantiles of the pooled draws
	Q05MCSE, MedianMCSE, Q95MCSE float64 // step 8

	Rhat    RhatResult // steps 2–4
	BulkESS float64    // step 6
	TailESS float64    // step 6: min of the ESS of 1[θ ≤ Q05] and 1[θ ≤ Q95]
}

// Summarize returns the Summary of every coordinate of x, a flat
// chains × draws × dim array laid out as
//
//	x[(c·draws + t)·dim + j],  chain c, draw t, coordinate j.
//
// draws = len(x)/(chains·dim) must be at least 8. A coordinate that is
// constant, or contains NaN, gets NaN figures where they are undefined
// (every figure, for NaN).
func Summarize(x []float64, chains, dim int) []Summary {
	if chains < 1 || dim < 1 || len(x)%(chains*dim) != 0 {
		panic(fmt.Sprintf("diag: %d values do not form %d chains of draws of dimension %d", len(x), chains, dim))
	}
	draws := len(x) / (chains * dim)
	flat := make([]float64, chains*draws)
	cs := make([][]float64, chains)
	for c := range cs {
		cs[c] = flat[c*draws : (c+1)*draws]
	}
	out := make([]Summary, dim)
	var ws workspace
	for j := range out {
		for c := range chains {
			for t := range draws {
				cs[c][t] = x[(c*draws+t)*dim+j]
			}
		}
		out[j] = ws.summary(cs)
	}
	return out
}

// summary computes every figure of one coordinate.
func (ws *workspace) summary(chains [][]float64) Summary {
	if !ws.load(chains, minHalf) {
		nan := math.NaN()
		return Summary{nan, nan, nan, nan, nan, nan, nan, nan, nan, nan, nanRhat(), nan, nan}
	}
	var s Summary
	s.Mean = mean(ws.pool)
	s.SD = stdDev(ws.pool, s.Mean)
	s.MeanESS = geyerESS(ws.split, &ws.acov, nil)
	s.MeanMCSE = s.SD / math.Sqrt(s.MeanESS)
	s.BulkESS = geyerESS(ws.chainsOf(ws.z), &ws.acov, nil)
	s.Q05 = quantile7(ws.sorted, 0.05)
	s.Median = quantile7(ws.sorted, 0.5)
	s.Q95 = quantile7(ws.sorted, 0.95)
	e05 := ws.indicatorESS(s.Q05)
	e95 := ws.indicatorESS(s.Q95)
	s.TailESS = math.Min(e05, e95)
	s.Q05MCSE = ws.quantileMCSE(0.05, e05).mcse
	s.Q95MCSE = ws.quantileMCSE(0.95, e95).mcse
	s.MedianMCSE = ws.quantileMCSE(0.5, ws.indicatorESS(s.Median)).mcse
	s.Rhat = ws.rhat()
	return s
}
