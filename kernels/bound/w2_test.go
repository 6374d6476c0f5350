package bound

import (
	"math"
	"testing"
)

// The Gaussian test target of the W2 checks: N(0, diag(1, 1/4)),
// precisions (1, 4), so m = 1, M = 4, p = 2.
//
// Its reference figures (bound and exact W2 for several (h, K), the rule's
// step and count) were computed for this project with NumPy and SciPy in
// double precision, the bound from the formula of Dalalyan and Karagulyan
// (2019) as recalled from memory, the exact W2 from the chain's Gaussian
// law; docs/methods.md lists them.
var (
	w2Prec   = []float64{1, 4}
	w2Target = []float64{1, 0.25}
)

// exactW2 is the exact W2(ν_K, π) of LMC on the W2 test target from the point
// x0 (the same in both coordinates), with gradient bias b per coordinate
// and Gaussian gradient noise of variance s2 per coordinate (lmcLaw,
// w2Diag).
func exactW2(h float64, k int, x0 float64, b []float64, s2 float64) float64 {
	laws := make([]gaussLaw, 2)
	for i, lam := range w2Prec {
		var bi float64
		if b != nil {
			bi = b[i]
		}
		laws[i] = lmcLaw(lam, h, k, x0, 0, bi, s2)
	}
	return w2Diag(laws, w2Target)
}

// TestW2TableVectors reproduces the reference table (start δ at (1, 1),
// W2(ν₀, π)² = 1 + 1 + 1 + 1/4, W2 = 1.8027756377): the bound of Dalalyan and
// Karagulyan (2019) (from memory) to the digits given, the exact W2 of the
// chain's Gaussian law (computed here in closed form; it must match the
// table's "exact" column), and bound ≥ exact in every row.
func TestW2TableVectors(t *testing.T) {
	w0 := w2Diag([]gaussLaw{{1, 0}, {1, 0}}, w2Target)
	if !relClose(w0, 1.8027756377, 1e-10) {
		t.Fatalf("W2(δ_(1,1), π) = %.12f, reference 1.8027756377", w0)
	}
	exactGrad := Setting{Convexity: 1, Smoothness: 4, Dim: 2, StartDistance: w0}
	noisy := exactGrad
	noisy.Bias, noisy.Noise = 0.1, 2 // b = (0.1, −0.1): δ = ‖b‖/√p = 0.1; s = σ = 2
	bvec := []float64{0.1, -0.1}
	for _, c := range []struct {
		h           float64
		k           int
		large       bool
		noise       bool
		exact, want float64
	}{
		{0.05, 100, false, false, 0.030470, 2.097777},
		{0.05, 1000, false, false, 0.029896, 2.087103},
		{0.01, 2000, false, false, 0.005663, 0.933381},
		{0.3, 100, false, false, 0.302649, 5.112338},
		{0.45, 50, true, false, 1.089650, 14.087973},
		{0.05, 200, false, true, 0.131405, 2.375670},
		{0.01, 2000, false, true, 0.104321, 1.140580},
	} {
		s, b, s2 := exactGrad, []float64(nil), 0.0
		if c.noise {
			s, b, s2 = noisy, bvec, 4
		}
		bd, err := W2Bound(s, c.h, c.k)
		if err != nil {
			t.Fatal(err)
		}
		ex := exactW2(c.h, c.k, 1, b, s2)
		if !roundsTo(bd.Total, c.want, 5e-7) || bd.LargeStep != c.large {
			t.Errorf("h = %v, K = %d: bound %.7f (branch b %v), reference %.6f", c.h, c.k, bd.Total, bd.LargeStep, c.want)
		}
		if !roundsTo(ex, c.exact, 5e-7) {
			t.Errorf("h = %v, K = %d: exact W2 %.7f, reference %.6f", c.h, c.k, ex, c.exact)
		}
		if !(bd.Total >= ex) {
			t.Errorf("h = %v, K = %d: bound %v < exact %v", c.h, c.k, bd.Total, ex)
		}
		if d := bd.Start + bd.Discretisation + bd.Bias + bd.Noise; d != bd.Total || !bd.Recalled || bd.Metric != W2 {
			t.Errorf("terms %+v", bd)
		}
	}
}

