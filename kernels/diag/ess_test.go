package diag

import (
	"math"
	"math/rand/v2"
	"testing"
)

// workedChains is a 4 × 20 test array made for the project (an AR(0.7)
// recursion, one chain shifted by +0.8, rounded to 3 decimals and used
// exactly), chains[m][t]; the expected figures were computed for the
// project by the algorithm of Vehtari, Gelman, Simpson, Carpenter and
// Bürkner (2021).
var workedChains = [][]float64{
	{0.300, -0.509, 0.698, 0.419, -1.047, -0.184, -0.579, 1.186, 0.987, -0.223, 0.680, 0.265, -1.634, -0.752, -1.137, 0.423, 0.312, -0.934, -0.002, -0.358},
	{-1.849, -0.908, -1.254, 0.330, 0.242, -0.994, -0.051, -0.398, 1.708, 1.435, 0.207, 1.101, 0.642, -1.052, -0.255, -0.695, 0.924, 0.744, -0.487, 0.414},
	{-0.135, -1.612, -0.654, -0.980, 0.709, 0.589, -0.605, 0.324, -0.050, -2.410, -1.364, -1.646, -0.059, -0.089, -1.350, -0.371, -0.686, 1.195, 1.016, -0.170},
	{1.883, 1.505, -0.007, 0.803, 0.370, 2.152, 1.920, 0.695, 1.586, 1.156, -0.690, 0.167, -0.235, 1.330, 1.204, -0.038, 0.885, 0.521, 2.782, 2.449},
}

// Worked example (Vehtari et al. 2021 algorithm): ESS_mean (raw, split chains) = 18.2306079393.
func TestESSMatchesTheoryVector(t *testing.T) {
	got := ESS(SplitChains(workedChains))
	if want := 18.2306079393; math.Abs(got-want) > 1e-8 {
		t.Fatalf("ESS of split chains = %.10f, want %.10f (worked example)", got, want)
	}
}

func TestSplitChainsOrder(t *testing.T) {
	s := SplitChains(workedChains)
	// Split order of Vehtari et al. (2021): chains 0..3 first halves (t = 0..9), then second halves.
	if len(s) != 8 || len(s[0]) != 10 || s[0][0] != 0.300 || s[4][0] != 0.680 || s[3][9] != 1.156 {
		t.Fatalf("split layout wrong: %v", s)
	}
	odd := SplitChains([][]float64{{1, 2, 3, 4, 5}})
	if len(odd) != 2 || odd[0][1] != 2 || odd[1][0] != 4 {
		t.Fatalf("odd split = %v, want middle draw dropped", odd)
	}
}

// AR(1) chains x_{t+1} = ρx_t + e_t have τ = (1+ρ)/(1−ρ) (AR(1) closed form, derived here),
// so ESS/S = (1−ρ)/(1+ρ) (a run made for the project gave 0.33382 for
// ρ = 0.5 with 4 × 20000 draws). The tolerance is 4 standard errors of the ratio; the
// standard error of an autocorrelation-time estimate with a truncation
// window of L lags over S draws is about τ·√(2(2L+1)/S) (common practice,
// Bartlett's formula), here L ≲ 20.
func TestESSOfAR1(t *testing.T) {
	for _, rho := range []float64{0.5, 0.9, -0.3} {
		r := rand.New(rand.NewPCG(7, 11))
		chains := make([][]float64, 4)
		for m := range chains {
			c := make([]float64, 20000)
			x := r.NormFloat64() / math.Sqrt(1-rho*rho) // stationary start
			for i := range c {
				c[i] = x
				x = rho*x + r.NormFloat64()
			}
			chains[m] = c
		}
		got := ESS(SplitChains(chains)) / 80000
		want := (1 - rho) / (1 + rho)
		tol := 4 * want * math.Sqrt(2*(2*40+1)/80000.0)
		if math.Abs(got-want) > tol {
			t.Errorf("ρ = %v: ESS/S = %.5f, want %.5f ± %.5f", rho, got, want, tol)
		}
	}
}

// checkAbs fails the test if |got − want| > tol; src names the reference.
func checkAbs(t *testing.T, name string, got, want, tol float64, src string) {
	t.Helper()
	if !(math.Abs(got-want) <= tol) {
		t.Errorf("%s = %.12g, want %.12g ± %.3g (%s)", name, got, want, tol, src)
	}
}

// The FFT path of the autocovariance must equal the definition
// γ̂_t = (1/N)Σ(x_n − x̄)(x_{n+t} − x̄) at every lag (reference: the direct
// sum, autocov). Lengths cover even, odd and prime N.
func TestAutocovFFTMatchesDirect(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	for _, n := range []int{4, 5, 97, 100, 1000} {
		chains := make([][]float64, 3)
		for m := range chains {
			chains[m] = make([]float64, n)
			x := 0.0
			for i := range chains[m] {
				x = 0.8*x + r.NormFloat64()
				chains[m][i] = x + float64(m)
			}
		}
		var s acovScratch
		s.means = make([]float64, len(chains))
		for m, c := range chains {
			s.means[m] = mean(c)
		}
		s.reset(chains)
		s.allLags()
		for lag := range n {
			var want float64
			for m, c := range chains {
				want += autocov(c, s.means[m], lag)
			}
			want /= float64(len(chains))
			checkAbs(t, "FFT autocovariance", s.full[lag], want, 1e-12*(1+math.Abs(want)), "direct sum")
		}
	}
}

