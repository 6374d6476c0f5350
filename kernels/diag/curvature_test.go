package diag

import (
	"math"
	"math/rand/v2"
	"strings"
	"testing"
)

// quadScore returns the score ∇log π(x) = −Hx of the potential f = ½xᵀHx
// with H diagonal.
func quadScore(h []float64) func(x []float64) []float64 {
	return func(x []float64) []float64 {
		s := make([]float64, len(x))
		for i := range x {
			s[i] = -h[i] * x[i]
		}
		return s
	}
}

// softplusScore is the score of f(x) = Σ log(1 + e^{x_i}) + ½‖x‖²
// (standard convex analysis, derived here): ∇f_i = σ(x_i) + x_i, ∇²f = diag(σ(1 − σ) + 1), so
// m = 1, M = 1.25.
func softplusScore(x []float64) []float64 {
	s := make([]float64, len(x))
	for i, v := range x {
		s[i] = -(1/(1+math.Exp(-v)) + v)
	}
	return s
}

// Worked test vectors: quadratic H = diag(1, 4) and the softplus
// potential.
func TestSecantRatiosTheoryVectors(t *testing.T) {
	quad := quadScore([]float64{1, 4})
	for _, c := range []struct {
		score         func([]float64) []float64
		x, y          []float64
		in, norm, coc float64
	}{
		{quad, []float64{1, 0}, []float64{0, 0}, 1, 1, 1},
		{quad, []float64{1, 1}, []float64{0, 0}, 2.5, 2.9154759474, 3.4},
		{quad, []float64{0.3, -0.2}, []float64{-0.1, 0.5}, 3.2615384615, 3.5082320772, 3.7735849057},
		{softplusScore, []float64{0.5, -1, 2}, []float64{0, 0.3, 1}, 1.2068433976, 1.2075426224, 1.2082422522},
	} {
		r := SecantRatios(c.x, c.y, c.score(c.x), c.score(c.y))
		if !near(r.In, c.in, 1e-8) || !near(r.Norm, c.norm, 1e-8) || !near(r.Coc, c.coc, 1e-8) {
			t.Errorf("x = %v, y = %v: ratios %+v, want (%.10f, %.10f, %.10f) (standard convex analysis, derived here)", c.x, c.y, r, c.in, c.norm, c.coc)
		}
	}
}

// The inequalities of standard convex analysis, derived here (derived here): m ≤ r_in ≤ r_norm ≤ r_coc ≤ M
// for every pair on a potential with m·I ⪯ ∇²f ⪯ M·I, checked on random
// pairs for the softplus potential (m = 1, M = 1.25) and an anisotropic
// quadratic (m = 0.3, M = 7); plus the symmetry r(x, y) = r(y, x).
func TestSecantRatiosBetweenCurvatureBounds(t *testing.T) {
	r := rand.New(rand.NewPCG(9, 10))
	hs := []float64{0.3, 1, 2, 7}
	for _, c := range []struct {
		score func([]float64) []float64
		m, M  float64
		p     int
	}{{softplusScore, 1, 1.25, 3}, {quadScore(hs), 0.3, 7, 4}} {
		for range 1000 {
			x, y := make([]float64, c.p), make([]float64, c.p)
			for i := range x {
				x[i], y[i] = 3*r.NormFloat64(), 3*r.NormFloat64()
			}
			s := SecantRatios(x, y, c.score(x), c.score(y))
			const tol = 1e-12
			if !(c.m-tol <= s.In && s.In <= s.Norm+tol && s.Norm <= s.Coc+tol && s.Coc <= c.M+tol) {
				t.Fatalf("x = %v, y = %v: ratios %+v outside [%v, %v] or out of order", x, y, s, c.m, c.M)
			}
			if b := SecantRatios(y, x, c.score(y), c.score(x)); !near(b.In, s.In, 1e-12) || !near(b.Coc, s.Coc, 1e-12) {
				t.Fatalf("ratios not symmetric: %+v vs %+v", s, b)
			}
		}
	}
}

