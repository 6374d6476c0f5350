package diag

import (
	"math"
	"math/rand/v2"
	"testing"
)

// Vehtari et al. 2021, ESS by Geyer's initial monotone sequence, bulk- and tail-ESS: bulk-ESS with its ρ̂ and P̂ sequences.
func TestBulkESSMatchesTheoryVector(t *testing.T) {
	var ws workspace
	ws.load(workedChains, minHalf)
	var tr geyerTrace
	got := geyerESS(ws.chainsOf(ws.z), &ws.acov, &tr)
	checkAbs(t, "bulk-ESS", got, 18.5830774451, 1e-8, workedVehtari)
	checkAbs(t, "BulkESS()", BulkESS(workedChains), 18.5830774451, 1e-8, workedVehtari)
	checkAbs(t, "τ̂", tr.tau, 4.3049920142, 1e-8, workedVehtari)
	for k, want := range []float64{1.0, 0.3513045445, 0.1780649598, 0.1472329059, 0.1443004022, 0.3747726152} {
		checkAbs(t, "ρ̂_"+string(rune('0'+k)), tr.rho[k], want, 1e-8, workedVehtari)
	}
	wantP := []float64{1.3513045445, 0.3252978656, 0.3252978656, 0.3252978656, 0.3252978656}
	if len(tr.pairs) != len(wantP) {
		t.Fatalf("P̂ has %d terms, want %d (%s)", len(tr.pairs), len(wantP), workedVehtari)
	}
	for k, want := range wantP {
		checkAbs(t, "P̂_"+string(rune('0'+k)), tr.pairs[k], want, 1e-8, workedVehtari)
	}
}

// Vehtari et al. 2021, bulk- and tail-ESS: tail quantiles and indicator ESSs.
func TestTailESSMatchesTheoryVector(t *testing.T) {
	var ws workspace
	ws.load(workedChains, minHalf)
	q05, q95 := quantile7(ws.sorted, 0.05), quantile7(ws.sorted, 0.95)
	checkAbs(t, "q̂₀.₀₅", q05, -1.6131, 1e-8, workedVehtari)
	checkAbs(t, "q̂₀.₉₅", q95, 1.88485, 1e-8, workedVehtari)
	checkAbs(t, "ESS(1[θ≤q̂₀.₀₅])", ws.indicatorESS(q05), 101.9011406844, 1e-8, workedVehtari)
	checkAbs(t, "ESS(1[θ≤q̂₀.₉₅])", ws.indicatorESS(q95), 43.2585262414, 1e-8, workedVehtari)
	checkAbs(t, "tail-ESS", TailESS(workedChains), 43.2585262414, 1e-8, workedVehtari)
}

// Vehtari et al. 2021, MCSE of the mean, MCSE of a quantile: mean, its MCSE, and the MCSE of the median.
func TestMCSEMatchesTheoryVector(t *testing.T) {
	checkAbs(t, "ESS_mean", MeanESS(workedChains), 18.2306079393, 1e-8, workedVehtari)
	checkAbs(t, "MCSE(mean)", MeanMCSE(workedChains), 0.2439975658, 1e-8, workedVehtari)
	var ws workspace
	ws.load(workedChains, minHalf)
	checkAbs(t, "mean", mean(ws.pool), 0.1225625, 1e-8, workedVehtari)
	checkAbs(t, "sd", math.Sqrt(variance(ws.pool, mean(ws.pool))), 1.0418041173, 1e-8, workedVehtari)
	med := quantile7(ws.sorted, 0.5)
	checkAbs(t, "median", med, 0.0825, 1e-8, workedVehtari)
	p := ws.quantileMCSE(0.5, ws.indicatorESS(med))
	checkAbs(t, "E_q", p.eq, 60.3840583096, 1e-8, workedVehtari)
	checkAbs(t, "a", p.a, 0.4366977520, 1e-8, workedVehtari)
	checkAbs(t, "b", p.b, 0.5633022480, 1e-8, workedVehtari)
	checkAbs(t, "θ_lo = θ_(34)", p.lo, -0.089, 1e-8, workedVehtari)
	checkAbs(t, "θ_hi = θ_(46)", p.hi, 0.312, 1e-8, workedVehtari)
	checkAbs(t, "MCSE(median)", p.mcse, 0.2005, 1e-8, workedVehtari)
	checkAbs(t, "QuantileMCSE(0.5)", QuantileMCSE(workedChains, 0.5), 0.2005, 1e-8, workedVehtari)
}

