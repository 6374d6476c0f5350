package diag

import (
	"fmt"
	"math"
	"math/rand/v2"

	"gonum.org/v1/gonum/mat"
)

// SteinState says what a kernel Stein discrepancy assessment can claim.
type SteinState int

const (
	// SteinUndefined: too few draws, or draws or scores that are not
	// finite; no figure is a measurement.
	SteinUndefined SteinState = iota
	// SteinIndistinguishable: the bootstrap test does not reject KSD = 0
	// at the 5 % level; the draws cannot be told apart from the target at
	// this sample size (which is not a proof that they match it).
	SteinIndistinguishable
	// SteinSignificant: the bootstrap test rejects KSD = 0 at the 5 %
	// level; the draws measurably differ from the target.
	SteinSignificant
)

// String describes the state in plain words.
func (s SteinState) String() string {
	switch s {
	case SteinIndistinguishable:
		return "not distinguishable from 0 at this sample size"
	case SteinSignificant:
		return "distinguishable from 0: the draws differ from the target"
	default:
		return "undefined: too few draws or values that are not finite"
	}
}

// SteinOptions configures AssessStein.
type SteinOptions struct {
	// Kernel is the IMQ base kernel applied in standardised coordinates;
	// the zero value is c = 1, β = −½ (Gorham and Mackey 2017's choice for
	// standardised problems).
	Kernel IMQ
	// Chains describes the order of the rows. 0: the draws are
	// independent (exact draws, or a thinning far beyond the
	// autocorrelation time), in no particular order. k ≥ 1: row i is a
	// draw of chain i mod k, and the rows of each chain are in time order
	// (a StreamKSD's layout with k = rows per round); the number of rows
	// must be a multiple of k.
	Chains int
	// Replicates is the number of bootstrap replicates; 0 means 499.
	Replicates int
	// BootstrapDraws, when positive and smaller than the number of draws,
	// makes the test of KSD = 0 run on an evenly thinned subsample of
	// about that many draws (whole rounds of the chains, at least 4 of
	// them; see AssessStein); U2, SE and Upper95 still use every draw.
	// 0 tests on every draw.
	BootstrapDraws int
	// Stop, when set, is asked between rows of the Stein matrix and
	// before the bootstrap; once it reports true the assessment gives up
	// and returns the undefined result (State SteinUndefined, every
	// figure NaN). For a caller that no longer needs the figures.
	Stop func() bool
}

// SteinResult is a kernel Stein discrepancy with its uncertainty and what
// it can claim. Every figure is of the draws in standardised coordinates
// (see AssessStein), so it does not depend on the units of the parameters.
type SteinResult struct {
	N int // draws used
	// U2 is the U-statistic estimate of KSD² (unbiased for independent
	// draws; negative values are sampling noise).
	U2 float64
	// SE is the standard error of U2 (Hoeffding 1948 projection with the
	// effect of the estimated scale, inflated by the autocorrelation time
	// of the projections for chains; see AssessStein). It is the error of
	// U2 where the draws differ from the target; where they do not, U2 is
	// degenerate and PValue is the figure to read.
	SE float64
	// KSD is √max(U2, 0): the point estimate. When State is
	// SteinIndistinguishable it is no evidence of a small discrepancy; use
	// Upper95.
	KSD float64
	// Upper95 is an upper 95 % confidence bound on the KSD,
	// √(max(U2, 0) + 1.645·SE).
	Upper95 float64
	// PValue is the bootstrap p-value of the test of KSD = 0.
	PValue float64
	State  SteinState
	// Scale is the per-coordinate scale the draws were divided by (their
	// standard deviation; 1 for a coordinate that does not vary).
	Scale []float64
	// Kernel is the base kernel used in standardised coordinates, with its
	// defaults filled in.
	Kernel IMQ
	// Block is the autocorrelation time of the bootstrap multiplier: 1 for
	// independent draws.
	Block float64
	// TestDraws is the number of draws the test of KSD = 0 used: N, or
	// fewer with SteinOptions.BootstrapDraws.
	TestDraws int
}

// Below reports whether the discrepancy is below x with 95 % confidence:
// the rule for a target on the KSD. It is true only when the result is
// defined and Upper95 < x; a point estimate below x, or a test that does
// not reject 0, is not enough.
func (r SteinResult) Below(x float64) bool {
	return r.State != SteinUndefined && r.Upper95 < x
}