// The accumulated certificate (standard convex analysis, derived here): pairs along the eigenvectors
// of H = diag(1, …, 10) make it exact (M ≥ 10, m ≤ 1); random pairs keep
// M ≥ floor and m ≤ ceiling; a pair x = y is skipped; an indefinite
// quadratic is flagged non-convex.
func TestCurvatureBoundsCertificate(t *testing.T) {
	h := make([]float64, 10)
	for i := range h {
		h[i] = float64(i + 1)
	}
	score := quadScore(h)
	var c CurvatureBounds
	if !math.IsNaN(c.SmoothnessFloor()) || !math.IsNaN(c.ConvexityCeiling()) || c.NonConvex() {
		t.Fatalf("zero CurvatureBounds: floor %v, ceiling %v, non-convex %v", c.SmoothnessFloor(), c.ConvexityCeiling(), c.NonConvex())
	}
	r := rand.New(rand.NewPCG(5, 6))
	for range 200 {
		x, y := make([]float64, 10), make([]float64, 10)
		for i := range x {
			x[i], y[i] = r.NormFloat64(), r.NormFloat64()
		}
		c.Add(x, y, score(x), score(y))
	}
	if f, g := c.SmoothnessFloor(), c.ConvexityCeiling(); !(f <= 10 && f > 1 && g >= 1 && g < 10) || c.NonConvex() || c.Pairs() != 200 {
		t.Errorf("random pairs: floor %v (want ≤ M = 10), ceiling %v (want ≥ m = 1), non-convex %v, pairs %d", f, g, c.NonConvex(), c.Pairs())
	}
	// Convex: the floor is the co-coercivity ratio, at least r_norm
	// (Cauchy–Schwarz), and both stay below M.
	if f, l := c.SmoothnessFloor(), c.LipschitzFloor(); !(l <= f && f <= 10) {
		t.Errorf("random pairs: co-coercivity floor %v, Lipschitz floor %v, want r_norm ≤ r_coc ≤ 10", f, l)
	}
	e := func(i int, a float64) []float64 { v := make([]float64, 10); v[i] = a; return v }
	c.Add(e(9, 1.5), e(9, -0.5), score(e(9, 1.5)), score(e(9, -0.5)))
	c.Add(e(0, 2), e(0, 0), score(e(0, 2)), score(e(0, 0)))
	x := e(3, 1)
	c.Add(x, x, score(x), score(x))
	if !near(c.SmoothnessFloor(), 10, 1e-12) || !near(c.ConvexityCeiling(), 1, 1e-12) || c.Pairs() != 202 || c.Skipped() != 1 {
		t.Errorf("eigenvector pairs: floor %v, ceiling %v, pairs %d, skipped %d; want 10, 1, 202, 1", c.SmoothnessFloor(), c.ConvexityCeiling(), c.Pairs(), c.Skipped())
	}

	// f = ½(x₁² − x₂²): a pair along x₂ has r_in = −1 and no r_coc.
	var nc CurvatureBounds
	ind := quadScore([]float64{1, -1})
	got := nc.Add([]float64{0, 1}, []float64{0, 0}, ind([]float64{0, 1}), ind([]float64{0, 0}))
	// Non-convex: the floor is the largest r_norm, here ‖y_g‖/‖s‖ = 1, the
	// Lipschitz constant of this gradient.
	if got.In != -1 || !math.IsNaN(got.Coc) || !nc.NonConvex() || nc.ConvexityCeiling() != -1 || nc.SmoothnessFloor() != 1 || nc.LipschitzFloor() != 1 {
		t.Errorf("indefinite pair: %+v, non-convex %v, ceiling %v, floor %v", got, nc.NonConvex(), nc.ConvexityCeiling(), nc.SmoothnessFloor())
	}
	if nan := nc.Add([]float64{0, 1}, []float64{0, 0}, []float64{math.NaN(), 0}, []float64{0, 0}); !math.IsNaN(nan.In) || nc.Skipped() != 1 || nc.Pairs() != 1 {
		t.Errorf("non-finite gradient: %+v, skipped %d, pairs %d", nan, nc.Skipped(), nc.Pairs())
	}
}