// TestW2TermsFormula checks each term of W2Bound against the inaccurate-
// gradient bound of Dalalyan and Karagulyan (2019) (from memory), written
// out here for the noisy reference row (h = 0.05, K = 200):
// (1−mh)^K·W0, 1.65·κ·√(hp), δ√p/m, σ²√(hp)/(1.65M + σ√m).
func TestW2TermsFormula(t *testing.T) {
	s := Setting{Convexity: 1, Smoothness: 4, Dim: 2, StartDistance: 1.8, Bias: 0.1, Noise: 2}
	b, err := W2Bound(s, 0.05, 200)
	if err != nil {
		t.Fatal(err)
	}
	sq := math.Sqrt(0.05 * 2)
	for _, c := range []struct {
		name      string
		got, want float64
	}{
		{"start", b.Start, math.Pow(0.95, 200) * 1.8},
		{"discretisation", b.Discretisation, 1.65 * 4 * sq},
		{"bias", b.Bias, 0.1 * math.Sqrt2},
		{"noise", b.Noise, 4 * sq / (1.65*4 + 2)},
	} {
		if !relClose(c.got, c.want, 1e-14) {
			t.Errorf("%s term %.17g, formula %.17g", c.name, c.got, c.want)
		}
	}
}

// TestW2RuleVector reproduces the rule's reference row (the rule derived
// here on the bound recalled from memory, ε = 0.5 from θ*, W0 = √2): h =
// 7.174012855831038e-04, K = 2416, exact W2 = 0.015545 (computed here from
// the chain's Gaussian law, start at 0), bound 0.499751, bound ≥ exact.
func TestW2RuleVector(t *testing.T) {
	s := Setting{Convexity: 1, Smoothness: 4, Dim: 2}
	sc, err := W2Rule(s, 0.5)
	if err != nil {
		t.Fatal(err)
	}
	if !relClose(sc.Step, 7.174012855831038e-04, 1e-12) || sc.Iterations != 2416 {
		t.Errorf("h = %.17g, K = %d; reference 7.174012855831038e-04, 2416", sc.Step, sc.Iterations)
	}
	// The rule as derived (docs/methods.md): h = min{ε²/(4·1.65²·κ²·p), 2/(m+M)},
	// K = ⌈log(2·W0/ε)/(m·h)⌉.
	h := math.Min(0.25/(4*1.65*1.65*16*2), 0.4)
	if !relClose(sc.Step, h, 1e-14) || sc.Iterations != int(math.Ceil(math.Log(2*math.Sqrt2/0.5)/h)) {
		t.Errorf("rule %+v, derived h = %v", sc, h)
	}
	b, err := W2Bound(s, sc.Step, sc.Iterations)
	if err != nil {
		t.Fatal(err)
	}
	ex := exactW2(sc.Step, sc.Iterations, 0, nil, 0)
	if !roundsTo(b.Total, 0.499751, 5e-7) || !roundsTo(ex, 0.015545, 5e-7) || !(b.Total >= ex) || !(b.Total <= 0.5) {
		t.Errorf("bound %.7f (reference 0.499751), exact %.7f (0.015545)", b.Total, ex)
	}
	if !relClose(b.Discretisation, 0.25, 1e-12) || !(b.Start <= 0.25) {
		t.Errorf("terms %+v: discretisation must be ε/2, start ≤ ε/2", b)
	}
}

// TestW2BoundDominatesExact sweeps steps over the whole range (0, 2/M) of
// the bound recalled from memory, both branches, and step counts, from
// several starts, on the W2 test target: the bound must dominate the exact W2 of the chain
// (exact check paired with the from-memory bound). With bias and Gaussian
// noise, over h ≤ 2/(m+M).
func TestW2BoundDominatesExact(t *testing.T) {
	for _, x0 := range []float64{0, 1, -3} {
		w0 := w2Diag([]gaussLaw{{x0, 0}, {x0, 0}}, w2Target)
		for i := 1; i < 50; i++ {
			h := 0.5 * float64(i) / 50 // (0, 2/M)
			for _, k := range []int{0, 1, 3, 20, 200, 2000} {
				s := Setting{Convexity: 1, Smoothness: 4, Dim: 2, StartDistance: w0}
				b, err := W2Bound(s, h, k)
				if err != nil {
					t.Fatal(err)
				}
				if ex := exactW2(h, k, x0, nil, 0); !(b.Total >= ex) {
					t.Errorf("x0 = %v, h = %v, K = %d: bound %v < exact %v", x0, h, k, b.Total, ex)
				}
				if h > 0.4 {
					continue
				}
				for _, nz := range []struct{ b, s float64 }{{0.1, 0}, {0, 2}, {0.3, 0.5}, {0.01, 10}} {
					s.Bias, s.Noise = nz.b, nz.s
					b, err := W2Bound(s, h, k)
					if err != nil {
						t.Fatal(err)
					}
					// Bias vector (b, −b): δ = b; noise N(0, s²I): σ = s.
					if ex := exactW2(h, k, x0, []float64{nz.b, -nz.b}, nz.s*nz.s); !(b.Total >= ex) {
						t.Errorf("x0 = %v, h = %v, K = %d, δ = %v, σ = %v: bound %v < exact %v", x0, h, k, nz.b, nz.s, b.Total, ex)
					}
				}
			}
		}
	}
}