// steinAlpha is the level of the test of KSD = 0; steinZ the one-sided
// 95 % normal quantile of the upper bound.
const (
	steinAlpha = 0.05
	steinZ     = 1.6448536269514722
	// steinMinDraws is the fewest draws AssessStein assesses.
	steinMinDraws = 8
	// blockFactor sets the multiplier's autocorrelation time to this many
	// times the draws' estimated one (derived here, see AssessStein).
	blockFactor = 4
)

// AssessStein returns the kernel Stein discrepancy of draws (N×dim values,
// row-major) against the target whose scores ∇log π at the draws are in
// scores (same layout), with its standard error, an upper 95 % bound and
// a test of KSD = 0. rng drives the bootstrap; pass a generator with a
// fixed seed for reproducible results. Shapes that do not fit panic.
//
// Scale. Coordinate j is divided by the draws' standard deviation σ_j
// (divisor N − 1; 1 if it is 0), and the scores multiplied by it: the
// score of the standardised variable z = x/σ is σ·∇log π(x). The IMQ
// kernel with c = 1, β = −½ is the choice of Gorham and Mackey (2017) for
// standardised problems; a fixed c = 1 on the original scale would see a
// nearly flat kernel for a posterior with standard deviations of 0.15.
// The Stein identity holds in the new coordinates, so the discrepancy is
// still zero exactly when the draws have the target law. The scale is
// estimated from the same draws: the standard error accounts for it, the
// bootstrap test treats it as fixed.
//
// Estimate and standard error. With k₀ the Stein kernel of the
// standardised draws and row means ĥ_i = (1/(N−1))·Σ_{j≠i} k₀(z_i, z_j),
//
//	U = (1/(N(N−1)))·Σ_{i≠j} k₀(z_i, z_j) = mean ĥ
//	ψ_i = 2·ĥ_i + Σ_j D_j·(z_ij − z̄_j)²/2,   D_j = ∂U/∂log σ_j
//	SE² = var(ψ)/N − 2·q̄/(N(N−1)),   q_i = (1/(N−1))·Σ_{j≠i} k₀(z_i, z_j)² − ĥ_i²
//
// Hoeffding (1948): U − KSD² ≈ (2/N)·Σ_i (h₁(z_i) − KSD²) with
// h₁(z) = E k₀(z, Z), the leading term when h₁ is not constant, that is
// when the draws do not have the target law; the usual estimate of its
// variance is 4·var(ĥ)/N, SE = 2·sd(ĥ)/√N. Two refinements, derived here:
// the scale term of ψ is the delta-method effect of estimating σ from the
// same draws (σ̂_j/σ_j − 1 ≈ mean_i((z_ij − z̄_j)² − 1)/2; D_j in closed
// form, accumulated in the same pass over the pairs), and the q̄
// term removes the noise of ĥ_i about h₁(z_i) from var(ψ) and puts back
// the second-order variance 2ζ₂/(N(N−1)) of the U-statistic. For chains
// the SE is multiplied by √τ̂, τ̂ the autocorrelation time of ψ along the
// chains (Geyer 1992, at least 1). Upper95 = √(max(U, 0) + 1.645·SE):
// the one-sided normal bound, never pulled down by a negative U, which can
// only be noise since KSD² ≥ 0.
//
// Test. When the draws have the target law h₁ = 0 and U is degenerate: N·U
// tends to a weighted sum of centred χ² variables and the SE above is no
// test. The test of KSD = 0 is the wild bootstrap for degenerate U- and
// V-statistics (Chwialkowski, Strathmann and Gretton 2016; the same idea
// is used by Liu, Lee and Jordan 2016):
//
//	U*_b = (1/(N(N−1)))·Σ_{i≠j} W_i W_j k₀(z_i, z_j),   b = 1..B
//
// with multipliers W_i = ±1. For independent draws they are independent
// fair signs. For chains each chain gets its own Markov sequence of signs
// that flips with probability 1/(1 + ℓ), whose autocorrelation time is ℓ
// (Chwialkowski et al. 2016 use such a process for dependent draws), with
// ℓ = 4·τ̂_max, τ̂_max the largest autocorrelation time of the
// standardised coordinates and of ψ along the chains (Geyer 1992, at
// least 1), and at most a quarter of a chain's length: neighbouring draws
// whose kernel values are correlated then get nearly the same sign, as
// the bootstrap needs (derived here: the multiplier's lag-k correlation
// is about e^{−2k/ℓ}, 0.6 at k = τ̂_max). The p-value is
// (1 + #{b : U*_b ≥ U})/(B + 1); State is SteinSignificant when it is at
// most 0.05, else SteinIndistinguishable. Measured level: for exact
// independent draws (N = 500, dimension 2 and 10) the test rejected in
// 4 % and 6 % of 200 seeds; for 4 chains of 100 steps of an AR(1) with
// ρ = 0.5 (τ = 3) whose every draw has the target law, in 9.5 % (and in
// 39 % if the same draws are taken as independent). For chains the level
// is therefore only roughly 5 %; thinning the draws well beyond the
// autocorrelation time, as StreamKSD does on long runs, brings it back.
//
// Cost: N(N−1)/2 kernel evaluations of O(dim) and an N×N by N×B matrix
// product for the bootstrap; memory N² + 2·N·B float64 values.
func AssessStein(dim int, draws, scores []float64, opt SteinOptions, rng *rand.Rand) SteinResult {
	n := steinShape(dim, draws, scores)
	c2, beta := opt.Kernel.params()
	out := SteinResult{
		N: n, U2: math.NaN(), SE: math.NaN(), KSD: math.NaN(), Upper95: math.NaN(), PValue: math.NaN(),
		Kernel: IMQ{C: math.Sqrt(c2), Beta: beta}, Block: math.NaN(),
	}
	if opt.Chains < 0 || (opt.Chains > 0 && n%opt.Chains != 0) {
		panic(fmt.Sprintf("diag: AssessStein with %d draws in %d chains", n, opt.Chains))
	}
	reps := opt.Replicates
	if reps == 0 {
		reps = 499
	}
	if reps < 1 {
		panic(fmt.Sprintf("diag: AssessStein with %d bootstrap replicates", opt.Replicates))
	}
	if rng == nil {
		panic("diag: AssessStein needs a random generator")
	}
	if n < steinMinDraws || (opt.Chains > 0 && n/opt.Chains < 4) || !allFinite(draws) || !allFinite(scores) {
		return out
	}
	z, sz, scale := standardise(dim, draws, scores)
	out.Scale = scale
	keep, pos := testRows(n, opt.Chains, opt.BootstrapDraws)
	k, h, q, dlog := steinMatrixUntil(c2, beta, dim, z, sz, pos, opt.Stop)
	if k == nil {
		return out
	}
	u, psi := steinInfluence(dim, z, h, dlog)
	se := steinSE(psi, q)
	var acov acovScratch
	if opt.Chains > 0 {
		se *= math.Sqrt(chainTau(psi, opt.Chains, &acov))
	}
	// The test's draws: every draw, or the subsample keep.
	ut, zt, psit := u, z, psi
	if keep != nil {
		zt, psit = gatherRows(z, dim, keep), gatherRows(psi, 1, keep)
		ut = offDiagonalMean(k)
	}
	block := multiplierBlock(dim, zt, psit, opt.Chains, &acov)
	out.U2, out.SE, out.Block, out.TestDraws = u, se, block, k.SymmetricDim()
	out.KSD = math.Sqrt(math.Max(u, 0))
	out.Upper95 = math.Sqrt(math.Max(u, 0) + steinZ*se)
	if opt.Stop != nil && opt.Stop() {
		return SteinResult{N: n, U2: math.NaN(), SE: math.NaN(), KSD: math.NaN(), Upper95: math.NaN(), PValue: math.NaN(),
			Kernel: out.Kernel, Block: math.NaN()}
	}
	out.PValue = wildBootstrapP(k, ut, opt.Chains, block, reps, rng)
	out.State = SteinIndistinguishable
	if out.PValue <= steinAlpha {
		out.State = SteinSignificant
	}
	if math.IsNaN(u) || math.IsNaN(se) || math.IsNaN(out.PValue) {
		out.State = SteinUndefined
	}
	return out
}

