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
