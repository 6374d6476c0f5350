package diag

import (
	"math"
	"math/rand/v2"
	"testing"
)

// theoryChains is the 4 × 20 test array of THEORY.md §9 (rounded values
// used exactly), chains[m][t].
var theoryChains = [][]float64{
	{0.300, -0.509, 0.698, 0.419, -1.047, -0.184, -0.579, 1.186, 0.987, -0.223, 0.680, 0.265, -1.634, -0.752, -1.137, 0.423, 0.312, -0.934, -0.002, -0.358},
	{-1.849, -0.908, -1.254, 0.330, 0.242, -0.994, -0.051, -0.398, 1.708, 1.435, 0.207, 1.101, 0.642, -1.052, -0.255, -0.695, 0.924, 0.744, -0.487, 0.414},
	{-0.135, -1.612, -0.654, -0.980, 0.709, 0.589, -0.605, 0.324, -0.050, -2.410, -1.364, -1.646, -0.059, -0.089, -1.350, -0.371, -0.686, 1.195, 1.016, -0.170},
	{1.883, 1.505, -0.007, 0.803, 0.370, 2.152, 1.920, 0.695, 1.586, 1.156, -0.690, 0.167, -0.235, 1.330, 1.204, -0.038, 0.885, 0.521, 2.782, 2.449},
}

// THEORY.md §9 test vector: ESS_mean (raw, split chains) = 18.2306079393.
func TestESSMatchesTheoryVector(t *testing.T) {
	got := ESS(SplitChains(theoryChains))
	if want := 18.2306079393; math.Abs(got-want) > 1e-8 {
		t.Fatalf("ESS of split chains = %.10f, want %.10f (THEORY.md §9)", got, want)
	}
}

func TestSplitChainsOrder(t *testing.T) {
	s := SplitChains(theoryChains)
	// THEORY.md §9: chains 0..3 first halves (t = 0..9), then second halves.
	if len(s) != 8 || len(s[0]) != 10 || s[0][0] != 0.300 || s[4][0] != 0.680 || s[3][9] != 1.156 {
		t.Fatalf("split layout wrong: %v", s)
	}
	odd := SplitChains([][]float64{{1, 2, 3, 4, 5}})
	if len(odd) != 2 || odd[0][1] != 2 || odd[1][0] != 4 {
		t.Fatalf("odd split = %v, want middle draw dropped", odd)
	}
}

// AR(1) chains x_{t+1} = ρx_t + e_t have τ = (1+ρ)/(1−ρ) (THEORY.md §11d),
// so ESS/S = (1−ρ)/(1+ρ); THEORY.md §9 reports 0.33382 for ρ = 0.5 with
// 4 × 20000 draws. The tolerance is 4 standard errors of the ratio; the
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
// equal the direct computation of §9 step 5 (reference: the step written
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
	// Direct: ρ̂_t from the definition, summed as in §9 step 5.
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
	checkAbs(t, "ESS of random walks", got, want, 1e-9*want, "direct §9 step 5")
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