// Why random pairs say little about M (derived here): along isotropic
// random directions u the Rayleigh quotient uᵀHu/‖u‖² has mean tr(H)/p
// exactly (by symmetry). H = diag(1, …, 10), 2000 directions (a run
// computed for the project with other draws gave mean 5.4939, max
// 9.0845): mean within 4 standard errors of 5.5, maximum below 10.
func TestSecantRatiosRandomDirectionsConcentrate(t *testing.T) {
	h := make([]float64, 10)
	for i := range h {
		h[i] = float64(i + 1)
	}
	score := quadScore(h)
	r := rand.New(rand.NewPCG(12, 13))
	var c CurvatureBounds
	var sum, sum2 float64
	const n = 2000
	zero := make([]float64, 10)
	for range n {
		x := make([]float64, 10)
		for i := range x {
			x[i] = r.NormFloat64()
		}
		v := c.Add(x, zero, score(x), score(zero)).In
		sum += v
		sum2 += v * v
	}
	m := sum / n
	se := math.Sqrt((sum2/n - m*m) / (n - 1))
	if math.Abs(m-5.5) > 4*se {
		t.Errorf("mean r_in over random directions = %.4f ± %.4f, want tr(H)/p = 5.5", m, se)
	}
	if !(c.SmoothnessFloor() < 10) {
		t.Errorf("largest r_coc over random directions = %v, want < λ_max = 10", c.SmoothnessFloor())
	}
}

// Worked noisy-gradient example, derived here: H = diag(1, 4), x = (1, 1),
// y = (0.9, 1), independent noise of standard deviation 0.5 per coordinate
// on each gradient: E‖y_g,noisy‖² = ‖y_g‖² + 2pσ² = 0.01 + 1 = 1.01, so
// r_norm ≈ √1.01/0.1 = 10.05 instead of 1. Monte Carlo over 20000 noise
// draws, 4 standard errors. With the same noise at both points (common
// random numbers) additive noise cancels exactly and r_norm = 1.
func TestSecantRatiosNoiseInflation(t *testing.T) {
	score := quadScore([]float64{1, 4})
	x, y := []float64{1, 1}, []float64{0.9, 1}
	gx, gy := score(x), score(y)
	r := rand.New(rand.NewPCG(14, 15))
	const n, sigma = 20000, 0.5
	var sum, sum2 float64
	nx, ny := make([]float64, 2), make([]float64, 2)
	for range n {
		for i := range nx {
			nx[i] = gx[i] + sigma*r.NormFloat64()
			ny[i] = gy[i] + sigma*r.NormFloat64()
		}
		v := SecantRatios(x, y, nx, ny).Norm * 0.1 // ‖y_g,noisy‖; ‖s‖ = 0.1
		sum += v * v
		sum2 += v * v * v * v
	}
	m := sum / n
	se := math.Sqrt((sum2/n - m*m) / (n - 1))
	if math.Abs(m-1.01) > 4*se {
		t.Errorf("E‖y_g,noisy‖² = %.4f ± %.4f, want 1.01 (standard convex analysis, derived here)", m, se)
	}
	// Delta method: the standard error of √m is se/(2√m).
	if rn, want := math.Sqrt(m)/0.1, math.Sqrt(1.01)/0.1; math.Abs(rn-want) > 4*se/(2*math.Sqrt(m))/0.1 {
		t.Errorf("√E‖y_g,noisy‖²/‖s‖ = %.4f, want √1.01/0.1 = %.4f ≈ 10.05 (standard convex analysis, derived here)", rn, want)
	}
	for i := range nx {
		e := sigma * r.NormFloat64()
		nx[i], ny[i] = gx[i]+e, gy[i]+e
	}
	if got := SecantRatios(x, y, nx, ny).Norm; !near(got, 1, 1e-12) {
		t.Errorf("r_norm with common noise = %v, want 1", got)
	}
}

// Local smoothness estimates along gradient descent with the
// Malitsky–Mishchenko step rule (Malitsky and Mishchenko 2020, rule from memory):
// λ_k = min{√(1 + θ_{k−1})λ_{k−1}, ‖Δx‖/(2‖Δg‖)}, θ_k = λ_k/λ_{k−1}, on
// f = ½xᵀdiag(1, 4)x from x₀ = (1, 1), λ₀ = 1e-3, θ₀ = ∞. Each
// L_k = ‖Δg‖/‖Δx‖ is our r_norm of consecutive iterates. Paired with the
// exact check (derived here): every L_k lies in [m, M] = [1, 4] and r_in ≤
// r_norm ≤ r_coc.
func TestSecantRatiosLocalSmoothnessSequence(t *testing.T) {
	score := quadScore([]float64{1, 4})
	wantL := []float64{3.8881418517, 3.8874977289, 3.6707483557, 3.1747774142, 2.3407929691}
	wantStep := []float64{0.1285961313, 0.1286174385, 0.1362120068, 0.1574913560, 0.2136028289}
	grad := func(x []float64) []float64 { // ∇f = −score
		g := score(x)
		for i := range g {
			g[i] = -g[i]
		}
		return g
	}
	prevX := []float64{1, 1}
	lam, theta := 1e-3, math.Inf(1)
	g := grad(prevX)
	x := []float64{prevX[0] - lam*g[0], prevX[1] - lam*g[1]}
	for k := range wantL {
		r := SecantRatios(x, prevX, score(x), score(prevX))
		step := math.Min(math.Sqrt(1+theta)*lam, 1/(2*r.Norm))
		if !near(r.Norm, wantL[k], 1e-8) || !near(step, wantStep[k], 1e-8) {
			t.Errorf("k = %d: L = %.10f, step %.10f; want %.10f, %.10f (Malitsky and Mishchenko 2020, from memory)", k+1, r.Norm, step, wantL[k], wantStep[k])
		}
		if !(1 <= r.In && r.In <= r.Norm && r.Norm <= r.Coc && r.Coc <= 4) {
			t.Errorf("k = %d: ratios %+v not within [1, 4] in order (standard convex analysis, derived here)", k+1, r)
		}
		theta, lam = step/lam, step
		g = grad(x)
		prevX, x = x, []float64{x[0] - lam*g[0], x[1] - lam*g[1]}
	}
}

