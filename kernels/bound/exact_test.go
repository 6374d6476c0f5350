package bound

// Exact distances for LMC on a Gaussian target with diagonal precision, the
// references the bounds recalled from memory are checked against: for
// Gaussian targets the true TV or W2 is computable, and the bound must
// dominate it.

import (
	"errors"
	"math"
	"strings"
	"testing"
)

// checkInputErr fails unless err is an *InputError naming input.
func checkInputErr(t *testing.T, name string, err error, input string) {
	t.Helper()
	var ie *InputError
	if !errors.As(err, &ie) {
		t.Errorf("%s: error %v, want an *InputError naming %q", name, err, input)
		return
	}
	if ie.Input != input || !strings.Contains(err.Error(), input+" = ") {
		t.Errorf("%s: error %q names %q, want %q", name, err, ie.Input, input)
	}
}

// gaussLaw is the law of one coordinate of the LMC chain: N(mean, v).
type gaussLaw struct{ mean, v float64 }

// lmcLaw returns the exact law after k steps of LMC on the coordinate with
// precision lam, started from N(x0, v0), with step h, a constant gradient
// bias b and independent Gaussian gradient noise of variance s2:
//
//	x' = x − h·(lam·x + b + η) + √(2h)·ξ,
//
// so the law stays Gaussian with
//
//	mean' = (1 − h·lam)·mean − h·b,   v' = (1 − h·lam)²·v + 2h + h²·s2
//
// (derived here: the step is linear in x and η, ξ are independent and
// Gaussian; docs/methods.md, section 4). It runs the recursion step by step.
func lmcLaw(lam, h float64, k int, x0, v0, b, s2 float64) gaussLaw {
	a := 1 - h*lam
	g := gaussLaw{x0, v0}
	for range k {
		g.mean = a*g.mean - h*b
		g.v = a*a*g.v + 2*h + h*h*s2
	}
	return g
}

// lmcVarClosed is the closed form of the variance recursion of lmcLaw with
// no noise, v_k = v∞ + a^{2k}(v₀ − v∞), v∞ = 1/(lam·(1 − h·lam/2))
// (derived here: v_k − v∞ is multiplied by a² each step).
func lmcVarClosed(lam, h float64, k int, v0 float64) float64 {
	vinf := 1 / (lam * (1 - h*lam/2))
	a := 1 - h*lam
	return vinf + math.Pow(a*a, float64(k))*(v0-vinf)
}

// w2Diag is W2 between N(μ, diag(v)) and N(0, diag(w)): the Gaussian W2
// formula ‖μ₁−μ₂‖² + tr(S₁ + S₂ − 2(S₂^{1/2}S₁S₂^{1/2})^{1/2}) (Givens and
// Shortt 1984) with commuting covariances, where (S₂^{1/2}S₁S₂^{1/2})^{1/2} =
// diag(√(v·w)), so W2² = Σ μ_i² + (√v_i − √w_i)².
func w2Diag(laws []gaussLaw, w []float64) float64 {
	var s float64
	for i, g := range laws {
		d := math.Sqrt(g.v) - math.Sqrt(w[i])
		s += g.mean*g.mean + d*d
	}
	return math.Sqrt(s)
}

// tvCentred2 is TV(N(0, diag(a)), N(0, diag(b))) in two dimensions.
//
// Derivation. TV(P, Q) = Q(A) − P(A) with A = {q > p}, and for centred
// Gaussians with diagonal covariances
//
//	A = {x : Σ_i x_i²·(1/b_i − 1/a_i) < c},   c = Σ_i log(a_i/b_i).
//
// Under Q, x_i = √b_i·z_i with z standard normal, so Q(A) = F(α) with
// α_i = 1 − b_i/a_i and F(γ) = P(γ₁z₁² + γ₂z₂² < c); under P, x_i = √a_i·z_i
// and P(A) = F(β), β_i = a_i/b_i − 1. In polar coordinates z = r(cos t,
// sin t), r² ~ χ²₂ (P(r² ≤ u) = 1 − e^{−u/2}) independent of the uniform
// angle t, so with g(t) = γ₁cos²t + γ₂sin²t
//
//	F(γ) = (1/π)∫₀^π G(g(t)) dt,   G(g) = P(r²·g < c):
//	       g > 0: 1 − e^{−c/(2g)} if c > 0, else 0;
//	       g < 0: 1 if c ≥ 0, else e^{−c/(2g)};   g = 0: 1 if c > 0.
//
// G∘g is smooth and π-periodic (at a sign change of g, e^{−c/(2g)} → 0 with
// every derivative), so the trapezoid rule on n equal angles converges
// faster than any power of 1/n; the tests check it against a closed form
// and a 2-D grid.
func tvCentred2(a, b [2]float64, n int) float64 {
	var alpha, beta [2]float64
	var c float64
	for i := range 2 {
		d := a[i] - b[i]
		alpha[i] = d / a[i]
		beta[i] = d / b[i]
		c += math.Log1p(d / b[i])
	}
	return angular(alpha, c, n) - angular(beta, c, n)
}

func angular(gam [2]float64, c float64, n int) float64 {
	var s float64
	for j := range n {
		t := math.Pi * float64(j) / float64(n)
		co, si := math.Cos(t), math.Sin(t)
		g := gam[0]*co*co + gam[1]*si*si
		switch {
		case g > 0 && c > 0:
			s += -math.Expm1(-c / (2 * g))
		case g < 0 && c >= 0:
			s++
		case g < 0 && c < 0:
			s += math.Exp(-c / (2 * g))
		case g == 0 && c > 0:
			s++
		}
	}
	return s / float64(n)
}