// Summarize gives the same figures as the single functions (all checked
// above against the worked example), coordinate by coordinate: coordinate 0 is
// the worked array, coordinate 1 the same array times −2 + 1, whose R̂ and
// ESSs are the same (every figure but the mean, sd and quantiles is
// invariant under a decreasing affine map, ties aside: none here) and
// whose mean, sd and quantiles map accordingly.
func TestSummarizeLayoutAndConsistency(t *testing.T) {
	const chains, draws, dim = 4, 20, 2
	x := make([]float64, chains*draws*dim)
	for c := range chains {
		for d := range draws {
			v := workedChains[c][d]
			x[(c*draws+d)*dim] = v
			x[(c*draws+d)*dim+1] = -2*v + 1
		}
	}
	s := Summarize(x, chains, dim)
	a := s[0]
	r := Rhat(workedChains)
	checkAbs(t, "Summary.Rhat.Reported", a.Rhat.Reported, r.Reported, 0, "Rhat")
	checkAbs(t, "Summary.Rhat.Classic", a.Rhat.Classic, r.Classic, 0, "Rhat")
	checkAbs(t, "Summary.BulkESS", a.BulkESS, 18.5830774451, 1e-8, workedVehtari)
	checkAbs(t, "Summary.TailESS", a.TailESS, 43.2585262414, 1e-8, workedVehtari)
	checkAbs(t, "Summary.MeanESS", a.MeanESS, 18.2306079393, 1e-8, workedVehtari)
	checkAbs(t, "Summary.MeanMCSE", a.MeanMCSE, 0.2439975658, 1e-8, workedVehtari)
	checkAbs(t, "Summary.Mean", a.Mean, 0.1225625, 1e-8, workedVehtari)
	checkAbs(t, "Summary.SD", a.SD, 1.0418041173, 1e-8, workedVehtari)
	checkAbs(t, "Summary.Q05", a.Q05, -1.6131, 1e-8, workedVehtari)
	checkAbs(t, "Summary.Median", a.Median, 0.0825, 1e-8, workedVehtari)
	checkAbs(t, "Summary.Q95", a.Q95, 1.88485, 1e-8, workedVehtari)
	checkAbs(t, "Summary.MedianMCSE", a.MedianMCSE, 0.2005, 1e-8, workedVehtari)
	checkAbs(t, "Summary.Q05MCSE", a.Q05MCSE, QuantileMCSE(workedChains, 0.05), 0, "QuantileMCSE")
	checkAbs(t, "Summary.Q95MCSE", a.Q95MCSE, QuantileMCSE(workedChains, 0.95), 0, "QuantileMCSE")

	b := s[1]
	checkAbs(t, "mapped mean", b.Mean, -2*a.Mean+1, 1e-12, "affine map")
	checkAbs(t, "mapped sd", b.SD, 2*a.SD, 1e-12, "affine map")
	checkAbs(t, "mapped median", b.Median, -2*a.Median+1, 1e-12, "affine map")
	checkAbs(t, "mapped Q05", b.Q05, -2*a.Q95+1, 1e-12, "affine map")
	checkAbs(t, "mapped R̂ classic", b.Rhat.Classic, a.Rhat.Classic, 1e-12, "affine invariance")
	checkAbs(t, "mapped R̂ bulk", b.Rhat.Bulk, a.Rhat.Bulk, 1e-12, "rank invariance")
	checkAbs(t, "mapped R̂ folded", b.Rhat.Folded, a.Rhat.Folded, 1e-12, "rank invariance")
	checkAbs(t, "mapped bulk-ESS", b.BulkESS, a.BulkESS, 1e-9, "rank invariance")
	checkAbs(t, "mapped ESS_mean", b.MeanESS, a.MeanESS, 1e-9, "affine invariance")
	checkAbs(t, "mapped MCSE(mean)", b.MeanMCSE, 2*a.MeanMCSE, 1e-12, "affine map")
}

// Constant and NaN coordinates give NaN where a figure is undefined, and a
// malformed array is a programmer error.
func TestSummarizeDegenerate(t *testing.T) {
	x := make([]float64, 2*8*2)
	for i := range x {
		if i%2 == 1 {
			x[i] = float64(i % 7)
		}
	}
	x[5] = math.NaN() // coordinate 1
	s := Summarize(x, 2, 2)
	if s[0].Mean != 0 || s[0].SD != 0 || !math.IsNaN(s[0].BulkESS) || !math.IsNaN(s[0].Rhat.Reported) || !math.IsNaN(s[0].MedianMCSE) {
		t.Errorf("constant coordinate: %+v", s[0])
	}
	if !math.IsNaN(s[1].Mean) || !math.IsNaN(s[1].TailESS) {
		t.Errorf("NaN coordinate: %+v", s[1])
	}
	defer func() {
		if recover() == nil {
			t.Error("Summarize of a ragged array did not panic")
		}
	}()
	Summarize(x[:31], 2, 2)
}