// runProbe drives a probe with the given score for iters iterations and
// returns the estimate after each.
func runProbe(t *testing.T, pr *CurvatureProbe, score func([]float64) []float64, iters int) []float64 {
	t.Helper()
	var est []float64
	for pr.Iterations() < iters {
		before := pr.Iterations()
		p := append([]float64(nil), pr.Next()...)
		if q := pr.Next(); q[0] != p[0] {
			t.Fatal("Next changed before Tell")
		}
		if err := pr.Tell(score(p)); err != nil {
			t.Fatal(err)
		}
		if pr.Iterations() > before {
			est = append(est, pr.Estimate())
		}
	}
	return est
}

// Worked power-iteration vector: H = diag(1, …, 10), θ = 0,
// v₀ = (1, …, 1)/√10, ε = 1e-4; and at every iteration the exact-arithmetic
// value Σλ^{2k−1}/Σλ^{2k−2} of power iteration from v₀ (closed form for a
// diagonal H, derived here; the forward difference is exact for a quadratic up to
// rounding, u·‖H‖/ε ≈ 1e-11).
func TestCurvatureProbeLargestTheoryVector(t *testing.T) {
	h := make([]float64, 10)
	for i := range h {
		h[i] = float64(i + 1)
	}
	score := quadScore(h)
	theta := make([]float64, 10)
	pr := NewLargestCurvature(theta, score(theta), nil, 1e-4)
	if !math.IsNaN(pr.Estimate()) {
		t.Errorf("estimate before any iteration = %v, want NaN", pr.Estimate())
	}
	est := runProbe(t, pr, score, 30)
	for _, c := range []struct {
		k    int
		want float64
	}{{1, 5.5}, {5, 9.3858729722}, {10, 9.8363588796}, {20, 9.9816709981}, {30, 9.9977816035}} {
		if !near(est[c.k-1], c.want, 1e-8) {
			t.Errorf("after %d iterations: %.10f, want %.10f (standard convex analysis, derived here)", c.k, est[c.k-1], c.want)
		}
	}
	for k := 1; k <= 30; k++ {
		var num, den float64
		for _, l := range h {
			w := math.Pow(l/10, float64(2*k-2)) // scaled by the largest term
			num += l * w
			den += w
		}
		if !near(est[k-1], num/den, 1e-9) {
			t.Errorf("iteration %d: %.12f, exact power iteration %.12f", k, est[k-1], num/den)
		}
	}
	if pr.Evaluations() != 30 {
		t.Errorf("30 iterations with the base gradient given cost %d evaluations, want 30", pr.Evaluations())
	}
}