// multiplierBlock returns the autocorrelation time of the bootstrap's
// multiplier for the test's draws z (rows of dim values) with influences
// psi: 1 for independent draws; for chains 4·τ̂_max, τ̂_max the largest
// autocorrelation time of psi and of the coordinates along the chains,
// at most a quarter of a chain's length and at least 1 (see AssessStein).
func multiplierBlock(dim int, z, psi []float64, chains int, acov *acovScratch) float64 {
	if chains == 0 {
		return 1
	}
	n := len(psi)
	tmax := chainTau(psi, chains, acov)
	col := make([]float64, n)
	for j := range dim {
		for i := range n {
			col[i] = z[i*dim+j]
		}
		tmax = math.Max(tmax, chainTau(col, chains, acov))
	}
	block := math.Min(blockFactor*tmax, float64(n/chains)/4)
	return math.Max(block, 1)
}

// testRows returns the rows of an evenly thinned subsample of about
// limit of the n draws (every t-th round of chains rows, or every t-th
// row for chains = 0; t = ⌈n/limit⌉, keeping at least 4 rounds, or
// steinMinDraws rows) and pos, each row's place in it (−1 when left
// out); both nil when every draw is tested.
func testRows(n, chains, limit int) (keep, pos []int) {
	if limit <= 0 || limit >= n {
		return nil, nil
	}
	width, units, least := 1, n, steinMinDraws
	if chains > 0 {
		width, units, least = chains, n/chains, 4
	}
	t := min((n+limit-1)/limit, units/least)
	if t <= 1 {
		return nil, nil
	}
	pos = make([]int, n)
	for i := range pos {
		pos[i] = -1
	}
	for u := 0; u < units; u += t {
		for i := u * width; i < (u+1)*width; i++ {
			pos[i] = len(keep)
			keep = append(keep, i)
		}
	}
	return keep, pos
}