// ar1Chains returns m stationary AR(1) chains x_{t+1} = ρx_t + e_t with
// unit innovations.
func ar1Chains(r *rand.Rand, m, n int, rho float64) [][]float64 {
	chains := make([][]float64, m)
	for j := range chains {
		c := make([]float64, n)
		x := r.NormFloat64() / math.Sqrt(1-rho*rho)
		for i := range c {
			c[i] = x
			x = rho*x + r.NormFloat64()
		}
		chains[j] = c
	}
	return chains
}

// AR(1) closed form, derived here: an AR(1) chain has τ = (1+ρ)/(1−ρ), so ESS/S = 1/3 for
// ρ = 0.5 (a run made for the project gave 0.33382 with 4 × 20000 draws). Rank
// normalisation of a Gaussian process is asymptotically an affine map, so
// bulk-ESS targets the same ratio. Tolerance: 4 standard errors, the
// standard error of an autocorrelation-time estimate with truncation
// window L over S draws being τ·√(2(2L+1)/S) (common practice, Bartlett's
// formula), with L = 40 a bound on the lags Geyer's sequence uses here.
func TestBulkESSOfAR1(t *testing.T) {
	for _, rho := range []float64{0.5, 0.9} {
		r := rand.New(rand.NewPCG(31, 37))
		got := BulkESS(ar1Chains(r, 4, 20000, rho)) / 80000
		want := (1 - rho) / (1 + rho)
		tol := 4 * want * math.Sqrt(2*(2*40+1)/80000.0)
		checkAbs(t, "bulk-ESS/S of AR(1)", got, want, tol, "AR(1) closed form, derived here")
	}
}

// Exact reference for the median's indicator ESS and MCSE (derived here).
// For a stationary Gaussian AR(1) with unit innovations, Sheppard's
// orthant formula P(X ≤ 0, Y ≤ 0) = 1/4 + arcsin(r)/(2π) gives
// Cov(1[x_0 ≤ 0], 1[x_t ≤ 0]) = arcsin(ρ^t)/(2π), so the indicator's
// asymptotic variance is σ_I² = 1/4 + Σ_{t≥1} arcsin(ρ^t)/π and
// ESS_I/S = (1/4)/σ_I². The sample median's asymptotic sd is
// √(σ_I²/S)/f(0), f(0) = √((1−ρ²)/(2π)) the stationary density at 0.
// Tolerances (4σ): the ESS ratio as in TestBulkESSOfAR1; the MCSE adds in
// quadrature the relative noise of a spacing of K ≈ (b−a)·S order
// statistics, 1/√K (common practice: spacings of uniform order statistics).
func TestMedianMCSEOfAR1(t *testing.T) {
	const rho, s = 0.5, 80000
	r := rand.New(rand.NewPCG(41, 43))
	chains := ar1Chains(r, 4, 20000, rho)
	var sigI float64 = 0.25
	for k := 1; k < 200; k++ {
		sigI += math.Asin(math.Pow(rho, float64(k))) / math.Pi
	}
	var ws workspace
	ws.load(chains, minHalf)
	p := ws.quantileMCSE(0.5, ws.indicatorESS(quantile7(ws.sorted, 0.5)))
	relESS := math.Sqrt(2 * (2*40 + 1) / float64(s))
	wantRatio := 0.25 / sigI
	checkAbs(t, "ESS(1[θ≤median])/S", p.eq/s, wantRatio, 4*relESS*wantRatio, "Sheppard's formula")
	wantMCSE := math.Sqrt(sigI/s) / math.Sqrt((1-rho*rho)/(2*math.Pi))
	k := (p.b - p.a) * s
	rel := math.Hypot(relESS/2, 1/math.Sqrt(k))
	checkAbs(t, "MCSE(median)", p.mcse, wantMCSE, 4*rel*wantMCSE, "Sheppard's formula, asymptotic sd of the median")
	checkAbs(t, "QuantileMCSE(0.5)", QuantileMCSE(chains, 0.5), p.mcse, 0, "same figure")
}