// tvGrid2 is TV(N(0, diag(a)), N(0, diag(b))) by the midpoint rule for
// ½∫|p − q| on an n×n grid over [−L, L]², L = 12 standard deviations of the
// widest coordinate: an independent check of tvCentred2.
func tvGrid2(a, b [2]float64, n int) float64 {
	L := 12 * math.Sqrt(max(a[0], a[1], b[0], b[1]))
	d := 2 * L / float64(n)
	na := 1 / (2 * math.Pi * math.Sqrt(a[0]*a[1]))
	nb := 1 / (2 * math.Pi * math.Sqrt(b[0]*b[1]))
	var s float64
	for i := range n {
		x := -L + (float64(i)+0.5)*d
		pa := na * math.Exp(-x*x/(2*a[0]))
		pb := nb * math.Exp(-x*x/(2*b[0]))
		for j := range n {
			y := -L + (float64(j)+0.5)*d
			s += math.Abs(pa*math.Exp(-y*y/(2*a[1])) - pb*math.Exp(-y*y/(2*b[1])))
		}
	}
	return s * d * d / 2
}

// TestTVCentredClosedForm checks tvCentred2 with one coordinate equal,
// where it is the 1-D TV between N(0, s²) and N(0, 1), s > 1: the densities
// cross at ±x*, x*² = 2s²·log s/(s² − 1), and TV = P₁(|x| < x*) −
// P_s(|x| < x*) = erf(x*/√2) − erf(x*/(s√2)) (closed form, derived here).
func TestTVCentredClosedForm(t *testing.T) {
	for _, s := range []float64{1.001, 1.1, 2, 5} {
		xs := math.Sqrt(2 * s * s * math.Log(s) / (s*s - 1))
		want := math.Erf(xs/math.Sqrt2) - math.Erf(xs/(s*math.Sqrt2))
		for _, ab := range [][2][2]float64{
			{{s * s, 0.25}, {1, 0.25}},
			{{3, s * s}, {3, 1}},
			{{1, 0.25}, {s * s, 0.25}}, // TV is symmetric
		} {
			got := tvCentred2(ab[0], ab[1], 2048)
			// Both sides are differences of O(1) numbers: absolute rounding.
			if math.Abs(got-want) > 1e-14 {
				t.Errorf("s = %v, %v: TV = %.15g, closed form %.15g", s, ab, got, want)
			}
		}
	}
}

// TestTVCentredGrid checks tvCentred2 against a brute-force 2-D grid, in
// cases where both coordinates differ, with the same and with opposite
// signs. The midpoint rule converges as O(Δ²) (with a kink along the curve
// p = q), so its error at n = 1600 is taken to be below its change from
// n = 800; the angular rule at n = 1024 and n = 4096 must agree to 1e-13.
func TestTVCentredGrid(t *testing.T) {
	for _, ab := range [][2][2]float64{
		{{1.5, 0.2}, {1, 0.25}},  // opposite signs: hyperbolic region
		{{1.3, 0.35}, {1, 0.25}}, // both wider: elliptic region
		{{0.7, 0.2}, {1, 0.25}},  // both narrower
	} {
		a, b := ab[0], ab[1]
		exact := tvCentred2(a, b, 4096)
		if d := math.Abs(exact - tvCentred2(a, b, 1024)); d > 1e-13 {
			t.Errorf("%v: angular rule not converged: n = 1024 and 4096 differ by %g", ab, d)
		}
		g1, g2 := tvGrid2(a, b, 800), tvGrid2(a, b, 1600)
		if d := math.Abs(exact - g2); d > math.Abs(g1-g2) {
			t.Errorf("%v: angular TV %.10f, grid TV %.10f (n = 1600), %.10f (n = 800)", ab, exact, g2, g1)
		}
	}
}

// TestLMCLawClosedForm checks the variance recursion against its closed
// form and its stationary value against the closed form
// v∞ = (2 + h·s²)/(λ(2 − h·λ)) (derived here, docs/methods.md section 4),
// evaluated independently: λ = 1, h = 0.1 → 1/0.95 = 1.0526315789473684;
// λ = 4, h = 0.1 → 1/3.2 = 0.3125; λ = 1, h = 0.1, s² = 4 → 2.4/1.9 =
// 1.263157894736842; λ = 4, h = 0.1, s² = 1 → 2.1/6.4 = 0.328125.
func TestLMCLawClosedForm(t *testing.T) {
	for _, c := range []struct {
		lam, h float64
		k      int
		v0     float64
	}{{1, 0.05, 100, 0}, {4, 0.05, 1000, 0.25}, {4, 0.2, 7, 1}, {1, 5.215753135864595e-05, 114873, 0.25}} {
		got := lmcLaw(c.lam, c.h, c.k, 0, c.v0, 0, 0).v
		want := lmcVarClosed(c.lam, c.h, c.k, c.v0)
		if math.Abs(got-want) > 1e-12*want {
			t.Errorf("%+v: recursion %.17g, closed form %.17g", c, got, want)
		}
	}
	for _, c := range []struct{ lam, h, s2, want float64 }{
		{1, 0.1, 0, 1.0526315789473684}, {4, 0.1, 0, 0.3125}, {1, 0.1, 4, 1.263157894736842}, {4, 0.1, 1, 0.328125},
	} {
		if got := lmcLaw(c.lam, c.h, 5000, 0, 0, 0, c.s2).v; math.Abs(got-c.want) > 1e-9*c.want {
			t.Errorf("stationary variance λ = %v, h = %v, s² = %v: %.17g, closed form %.17g", c.lam, c.h, c.s2, got, c.want)
		}
	}
}