// gatherRows returns the rows keep of x (rows of width values).
func gatherRows(x []float64, width int, keep []int) []float64 {
	out := make([]float64, 0, len(keep)*width)
	for _, i := range keep {
		out = append(out, x[i*width:(i+1)*width]...)
	}
	return out
}

// offDiagonalMean is the U-statistic of a Stein matrix with a zero
// diagonal: the mean of its off-diagonal entries.
func offDiagonalMean(k *mat.SymDense) float64 {
	m := k.SymmetricDim()
	raw := k.RawSymmetric()
	var sum float64
	for i := range m {
		for _, v := range raw.Data[i*raw.Stride+i+1 : i*raw.Stride+m] {
			sum += v
		}
	}
	return 2 * sum / (float64(m) * float64(m-1))
}

// Assess returns AssessStein of the kept draws, with the rows of each
// round taken as one draw of each of Chains = rows chains (the order in
// which they were added), replicates bootstrap replicates and the test on
// at most about bootstrapDraws of them (0: all; see
// SteinOptions.BootstrapDraws). The stream's kernel is applied in
// standardised coordinates.
func (st *StreamKSD) Assess(replicates, bootstrapDraws int, rng *rand.Rand) SteinResult {
	return st.AssessUntil(replicates, bootstrapDraws, rng, nil)
}

// AssessUntil is Assess giving up once stop reports true
// (SteinOptions.Stop); a nil stop never does.
func (st *StreamKSD) AssessUntil(replicates, bootstrapDraws int, rng *rand.Rand, stop func() bool) SteinResult {
	k := st.kept * st.rows * st.dim
	return AssessStein(st.dim, st.x[:k], st.s[:k], SteinOptions{Kernel: st.kern, Chains: st.rows, Replicates: replicates,
		BootstrapDraws: bootstrapDraws, Stop: stop}, rng)
}

func allFinite(x []float64) bool {
	for _, v := range x {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return false
		}
	}
	return true
}

// standardise returns z = x/σ and s_z = σ·s coordinate by coordinate, σ
// the draws' standard deviation (1 where it is 0).
func standardise(dim int, x, s []float64) (z, sz, scale []float64) {
	n := len(x) / dim
	scale = make([]float64, dim)
	col := make([]float64, n)
	for j := range dim {
		for i := range n {
			col[i] = x[i*dim+j]
		}
		sd := stdDev(col, mean(col))
		if !(sd > 0) || math.IsInf(sd, 0) {
			sd = 1
		}
		scale[j] = sd
	}
	z, sz = make([]float64, len(x)), make([]float64, len(x))
	for i, v := range x {
		z[i] = v / scale[i%dim]
		sz[i] = s[i] * scale[i%dim]
	}
	return z, sz, scale
}

