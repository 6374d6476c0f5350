package bound

import (
	"math"
	"testing"
)

// relClose reports whether got is within tol·|want| of want.
func relClose(got, want, tol float64) bool { return math.Abs(got-want) <= tol*math.Abs(want) }

// roundsTo reports whether got, rounded to the digits of want (an
// absolute half unit in the last place, half), gives want.
func roundsTo(got, want, half float64) bool { return math.Abs(got-want) <= half }

// TestTVRuleVector reproduces the worked example of Dalalyan's (2017)
// rule (m = 1, M = 4, p = 2, ε = 0.1; the figures computed for this
// project with NumPy, docs/methods.md). The theorem and rule are from
// memory; TestTVBoundDominatesExact is the paired exact check.
func TestTVRuleVector(t *testing.T) {
	s := Setting{Convexity: 1, Smoothness: 4, Dim: 2}
	sc, err := TVRule(s, 0.1)
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		name      string
		got, want float64
	}{
		{"T", sc.Horizon, 5.991464547107983},
		{"h", sc.Step, 5.215753135864595e-05},
		{"T/h", sc.Horizon / sc.Step, 114872.47174160594},
	} {
		if !relClose(c.got, c.want, 1e-12) {
			t.Errorf("%s = %.17g, reference %.17g", c.name, c.got, c.want)
		}
	}
	if sc.Iterations != 114873 || sc.Penalty != 0 {
		t.Errorf("K = %d, penalty %v; reference K = 114873, no penalty", sc.Iterations, sc.Penalty)
	}
	if !(sc.Step <= 1.0/4) {
		t.Errorf("h = %v > 1/M", sc.Step)
	}
	// Each term is ε/2 = 0.05 at horizon T (the rule is built so): the
	// bound's terms at T, from the formula.
	p, m, M, T, h := 2.0, 1.0, 4.0, sc.Horizon, sc.Step
	first := 0.5 * math.Exp(p/4*math.Log(M/m)-m*T/2)
	second := math.Sqrt(p * M * M * h * T / 4)
	if !relClose(first, 0.05, 1e-12) || !relClose(second, 0.05, 1e-12) {
		t.Errorf("terms at T: %.17g, %.17g; want 0.05, 0.05", first, second)
	}
	// TVBound at K·h ≥ T: the same terms with T replaced by K·h.
	b, err := TVBound(s, 0, h, sc.Iterations)
	if err != nil {
		t.Fatal(err)
	}
	Kh := float64(sc.Iterations) * h
	if !relClose(b.Start, 0.5*math.Exp(p/4*math.Log(M/m)-m*Kh/2), 1e-12) ||
		!relClose(b.Discretisation, math.Sqrt(p*M*M*h*Kh/4), 1e-12) ||
		b.Bias != 0 || b.Noise != 0 || b.Total != b.Start+b.Discretisation {
		t.Errorf("TVBound terms %+v", b)
	}
	if !(b.Total <= 0.1) || !b.Recalled || b.Metric != TV {
		t.Errorf("bound at K = %v (recalled %v, metric %v), want ≤ 0.1", b.Total, b.Recalled, b.Metric)
	}
}

// TestTVRuleAtK checks, over a grid of settings, the two claims of TVRule's
// doc (derived there): the cap h ≤ 1/M never binds for ε < 1/2, and the
// bound after K = ⌈T/h⌉ steps is still ≤ ε (to rounding).
func TestTVRuleAtK(t *testing.T) {
	for _, m := range []float64{0.01, 0.3, 1} {
		for _, kappa := range []float64{1, 1.5, 10, 1e4} {
			for _, p := range []int{1, 2, 7, 100} {
				for _, eps := range []float64{0.4999, 0.3, 0.1, 0.01} {
					s := Setting{Convexity: m, Smoothness: kappa * m, Dim: p}
					sc, err := TVRule(s, eps)
					if err != nil {
						// Only a count beyond 2^53 may fail here.
						checkInputErr(t, "large K", err, "eps")
						continue
					}
					M := s.Smoothness
					if uncapped := eps * eps / (M * M * float64(p) * sc.Horizon); !(uncapped <= 1/M) || sc.Step != uncapped {
						t.Errorf("%+v ε = %v: rule's h = %v, 1/M = %v", s, eps, uncapped, 1/M)
					}
					b, err := TVBound(s, 0, sc.Step, sc.Iterations)
					if err != nil {
						t.Fatal(err)
					}
					if !(b.Total <= eps*(1+1e-12)) {
						t.Errorf("%+v ε = %v: bound at K = %d is %.17g", s, eps, sc.Iterations, b.Total)
					}
				}
			}
		}
	}
}