// Smallest eigenvalue by power iteration on σI − H (standard convex analysis, derived here), σ = the
// 30-iteration M̂ × 1.05: estimates vᵀHv equal the exact-arithmetic
// Σλ(σ−λ)^{2k−2}/Σ(σ−λ)^{2k−2} (derived here) and approach m = 1 from above. The
// probe is built without the base gradient, so it asks for θ first and
// counts one more evaluation.
func TestCurvatureProbeSmallest(t *testing.T) {
	h := make([]float64, 10)
	for i := range h {
		h[i] = float64(i + 1)
	}
	score := quadScore(h)
	theta := make([]float64, 10)
	big := runProbe(t, NewLargestCurvature(theta, score(theta), nil, 1e-4), score, 30)
	sigma := 1.05 * big[29]
	pr := NewSmallestCurvature(theta, nil, nil, 1e-4, sigma)
	if p := pr.Next(); p[0] != 0 || p[9] != 0 {
		t.Fatalf("first point %v, want θ itself", p)
	}
	est := runProbe(t, pr, score, 200)
	for k := 1; k <= 200; k++ {
		var num, den float64
		for _, l := range h {
			w := math.Pow((sigma-l)/(sigma-1), float64(2*k-2)) // scaled by the largest term
			num += l * w
			den += w
		}
		if !near(est[k-1], num/den, 1e-9) {
			t.Fatalf("iteration %d: %.12f, exact %.12f", k, est[k-1], num/den)
		}
	}
	if est[199] < 1-1e-12 || est[199] > 1+1e-6 { // a Rayleigh quotient never falls below λ_min
		t.Errorf("after 200 iterations m̂ = %.10f, want 1 from above", est[199])
	}
	if pr.Evaluations() != 201 {
		t.Errorf("evaluations = %d, want 201 (θ, then one per iteration)", pr.Evaluations())
	}
}

// Softplus potential at θ = (0, 1.5, 2, −3): ∇²f = diag(σ(θ_i)(1−σ(θ_i)) + 1)
// exactly, so λ_max = 1.25 (θ_i = 0) and the next eigenvalue is 1.1491
// (θ_i = 1.5). The forward difference errs by (ε/2)·f”'(ξ)·v_i² per
// coordinate with |f”'| = |σ(1−σ)(1−2σ)| < 0.0963, a vector of norm at
// most 0.0482·ε ≈ 4.8e-6 for a unit v; at the fixed point of the iteration
// the estimate is therefore within about that of an eigenvalue of ∇²f
// (Weyl), and 200 iterations leave a convergence error of order
// (1.1491/1.25)^{400} ≈ 1e-15. Tolerance 1e-5.
func TestCurvatureProbeSoftplus(t *testing.T) {
	theta := []float64{0, 1.5, 2, -3}
	est := runProbe(t, NewLargestCurvature(theta, softplusScore(theta), []float64{1, 1, 1, 1}, 1e-4), softplusScore, 200)
	if got := est[len(est)-1]; math.Abs(got-1.25) > 1e-5 {
		t.Errorf("softplus M̂ = %.10f, want 1.25 within the forward-difference error 1e-5", got)
	}
}

func TestCurvatureProbeErrorsAndPanics(t *testing.T) {
	pr := NewLargestCurvature([]float64{0, 0}, []float64{0, 0}, []float64{1, 0}, 1e-4)
	if err := pr.Tell([]float64{math.Inf(1), 0}); err == nil || pr.Iterations() != 0 || pr.Evaluations() != 1 {
		t.Errorf("non-finite gradient: err %v, iterations %d, evaluations %d", err, pr.Iterations(), pr.Evaluations())
	}
	// A flat potential: Hv = 0.
	if err := pr.Tell([]float64{0, 0}); err == nil || pr.Iterations() != 0 {
		t.Errorf("vanishing direction: err %v, iterations %d", err, pr.Iterations())
	}
	for name, f := range map[string]func(){
		"zero v0": func() { NewLargestCurvature([]float64{0, 0}, nil, []float64{0, 0}, 1e-4) },
		"bad eps": func() { NewLargestCurvature([]float64{0, 0}, nil, nil, 0) },
		"lengths": func() { NewLargestCurvature([]float64{0, 0}, []float64{1}, nil, 1e-4) },
		"shift":   func() { NewSmallestCurvature([]float64{0}, nil, nil, 1e-4, math.NaN()) },
		"tell":    func() { pr.Tell([]float64{1}) },
		"secant":  func() { SecantRatios([]float64{0}, []float64{0, 1}, []float64{0}, []float64{0}) },
		"empty":   func() { NewLargestCurvature(nil, nil, nil, 1e-4) },
	} {
		if msg := panicMessage(f); !strings.HasPrefix(msg, "diag: ") {
			t.Errorf("%s: panic %q, want a diag: panic", name, msg)
		}
	}
}