// steinMatrix returns the matrix of k₀ off the diagonal (zero on it) of
// the draws the test uses (N×N when pos is nil, else M×M with row i at
// place pos[i] ≥ 0 and rows at −1 left out), and, over every draw, the
// row means ĥ_i = (1/(N−1))·Σ_{j≠i} k₀(z_i, z_j), the within-row
// variances q_i = (1/(N−1))·Σ_{j≠i} k₀(z_i, z_j)² − ĥ_i², and
// D_l = ∂U/∂log σ_l for every coordinate l (see steinScaleDerivative).
func steinMatrix(c2, beta float64, dim int, z, sz []float64, pos []int) (k *mat.SymDense, h, q, dlog []float64) {
	return steinMatrixUntil(c2, beta, dim, z, sz, pos, nil)
}

// steinMatrixUntil is steinMatrix asking stop (when not nil) before each
// row; it returns nil values once stop reports true.
func steinMatrixUntil(c2, beta float64, dim int, z, sz []float64, pos []int, stop func() bool) (k *mat.SymDense, h, q, dlog []float64) {
	n := len(z) / dim
	d := float64(dim)
	m := n
	if pos != nil {
		m = 0
		for _, p := range pos {
			if p >= 0 {
				m++
			}
		}
	}
	k = mat.NewSymDense(m, nil)
	raw := k.RawSymmetric()
	h, q, dlog = make([]float64, n), make([]float64, n), make([]float64, dim)
	for i := range n {
		if stop != nil && stop() {
			return nil, nil, nil, nil
		}
		zi, si := z[i*dim:(i+1)*dim], sz[i*dim:(i+1)*dim]
		for j := i + 1; j < n; j++ {
			zj, sj := z[j*dim:(j+1)*dim], sz[j*dim:(j+1)*dim]
			qq, a, b := pairSums(zi, si, zj, sj)
			v, dq, da := steinValuePartials(c2, beta, d, qq, a, b)
			switch {
			case pos == nil:
				raw.Data[i*raw.Stride+j] = v // upper triangle, as SymDense stores it
			case pos[i] >= 0 && pos[j] >= 0:
				raw.Data[pos[i]*raw.Stride+pos[j]] = v // pos increases with the row
			}
			h[i] += v
			h[j] += v
			q[i] += v * v
			q[j] += v * v
			for l := range dlog {
				r := zi[l] - zj[l]
				dlog[l] += -2*r*r*dq + 2*si[l]*sj[l]*da
			}
		}
	}
	for i := range h {
		h[i] /= float64(n - 1)
		q[i] = q[i]/float64(n-1) - h[i]*h[i]
	}
	for l := range dlog {
		dlog[l] *= 2 / (float64(n) * float64(n-1))
	}
	return k, h, q, dlog
}

// steinValuePartials returns steinValue's
// k₀ = S^β·(a + 2β(b − d)/S − 4β(β−1)q/S²), S = c² + q, with ∂k₀/∂q and
// ∂k₀/∂a (derived here by differentiating it), sharing one power of S.
// Scaling coordinate l of z by e^{−t} and of the scores by e^{t} changes q
// by −2r_l²·t, a by 2·s_l(x)s_l(y)·t and leaves b unchanged, which gives
// D_l.
func steinValuePartials(c2, beta, d, q, a, b float64) (v, dq, da float64) {
	s := c2 + q
	var sb float64 // S^β
	if beta == -0.5 {
		sb = 1 / math.Sqrt(s)
	} else {
		sb = math.Pow(s, beta)
	}
	inv := 1 / s
	v = sb * (a + 2*beta*inv*(b-d) - 4*beta*(beta-1)*q*inv*inv)
	g := a + 2*beta*(b-d)/s - 4*beta*(beta-1)*q/(s*s)
	dg := -2*beta*(b-d)/(s*s) - 4*beta*(beta-1)*(1/(s*s)-2*q/(s*s*s))
	return v, beta*sb/s*g + sb*dg, sb
}