// TestTVBoundDominatesExact is the exact check paired with the TV bound
// recalled from memory (Dalalyan 2017): π = N(0, diag(1, 1/4))
// (m = 1, M = 4, p = 2), ν₀ = N(0, I/4) = N(θ*, M⁻¹I). LMC on a Gaussian
// keeps the law Gaussian and centred, with the variance recursion of
// lmcLaw, so TV(ν_K, π) is the TV between two centred product Gaussians
// (tvCentred2). At the rule's (h, K) the final variances are
// (1.00002139, 0.25002608) and TV = 2.60e-05 (computed for this project
// with NumPy by grid integration, digits given); at every (h, K) the
// bound must dominate the exact TV.
func TestTVBoundDominatesExact(t *testing.T) {
	s := Setting{Convexity: 1, Smoothness: 4, Dim: 2}
	lam := [2]float64{1, 4}
	target := [2]float64{1, 0.25}
	law := func(h float64, k int) [2]float64 {
		return [2]float64{lmcLaw(lam[0], h, k, 0, 0.25, 0, 0).v, lmcLaw(lam[1], h, k, 0, 0.25, 0, 0).v}
	}

	sc, err := TVRule(s, 0.1)
	if err != nil {
		t.Fatal(err)
	}
	v := law(sc.Step, sc.Iterations)
	if !roundsTo(v[0], 1.00002139, 5e-9) || !roundsTo(v[1], 0.25002608, 5e-9) {
		t.Errorf("final variances %.10f, %.10f; reference (1.00002139, 0.25002608)", v[0], v[1])
	}
	tv := tvCentred2(v, target, 2048)
	if !roundsTo(tv, 2.60e-05, 0.005e-05) {
		t.Errorf("TV(ν_K, π) = %.4e, reference 2.60e-05", tv)
	}
	b, err := TVBound(s, 0, sc.Step, sc.Iterations)
	if err != nil {
		t.Fatal(err)
	}
	if !(b.Total >= tv) {
		t.Errorf("bound %v < exact TV %v", b.Total, tv)
	}

	for _, c := range []struct {
		h float64
		k int
	}{
		{0.01, 0},     // the start itself: N(0, I/4) against π
		{1e-3, 5000},  // T = 5
		{2e-3, 1000},  // T = 2, start term dominant
		{1e-4, 30000}, // T = 3, small step
		{0.01, 300},   // T = 3, larger step
		{0.05, 100},   // T = 5, discretisation dominant
		{0.25, 40},    // h = 1/M, the largest step allowed
	} {
		b, err := TVBound(s, 0, c.h, c.k)
		if err != nil {
			t.Fatal(err)
		}
		tv := tvCentred2(law(c.h, c.k), target, 2048)
		if !(b.Total >= tv) || !(tv > 0) {
			t.Errorf("h = %v, K = %d: bound %v, exact TV %v", c.h, c.k, b.Total, tv)
		}
	}
}

// TestTVRuleMeetsExact runs the TV rule on other Gaussian targets
// N(0, diag(1/m, 1/M)) from N(0, I/M) and checks that the exact TV after K
// steps is below ε, which the rule recalled from memory promises (exact
// check; the variances by the closed form derived in lmcVarClosed, checked against the
// recursion in TestLMCLawClosedForm).
func TestTVRuleMeetsExact(t *testing.T) {
	for _, c := range []struct{ m, M, eps float64 }{
		{1, 4, 0.1}, {0.5, 2, 0.2}, {1, 1, 0.3}, {2, 10, 0.05}, {1, 100, 0.4},
	} {
		s := Setting{Convexity: c.m, Smoothness: c.M, Dim: 2}
		sc, err := TVRule(s, c.eps)
		if err != nil {
			t.Fatal(err)
		}
		var v, target [2]float64
		for i, lam := range []float64{c.m, c.M} {
			v[i] = lmcVarClosed(lam, sc.Step, sc.Iterations, 1/c.M)
			target[i] = 1 / lam
		}
		if tv := tvCentred2(v, target, 2048); !(tv <= c.eps) {
			t.Errorf("%+v: exact TV after K = %d steps is %v", c, sc.Iterations, tv)
		}
	}
}