// A chain that needs more than directLags lags (a random walk: Geyer's
// sequence stays positive far out) goes through the FFT; its ESS must
// equal the direct computation of Vehtari et al. 2021, ESS by Geyer's initial monotone sequence (reference: the step written
// out with the direct sum at every lag).
func TestESSThroughFFTMatchesDirect(t *testing.T) {
	r := rand.New(rand.NewPCG(5, 6))
	chains := make([][]float64, 4)
	for m := range chains {
		chains[m] = make([]float64, 500)
		x := 0.0
		for i := range chains[m] {
			x += r.NormFloat64()
			chains[m][i] = x
		}
	}
	var tr geyerTrace
	var s acovScratch
	got := geyerESS(chains, &s, &tr)
	if len(tr.rho) <= directLags {
		t.Fatalf("Geyer stopped at lag %d, the test needs the FFT path (> %d)", len(tr.rho), directLags)
	}
	// Direct: ρ̂_t from the definition, summed as in Vehtari et al. 2021, ESS by Geyer's initial monotone sequence.
	n, mm := 500, 4
	means := make([]float64, mm)
	var w float64
	for m, c := range chains {
		means[m] = mean(c)
		w += variance(c, means[m])
	}
	w /= float64(mm)
	vp := w*float64(n-1)/float64(n) + variance(means, mean(means))
	rho := func(lag int) float64 {
		var g float64
		for m, c := range chains {
			g += autocov(c, means[m], lag)
		}
		return 1 - (w-g/float64(mm))/vp
	}
	tau, prev := -1.0, math.Inf(1)
	for k := 0; 2*k+1 <= n-1; k++ {
		p := rho(2*k) + rho(2*k+1)
		if k == 0 {
			p = 1 + rho(1)
		}
		if p < 0 {
			break
		}
		p = math.Min(p, prev)
		prev = p
		tau += 2 * p
	}
	want := float64(n*mm) / tau
	checkAbs(t, "ESS of random walks", got, want, 1e-9*want, "direct Vehtari et al. 2021, ESS by Geyer's initial monotone sequence")
}

func TestFFTSize(t *testing.T) {
	// Smallest 2^i·3^j·5^k ≥ n, by enumeration (reference: the definition).
	smooth := func(k int) bool {
		for _, p := range []int{2, 3, 5} {
			for k%p == 0 {
				k /= p
			}
		}
		return k == 1
	}
	for n := 1; n <= 3000; n++ {
		want := n
		for !smooth(want) {
			want++
		}
		if got := fftSize(n); got != want {
			t.Fatalf("fftSize(%d) = %d, want %d", n, got, want)
		}
	}
}

// Antithetic chains: an AR(1) with ρ < 0 has τ = (1+ρ)/(1−ρ) < 1, so its
// ESS exceeds the number of draws S. Vehtari, Gelman, Simpson, Carpenter
// and Bürkner (2021) floor τ̂ at 1/log₁₀ S, capping ESS at S·log₁₀ S.
// ρ = −0.5 (τ = 1/3, ESS = 3S, below the cap 3.9S for S = 8000) must
// match the closed form within 4 standard errors (Bartlett's formula as
// in TestESSOfAR1); ρ = −0.9 (τ = 1/19, ESS = 19S) must be capped exactly.
func TestESSOfAntitheticChainsIsCapped(t *testing.T) {
	r := rand.New(rand.NewPCG(17, 19))
	const m, n = 4, 2000
	s := float64(m * n)
	limit := s * math.Log10(s)
	got := ESS(SplitChains(ar1Chains(r, m, n, -0.5)))
	want := s * 1.5 / 0.5 // S·(1−ρ)/(1+ρ)
	tol := 4 * want * math.Sqrt(2*(2*40+1)/s)
	if want >= limit || math.Abs(got-want) > tol {
		t.Errorf("ρ = −0.5: ESS = %.1f, want %.1f ± %.1f (AR(1) closed form, below the cap %.1f)", got, want, tol, limit)
	}
	for name, e := range map[string]float64{
		"ESS":      ESS(SplitChains(ar1Chains(r, m, n, -0.9))),
		"mean ESS": MeanESS(ar1Chains(r, m, n, -0.9)),
	} {
		if math.Abs(e-limit) > 1e-9*limit {
			t.Errorf("ρ = −0.9, %s = %.3f, want the cap S·log₁₀ S = %.3f (closed form 19S = %.0f)", name, e, limit, 19*s)
		}
	}
}