// steinInfluence returns U and the estimated influence ψ_i of every draw
// on it, U − KSD² ≈ (1/N)·Σ_i (ψ_i − mean ψ) (see AssessStein):
//
//	ψ_i = 2·ĥ_i + Σ_l D_l·(z_il − z̄_l)²/2,   D_l = ∂U/∂log σ_l.
func steinInfluence(dim int, z, h, dlog []float64) (u float64, psi []float64) {
	n := len(z) / dim
	u = mean(h)
	psi = make([]float64, n)
	for i, v := range h {
		psi[i] = 2 * v
	}
	col := make([]float64, n)
	for l := range dim {
		for i := range n {
			col[i] = z[i*dim+l]
		}
		zbar := mean(col)
		for i, v := range col {
			psi[i] += dlog[l] * (v - zbar) * (v - zbar) / 2
		}
	}
	return u, psi
}

// steinSE is the standard error of U from the influences ψ and the
// within-row variances q (see AssessStein):
//
//	SE² = var(ψ)/N − 2·q̄/(N(N−1)),
//
// falling back to var(ψ)/N should the difference not be positive.
func steinSE(psi, q []float64) float64 {
	n := float64(len(psi))
	sd := stdDev(psi, mean(psi))
	v := sd*sd/n - 2*mean(q)/(n*(n-1))
	if !(v > 0) {
		v = sd * sd / n
	}
	return math.Sqrt(v)
}

// steinMoments returns U = mean(ĥ) (the U-statistic: every ordered pair
// i ≠ j once) and the Hoeffding standard error 2·sd(ĥ)/√N.
func steinMoments(h []float64) (u, se float64) {
	u = mean(h)
	return u, 2 * stdDev(h, u) / math.Sqrt(float64(len(h)))
}

// chainTau is the autocorrelation time of a series laid out as rows of
// `chains` interleaved chains (row i in chain i mod chains), N/ESS by
// Geyer's (1992) initial monotone sequence with the multi-chain
// autocorrelation of Vehtari et al. (2021), at least 1. A constant series
// counts as 1.
func chainTau(x []float64, chains int, acov *acovScratch) float64 {
	rounds := len(x) / chains
	flat := make([]float64, len(x))
	views := make([][]float64, chains)
	for c := range chains {
		views[c] = flat[c*rounds : (c+1)*rounds]
		for t := range rounds {
			views[c][t] = x[t*chains+c]
		}
	}
	ess := geyerESS(views, acov, nil)
	tau := float64(len(x)) / ess
	if !(tau > 1) {
		return 1
	}
	return tau
}

// wildBootstrapP returns the wild bootstrap p-value of U against the
// off-diagonal Stein matrix k (see AssessStein).
func wildBootstrapP(k *mat.SymDense, u float64, chains int, block float64, reps int, rng *rand.Rand) float64 {
	n := k.SymmetricDim()
	w := mat.NewDense(n, reps, nil)
	flip := 0.5
	if chains > 0 {
		flip = 1 / (1 + block)
	}
	raw := w.RawMatrix()
	for b := range reps {
		if chains == 0 {
			for i := range n {
				raw.Data[i*raw.Stride+b] = sign(rng)
			}
			continue
		}
		for c := range chains {
			v := sign(rng)
			for i := c; i < n; i += chains {
				if i != c && rng.Float64() < flip {
					v = -v
				}
				raw.Data[i*raw.Stride+b] = v
			}
		}
	}
	var kw mat.Dense
	kw.Mul(k, w)
	norm := float64(n) * float64(n-1)
	sums := make([]float64, reps)
	kwRaw := kw.RawMatrix()
	for i := range n {
		wi, ki := raw.Data[i*raw.Stride:i*raw.Stride+reps], kwRaw.Data[i*kwRaw.Stride:i*kwRaw.Stride+reps]
		for b, v := range wi {
			sums[b] += v * ki[b]
		}
	}
	exceed := 0
	for _, s := range sums {
		if s/norm >= u {
			exceed++
		}
	}
	return float64(1+exceed) / float64(reps+1)
}

func sign(rng *rand.Rand) float64 {
	if rng.Uint64()&1 == 0 {
		return -1
	}
	return 1
}