func BenchmarkCurvatureBoundsAdd(b *testing.B) {
	const p = 10
	r := rand.New(rand.NewPCG(1, 2))
	x, y, gx, gy := make([]float64, p), make([]float64, p), make([]float64, p), make([]float64, p)
	for i := range x {
		x[i], y[i], gx[i], gy[i] = r.NormFloat64(), r.NormFloat64(), r.NormFloat64(), r.NormFloat64()
	}
	var c CurvatureBounds
	b.ReportAllocs()
	for b.Loop() {
		c.Add(x, y, gx, gy)
	}
}

func BenchmarkCurvatureProbeTell(b *testing.B) {
	const p = 10
	g := make([]float64, p)
	for i := range g {
		g[i] = float64(i)
	}
	pr := NewLargestCurvature(make([]float64, p), make([]float64, p), nil, 1e-4)
	b.ReportAllocs()
	for b.Loop() {
		pr.Next()
		if err := pr.Tell(g); err != nil {
			b.Fatal(err)
		}
	}
}

// mixtureScore is ∇log π for the equal mixture of N(a, I) and N(−a, I):
// log π(x) = −‖x‖²/2 + log cosh(aᵀx) + const, so
//
//	∇log π(x) = −x + a·tanh(aᵀx),   ∇²(−log π)(x) = I − a aᵀ·sech²(aᵀx).
//
// The Hessian of the potential has eigenvalue 1 on a's orthogonal
// complement and 1 − ‖a‖²·sech²(aᵀx) ∈ [1 − ‖a‖², 1] along a (sech² takes
// every value in (0, 1], 1 at aᵀx = 0), so the gradient's Lipschitz
// constant is max(1, ‖a‖² − 1) (derived here): 15 for a = 2·1 in 4-D.
func mixtureScore(a []float64) func(x []float64) []float64 {
	return func(x []float64) []float64 {
		th := math.Tanh(dot(a, x))
		g := make([]float64, len(x))
		for i := range x {
			g[i] = -x[i] + a[i]*th
		}
		return g
	}
}

// On a non-convex target, the equal mixture of N(±2·1, I) in 4-D, pairs of
// nearby points (x from the mixture, y = x + N(0, 0.5²I)) and of
// independent mixture draws show non-convexity, and the reported floor on
// M never exceeds the true Lipschitz constant 15 (see mixtureScore), while
// the co-coercivity ratio of some pairs with ⟨y_g, s⟩ > 0 does (the
// certificate the floor used to report).
func TestCurvatureBoundsNonConvexMixture(t *testing.T) {
	const p, lip = 4, 15.0
	a := []float64{2, 2, 2, 2}
	score := mixtureScore(a)
	r := rand.New(rand.NewPCG(61, 67))
	draw := func() []float64 {
		x := make([]float64, p)
		sign := 1.0
		if r.IntN(2) == 0 {
			sign = -1
		}
		for i := range x {
			x[i] = sign*a[i] + r.NormFloat64()
		}
		return x
	}
	var c CurvatureBounds
	var worstCoc float64
	for i := range 4000 {
		x := draw()
		var y []float64
		if i%2 == 0 {
			y = make([]float64, p)
			for j := range y {
				y[j] = x[j] + 0.5*r.NormFloat64()
			}
		} else {
			y = draw()
		}
		sec := c.Add(x, y, score(x), score(y))
		if sec.In > 0 {
			worstCoc = math.Max(worstCoc, sec.Coc)
		}
		// Every ratio a pair can certify is at most the Lipschitz
		// constant; rounding of ‖y_g‖/‖s‖ aside.
		if sec.Norm > lip*(1+1e-12) {
			t.Fatalf("pair %d: r_norm = %v above the Lipschitz constant %v", i, sec.Norm, lip)
		}
	}
	t.Logf("floor %.4f, largest r_coc with r_in > 0 %.2f, ceiling %.3f", c.SmoothnessFloor(), worstCoc, c.ConvexityCeiling())
	if !c.NonConvex() || !(c.ConvexityCeiling() < 0) {
		t.Errorf("mixture: non-convex %v, ceiling %v; want non-convexity seen", c.NonConvex(), c.ConvexityCeiling())
	}
	if f := c.SmoothnessFloor(); !(f <= lip*(1+1e-12)) || f != c.LipschitzFloor() {
		t.Errorf("mixture: floor on M = %v (Lipschitz floor %v), want the largest r_norm, at most %v", f, c.LipschitzFloor(), lip)
	}
	if !(worstCoc > lip) {
		t.Errorf("mixture: largest co-coercivity ratio %v; the test needs a pair above %v to show the floor does not use it", worstCoc, lip)
	}
}