// TestConvexTVRuleVector reproduces the convex rule's worked example (M = 4,
// p = 2, ε = 0.1, μ₂ = 10: λ = 0.01, T = 1198.542597441455,
// h = 6.485863342871117e-08, K ≈ 1.848e10; computed for this project with
// NumPy). The penalty part is derived here (PenaltyBias), the rule applied
// to π_λ is Dalalyan's (2017), from memory.
func TestConvexTVRuleVector(t *testing.T) {
	s := Setting{Smoothness: 4, Dim: 2, SecondMoment: 10}
	sc, err := TVRule(s, 0.1)
	if err != nil {
		t.Fatal(err)
	}
	if !relClose(sc.Penalty, 0.01, 1e-15) || !relClose(sc.Horizon, 1198.542597441455, 1e-12) ||
		!relClose(sc.Step, 6.485863342871117e-08, 1e-12) {
		t.Errorf("λ = %.17g, T = %.17g, h = %.17g", sc.Penalty, sc.Horizon, sc.Step)
	}
	if math.Abs(float64(sc.Iterations)/1.848e10-1) > 0.0005/1.848 {
		t.Errorf("K = %d, reference ≈ 1.848e10", sc.Iterations)
	}
	// The composition: the strongly convex rule on (λ, M+λ, ε/2).
	inner, err := TVRule(Setting{Convexity: sc.Penalty, Smoothness: 4 + sc.Penalty, Dim: 2}, 0.05)
	if err != nil {
		t.Fatal(err)
	}
	if inner.Step != sc.Step || inner.Horizon != sc.Horizon || inner.Iterations != sc.Iterations {
		t.Errorf("convex rule %+v, strongly convex rule on π_λ %+v", sc, inner)
	}
	b, err := TVBound(s, sc.Penalty, sc.Step, sc.Iterations)
	if err != nil {
		t.Fatal(err)
	}
	if !relClose(b.Bias, 0.05, 1e-15) || !(b.Start+b.Discretisation <= 0.05*(1+1e-12)) || !(b.Total <= 0.1*(1+1e-12)) {
		t.Errorf("convex bound at K: %+v", b)
	}
}

// TestPenaltyBiasExact is the exact check of the penalty bias bound
// (derived here, PenaltyBias): for π = N(0, diag(v)) and θ̄ = 0, π_λ = N(0,
// diag(v/(1+λv))), μ₂ = Σ v_i, and the exact TV(π, π_λ) (tvCentred2) must
// be at most λμ₂/2 = PenaltyBias. For p = 1 the intermediate bound
// E_π[1 − e^{−λθ²/2}] = 1 − (1+λv)^{−1/2} is checked too.
func TestPenaltyBiasExact(t *testing.T) {
	for _, v := range [][2]float64{{1, 1}, {1, 0.25}, {10, 3}} {
		for _, lam := range []float64{1e-4, 0.01, 0.1, 1} {
			pl := [2]float64{v[0] / (1 + lam*v[0]), v[1] / (1 + lam*v[1])}
			tv := tvCentred2(v, pl, 2048)
			if bias := PenaltyBias(lam, v[0]+v[1]); !(tv <= bias) || !(tv > 0) {
				t.Errorf("v = %v, λ = %v: exact TV %v, bound %v", v, lam, tv, bias)
			}
		}
	}
	for _, c := range []struct{ v, lam float64 }{{1, 0.01}, {4, 0.3}, {0.5, 2}} {
		// 1-D as 2-D with an equal second coordinate.
		tv := tvCentred2([2]float64{c.v, 1}, [2]float64{c.v / (1 + c.lam*c.v), 1}, 2048)
		mid := 1 - 1/math.Sqrt(1+c.lam*c.v)
		if !(tv <= mid) || !(mid <= PenaltyBias(c.lam, c.v)) {
			t.Errorf("%+v: TV %v, E[1 − e^{−λθ²/2}] %v, λμ₂/2 %v", c, tv, mid, PenaltyBias(c.lam, c.v))
		}
	}
	if w := PenaltyWeight(0.1, 10); PenaltyBias(w, 10) != 0.05 {
		t.Errorf("PenaltyWeight(0.1, 10) = %v gives bias %v, want ε/2", w, PenaltyBias(w, 10))
	}
}

// TestTVBoundErrors: steps outside the theorem, and settings it does not
// cover, are errors naming the input.
func TestTVBoundErrors(t *testing.T) {
	s := Setting{Convexity: 1, Smoothness: 4, Dim: 2}
	for _, c := range []struct {
		name   string
		s      Setting
		lambda float64
		h      float64
		k      int
		input  string
	}{
		{"h above 1/M", s, 0, 0.26, 10, "h"},
		{"h zero", s, 0, 0, 10, "h"},
		{"h NaN", s, 0, math.NaN(), 10, "h"},
		{"k negative", s, 0, 0.01, -1, "k"},
		{"lambda negative", s, -1, 0.01, 1, "lambda"},
		{"lambda without mu2", s, 0.1, 0.01, 1, "mu2"},
		{"convex without lambda", Setting{Smoothness: 4, Dim: 2, SecondMoment: 1}, 0, 0.01, 1, "m"},
		{"penalty raises M", Setting{Smoothness: 4, Dim: 2, SecondMoment: 1}, 1, 0.21, 1, "h"},
		{"noise", Setting{Convexity: 1, Smoothness: 4, Dim: 2, Noise: 1}, 0, 0.01, 1, "sigma"},
	} {
		_, err := TVBound(c.s, c.lambda, c.h, c.k)
		checkInputErr(t, c.name, err, c.input)
	}
}