// TestW2BranchesMeet: at h = 2/(m+M) the two branches of the bound
// give the same bound ((M−m)/(m+M) contraction, κ factor), so the bound is
// continuous across them (derived here).
func TestW2BranchesMeet(t *testing.T) {
	for _, c := range []struct{ m, M float64 }{{1, 4}, {0.5, 0.6}, {2, 200}} {
		s := Setting{Convexity: c.m, Smoothness: c.M, Dim: 3, StartDistance: 2}
		h := 2 / (c.m + c.M)
		a, err := W2Bound(s, h, 3)
		if err != nil {
			t.Fatal(err)
		}
		b, err := W2Bound(s, math.Nextafter(h, math.Inf(1)), 3)
		if err != nil {
			t.Fatal(err)
		}
		if a.LargeStep || !b.LargeStep || !relClose(a.Total, b.Total, 1e-12) {
			t.Errorf("%+v: branch a %v (%v), branch b %v (%v)", c, a.Total, a.LargeStep, b.Total, b.LargeStep)
		}
	}
}

// TestW2RuleNoisy checks the rule with bias and noise (derived in
// W2Rule's doc): when the cap 2/(m+M) does not bind, the h-dependent terms
// and the bias fill exactly ε/2; the start term is ≤ ε/2 at K; the bound at
// K is ≤ ε; and on the W2 test target with b = (δ, −δ) and Gaussian noise of
// standard deviation σ, the exact W2 from θ* is below the bound.
func TestW2RuleNoisy(t *testing.T) {
	for _, c := range []struct {
		delta, sigma, eps float64
		capped            bool
	}{
		{0.1, 2, 1, false},
		{0.1, 2, 0.3, false},
		{0, 2, 0.5, false},
		{0.05, 0, 0.5, false},
		{0, 30, 0.2, false},
		{0.1, 2, 20, true},
	} {
		s := Setting{Convexity: 1, Smoothness: 4, Dim: 2, Bias: c.delta, Noise: c.sigma}
		sc, err := W2Rule(s, c.eps)
		if err != nil {
			t.Fatal(err)
		}
		b, err := W2Bound(s, sc.Step, sc.Iterations)
		if err != nil {
			t.Fatal(err)
		}
		rest := b.Discretisation + b.Noise + b.Bias
		if c.capped {
			if sc.Step != 0.4 || !(rest < c.eps/2) {
				t.Errorf("%+v: h = %v, terms %+v", c, sc.Step, b)
			}
		} else if !relClose(rest, c.eps/2, 1e-12) {
			t.Errorf("%+v: discretisation + noise + bias = %.17g, want ε/2", c, rest)
		}
		if !(b.Start <= c.eps/2*(1+1e-12)) || !(b.Total <= c.eps*(1+1e-12)) {
			t.Errorf("%+v: bound at K = %d: %+v", c, sc.Iterations, b)
		}
		if ex := exactW2(sc.Step, sc.Iterations, 0, []float64{c.delta, -c.delta}, c.sigma*c.sigma); !(ex <= b.Total) {
			t.Errorf("%+v: exact W2 %v above the bound %v", c, ex, b.Total)
		}
	}
	// The bias alone must stay below ε/2: δ√p/m = 0.1414 ≥ 0.14.
	_, err := W2Rule(Setting{Convexity: 1, Smoothness: 4, Dim: 2, Bias: 0.1}, 0.28)
	checkInputErr(t, "bias above eps/2", err, "delta")
	// A start already within ε/2 needs no steps.
	sc, err := W2Rule(Setting{Convexity: 1, Smoothness: 4, Dim: 2, StartDistance: 0.1}, 0.5)
	if err != nil || sc.Iterations != 0 || sc.Horizon != 0 {
		t.Errorf("W0 = 0.1, ε = 0.5: %+v, %v; want K = 0", sc, err)
	}
}