// An alternating chain 1, −1, 1, … has ρ̂₁ < −1 in the multi-chain
// autocorrelation, so Geyer's first pair P̂₀ = 1 + ρ̂₁ is already negative
// and the unfloored τ̂ = −1 gave ESS = −S. With the floor it is S·log₁₀ S
// (here 100·2 = 200).
func TestESSOfAlternatingChainIsNotNegative(t *testing.T) {
	c := make([]float64, 100)
	for i := range c {
		c[i] = float64(1 - 2*(i%2))
	}
	if got := ESS([][]float64{c}); math.Abs(got-200) > 1e-9 {
		t.Errorf("ESS of an alternating chain = %v, want 200 = S·log₁₀ S", got)
	}
}

// A diverged run, draws growing geometrically to about 1e200 (squares
// overflow float64), gives finite, positive effective sample sizes from
// every figure, none above S·log₁₀ S, and a small bulk-ESS (below 1 % of
// the 4000 draws: the ranks rise steadily along every chain). The MCSE of
// the mean is finite (and huge).
func TestESSOfDivergedRun(t *testing.T) {
	r := rand.New(rand.NewPCG(23, 29))
	const m, n = 4, 1000
	growth := math.Pow(1e200, 1.0/n)
	chains := make([][]float64, m)
	for j := range chains {
		chains[j] = make([]float64, n)
		x := 1.0
		for i := range chains[j] {
			x *= growth
			chains[j][i] = x * (1 + 0.1*r.NormFloat64())
		}
	}
	s := Summarize(flatten(chains), m, 1)[0]
	limit := m * n * math.Log10(m*n)
	for name, e := range map[string]float64{
		"ESS":          ESS(SplitChains(chains)),
		"bulk-ESS":     BulkESS(chains),
		"tail-ESS":     TailESS(chains),
		"mean ESS":     MeanESS(chains),
		"Summary bulk": s.BulkESS,
		"Summary tail": s.TailESS,
		"Summary mean": s.MeanESS,
	} {
		t.Logf("%s = %.3f", name, e)
		if !(e > 0) || e > limit {
			t.Errorf("diverged run: %s = %v, want finite, positive, at most %v", name, e, limit)
		}
	}
	if b := BulkESS(chains); b > 0.01*m*n {
		t.Errorf("diverged run: bulk-ESS = %v, want below %v", b, 0.01*m*n)
	}
	if mc := MeanMCSE(chains); !(mc > 0) || math.IsInf(mc, 0) {
		t.Errorf("diverged run: MCSE of the mean = %v, want finite and positive", mc)
	}
}

// flatten lays chains[c][t] out as Summarize's chains × draws × 1 array.
func flatten(chains [][]float64) []float64 {
	var out []float64
	for _, c := range chains {
		out = append(out, c...)
	}
	return out
}

// Whatever the chains, 0 < ESS ≤ S·log₁₀ S (the floor of Vehtari et al.
// 2021): random short chains of white noise, AR(1) with ρ from −0.99 to
// 0.99, random walks and alternating patterns.
func TestESSBounds(t *testing.T) {
	r := rand.New(rand.NewPCG(31, 37))
	for trial := range 300 {
		m, n := 1+r.IntN(4), 8+r.IntN(200)
		rho := -0.99 + 1.98*r.Float64()
		chains := ar1Chains(r, m, n, rho)
		if trial%3 == 0 {
			for _, c := range chains {
				for i := range c {
					c[i] = float64(i%(2+trial%5)) + 1e-3*r.NormFloat64()
				}
			}
		}
		s := float64(m * n / 2 * 2)
		for name, e := range map[string]float64{"bulk": BulkESS(chains), "tail": TailESS(chains), "mean": MeanESS(chains)} {
			if !(e > 0) || e > s*math.Log10(s)*(1+1e-12) {
				t.Fatalf("trial %d (%d×%d, ρ %.3f): %s-ESS = %v outside (0, %v]", trial, m, n, rho, name, e, s*math.Log10(s))
			}
		}
	}
}

// The direct sums of acovScratch give, bit for bit, the mean over chains
// of autocov (the autocovariance with divisor N, written out one chain at
// a time) at every lag, for 1 to 9 chains (four summed side by side, and
// the rest).
func TestDirectAutocovMatchesOneChainAtATime(t *testing.T) {
	r := rand.New(rand.NewPCG(25, 26))
	for m := 1; m <= 9; m++ {
		chains := ar1Chains(r, m, 37, 0.8)
		var s acovScratch
		s.means = make([]float64, m)
		for j, c := range chains {
			s.means[j] = mean(c)
		}
		s.reset(chains)
		for lag := range 37 {
			var want float64
			for j, c := range chains {
				want += autocov(c, s.means[j], lag)
			}
			want /= float64(m)
			if got := s.at(lag); math.Float64bits(got) != math.Float64bits(want) {
				t.Fatalf("%d chains, lag %d: %v, one chain at a time %v", m, lag, got, want)
			}
		}
	}
}