// TestNoiseStep: the returned step puts the noise term of the bound
// exactly at the budget (the inequality solved in closed form), unless the
// cap 2/(m+M) binds; with σ = 0 it is the cap.
func TestNoiseStep(t *testing.T) {
	for _, c := range []struct {
		sigma, budget float64
		capped        bool
	}{{2, 0.05, false}, {10, 0.01, false}, {0.5, 1e-3, false}, {2, 10, true}, {0, 0.01, true}} {
		s := Setting{Convexity: 1, Smoothness: 4, Dim: 2, Noise: c.sigma}
		h, err := NoiseStep(s, c.budget)
		if err != nil {
			t.Fatal(err)
		}
		b, err := W2Bound(s, h, 0)
		if err != nil {
			t.Fatal(err)
		}
		if c.capped {
			if h != 0.4 || !(b.Noise <= c.budget) {
				t.Errorf("%+v: h = %v, noise term %v", c, h, b.Noise)
			}
		} else if !relClose(b.Noise, c.budget, 1e-12) || !(h < 0.4) {
			t.Errorf("%+v: h = %v, noise term %.17g", c, h, b.Noise)
		}
	}
	_, err := NoiseStep(Setting{Convexity: 1, Smoothness: 4, Dim: 2, Noise: 1}, 0)
	checkInputErr(t, "zero budget", err, "budget")
}

// TestW2Errors: inputs outside the W2 theorems are errors naming them.
func TestW2Errors(t *testing.T) {
	s := Setting{Convexity: 1, Smoothness: 4, Dim: 2}
	noisy := s
	noisy.Noise = 1
	for _, c := range []struct {
		name  string
		s     Setting
		h     float64
		k     int
		input string
	}{
		{"h at 2/M", s, 0.5, 1, "h"},
		{"h Inf", s, math.Inf(1), 1, "h"},
		{"k negative", s, 0.1, -3, "k"},
		{"branch b with noise", noisy, 0.41, 1, "h"},
		{"m zero", Setting{Smoothness: 4, Dim: 2}, 0.1, 1, "m"},
		{"m above M", Setting{Convexity: 5, Smoothness: 4, Dim: 2}, 0.1, 1, "m"},
		{"sigma negative", Setting{Convexity: 1, Smoothness: 4, Dim: 2, Noise: -1}, 0.1, 1, "sigma"},
		{"delta NaN", Setting{Convexity: 1, Smoothness: 4, Dim: 2, Bias: math.NaN()}, 0.1, 1, "delta"},
		{"w0 Inf", Setting{Convexity: 1, Smoothness: 4, Dim: 2, StartDistance: math.Inf(1)}, 0.1, 1, "w0"},
		{"p zero", Setting{Convexity: 1, Smoothness: 4}, 0.1, 1, "p"},
	} {
		_, err := W2Bound(c.s, c.h, c.k)
		checkInputErr(t, c.name, err, c.input)
	}
	for _, eps := range []float64{0, -1, math.NaN(), math.Inf(1)} {
		_, err := W2Rule(s, eps)
		checkInputErr(t, "W2Rule eps", err, "eps")
	}
}

// TestContraction: (1 − x)^k for small x and k ≈ 1/x, against the series
// log(1 − x) = −x − x²/2 − x³/3 − … (closed form; the neglected terms are
// below k·x⁴ ≈ 1e-26 here).
func TestContraction(t *testing.T) {
	for _, c := range []struct {
		x float64
		k int
	}{{2e-9, 4_000_000_000}, {1e-7, 30_000_000}, {0.25, 7}, {1, 3}, {1, 0}, {0.5, 0}} {
		want := math.Exp(-float64(c.k) * (c.x + c.x*c.x/2 + c.x*c.x*c.x/3))
		if c.x >= 0.25 {
			want = math.Pow(1-c.x, float64(c.k)) // 1 − x exact in binary
		}
		if got := contraction(c.x, c.k); !relClose(got, want, 1e-14) {
			t.Errorf("(1 − %v)^%d = %.17g, want %.17g", c.x, c.k, got, want)
		}
	}
}
