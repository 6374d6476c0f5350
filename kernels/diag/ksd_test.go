package diag

import (
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"gonum.org/v1/gonum/integrate/quad"
	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distuv"

	"sluice/kernels"
)

// stdNormalScores returns the scores s(x) = −x of N(0, I).
func stdNormalScores(x []float64) []float64 {
	s := make([]float64, len(x))
	for i, v := range x {
		s[i] = -v
	}
	return s
}

func near(got, want, tol float64) bool { return math.Abs(got-want) <= tol }

// Closed-form k₀ (derived here) at one pair of points, two kernels.
func TestSteinKernelTheoryValues(t *testing.T) {
	x := []float64{0.3, -1.2, 0.7}
	y := []float64{1.0, 0.4, -0.5}
	sx := []float64{0.2, 1.0, -0.3}
	sy := []float64{-0.5, 0.1, 0.9}
	for _, c := range []struct {
		k    IMQ
		want float64
	}{
		{IMQ{C: 1, Beta: -0.5}, -0.33473457458308364},
		{IMQ{}, -0.33473457458308364}, // zero value means c = 1, β = −½
		{IMQ{C: 2, Beta: -0.3}, -0.20705119336182165},
	} {
		if got := c.k.Stein(x, sx, y, sy); !near(got, c.want, 1e-12) {
			t.Errorf("%+v: k₀ = %.17g, want %.17g (closed form derived here)", c.k, got, c.want)
		}
		if a, b := c.k.Stein(x, sx, y, sy), c.k.Stein(y, sy, x, sx); a != b && !near(a, b, 1e-15) {
			t.Errorf("%+v: k₀ not symmetric: %v vs %v", c.k, a, b)
		}
	}
}

// The closed form against the definition of the Langevin Stein kernel
// (Liu, Lee and Jordan 2016),
//
//	k₀ = s(x)ᵀs(y)k + s(x)ᵀ∇_y k + s(y)ᵀ∇_x k + Σ_j ∂²k/∂x_j∂y_j,
//
// with the derivatives of the base kernel by central differences (step
// h = 1e-4: truncation O(h²) ≈ 1e-8 and rounding O(u/h²) ≈ 1e-8, so 1e-6
// leaves a factor 100). This is the check the closed form was derived
// with.
func TestSteinKernelFiniteDifferences(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 5))
	for _, k := range []IMQ{{}, {C: 2, Beta: -0.3}, {C: 0.7, Beta: -0.8}} {
		c2, beta := k.params()
		base := func(x, y []float64) float64 {
			var q float64
			for i := range x {
				q += (x[i] - y[i]) * (x[i] - y[i])
			}
			return math.Pow(c2+q, beta)
		}
		for range 5 {
			const p, h = 3, 1e-4
			x, y, sx, sy := make([]float64, p), make([]float64, p), make([]float64, p), make([]float64, p)
			for i := range p {
				x[i], y[i], sx[i], sy[i] = r.NormFloat64(), r.NormFloat64(), r.NormFloat64(), r.NormFloat64()
			}
			want := dot(sx, sy) * base(x, y)
			for j := range p {
				xp, xm := shifted(x, j, h), shifted(x, j, -h)
				yp, ym := shifted(y, j, h), shifted(y, j, -h)
				dxk := (base(xp, y) - base(xm, y)) / (2 * h)
				dyk := (base(x, yp) - base(x, ym)) / (2 * h)
				dxy := (base(xp, yp) - base(xp, ym) - base(xm, yp) + base(xm, ym)) / (4 * h * h)
				want += sx[j]*dyk + sy[j]*dxk + dxy
			}
			if got := k.Stein(x, sx, y, sy); !near(got, want, 1e-6) {
				t.Errorf("%+v at x=%v y=%v: closed form %.12g, finite differences %.12g", k, x, y, got, want)
			}
		}
	}
}

func shifted(x []float64, j int, h float64) []float64 {
	y := append([]float64(nil), x...)
	y[j] += h
	return y
}

func dot(a, b []float64) float64 {
	var s float64
	for i := range a {
		s += a[i] * b[i]
	}
	return s
}

// the closed-form diagonal, derived here: k₀(x, x) = ‖s(x)‖²c^{2β} − 2βd·c^{2(β−1)}.
func TestSteinKernelDiagonal(t *testing.T) {
	x := []float64{0.3, -1.2, 0.7, 2}
	s := []float64{0.2, 1.0, -0.3, -4}
	for _, k := range []IMQ{{}, {C: 2, Beta: -0.3}} {
		c2, beta := k.params()
		want := dot(s, s)*math.Pow(c2, beta) - 2*beta*4*math.Pow(c2, beta-1)
		if got := k.Stein(x, s, x, s); !near(got, want, 1e-12) {
			t.Errorf("%+v: k₀(x, x) = %.15g, want %.15g (closed form derived here)", k, got, want)
		}
	}
}

// Worked example computed for the project, 1D points (−1, 0, 0.5, 2) for N(0, 1), IMQ c = 1, β = −½.
func TestKSDTheoryVectors1D(t *testing.T) {
	x := []float64{-1, 0, 0.5, 2}
	s := stdNormalScores(x)
	want := [4][4]float64{
		{2.0000000000, -0.5303300859, -0.8451792931, -0.9708192417},
		{-0.5303300859, 1.0000000000, 0.1073312629, -0.4829906831},
		{-0.8451792931, 0.1073312629, 1.2500000000, -0.0131289987},
		{-0.9708192417, -0.4829906831, -0.0131289987, 5.0000000000},
	}
	var k IMQ
	for i := range 4 {
		for j := range 4 {
			if got := k.Stein(x[i:i+1], s[i:i+1], x[j:j+1], s[j:j+1]); !near(got, want[i][j], 1e-8) {
				t.Errorf("k₀(x%d, x%d) = %.10f, want %.10f (worked example computed for the project)", i+1, j+1, got, want[i][j])
			}
		}
	}
	d := SteinDiscrepancy(k, 1, x, s)
	if d.N != 4 || !near(d.V2, 0.2362353701, 1e-8) || !near(d.V(), 0.4860405025, 1e-8) || !near(d.U2, -0.4558528399, 1e-8) || d.U() != 0 {
		t.Errorf("KSD = %+v (V %.10f), want V² 0.2362353701, V 0.4860405025, U² −0.4558528399, U clipped to 0 (worked example computed for the project)", d, d.V())
	}
	if got := LinearSteinDiscrepancy(k, 1, x, s); !near(got, -0.2717295423, 1e-8) {
		t.Errorf("KSD²_L = %.10f, want −0.2717295423 (worked example computed for the project)", got)
	}
}

// Worked example computed for the project, 2D points for N(0, I).
func TestKSDTheoryVectors2D(t *testing.T) {
	x := []float64{0, 0, 1, 0, 0, 1, -1, -1, 0.5, 0.5, 2, -1}
	s := stdNormalScores(x)
	var k IMQ
	d := SteinDiscrepancy(k, 2, x, s)
	if d.N != 6 || !near(d.V2, 0.4350857008, 1e-8) || !near(d.V(), 0.6596102643, 1e-8) || !near(d.U2, -0.1945638257, 1e-8) {
		t.Errorf("KSD = %+v (V %.10f), want V² 0.4350857008, V 0.6596102643, U² −0.1945638257 (worked example computed for the project)", d, d.V())
	}
	if got := LinearSteinDiscrepancy(k, 2, x, s); !near(got, -0.3767218521, 1e-8) {
		t.Errorf("KSD²_L = %.10f, want −0.3767218521 (worked example computed for the project)", got)
	}
	for i, want := range []float64{2, 3, 3, 4, 2.5, 7} {
		r := x[2*i : 2*i+2]
		if got := k.Stein(r, s[2*i:2*i+2], r, s[2*i:2*i+2]); !near(got, want, 1e-12) {
			t.Errorf("k₀(x%d, x%d) = %v, want %v (worked example computed for the project)", i+1, i+1, got, want)
		}
	}
	// Dropping the last row of an odd sample: the linear estimate uses
	// pairs 1–2 and 3–4 only.
	if got, want := LinearSteinDiscrepancy(k, 2, x[:10], s[:10]), (k.Stein(x[0:2], s[0:2], x[2:4], s[2:4])+k.Stein(x[4:6], s[4:6], x[6:8], s[6:8]))/2; got != want {
		t.Errorf("KSD²_L of 5 rows = %v, want %v", got, want)
	}
}

// Worked sensitivity check computed for the project: Φ⁻¹((i − 0.5)/20), i = 1..20, shifted
// by c, scored against N(0, 1). Φ⁻¹ from gonum's distuv.
func TestKSDSensitivityToShift(t *testing.T) {
	for _, c := range []struct{ shift, want float64 }{{0, 0.0332352311}, {0.5, 0.4224686776}, {1, 0.8429741350}} {
		x := make([]float64, 20)
		for i := range x {
			x[i] = distuv.UnitNormal.Quantile((float64(i)+0.5)/20) + c.shift
		}
		if got := SteinDiscrepancy(IMQ{}, 1, x, stdNormalScores(x)).V(); !near(got, c.want, 1e-8) {
			t.Errorf("shift %v: KSD_V = %.10f, want %.10f (worked example computed for the project)", c.shift, got, c.want)
		}
	}
}

func TestKSDEdgeCases(t *testing.T) {
	d := SteinDiscrepancy(IMQ{}, 2, nil, nil)
	if d.N != 0 || !math.IsNaN(d.V2) || !math.IsNaN(d.U2) {
		t.Errorf("empty sample: %+v, want N 0 and NaN estimates", d)
	}
	d = SteinDiscrepancy(IMQ{}, 2, []float64{1, 2}, []float64{-1, -2})
	if d.N != 1 || d.V2 != 7 || !math.IsNaN(d.U2) { // k₀(x, x) = ‖x‖² + d (closed form derived here)
		t.Errorf("one draw: %+v, want V² = 7, U² NaN", d)
	}
	if got := LinearSteinDiscrepancy(IMQ{}, 2, []float64{1, 2}, []float64{-1, -2}); !math.IsNaN(got) {
		t.Errorf("linear estimate of one draw = %v, want NaN", got)
	}
	for name, f := range map[string]func(){
		"bad c":          func() { IMQ{C: -1}.Stein([]float64{0}, []float64{0}, []float64{0}, []float64{0}) },
		"bad β":          func() { SteinDiscrepancy(IMQ{Beta: -1}, 1, []float64{0}, []float64{0}) },
		"positive β":     func() { NewStreamKSD(IMQ{Beta: 0.5}, 1, 1, 4) },
		"lengths":        func() { IMQ{}.Stein([]float64{0, 1}, []float64{0}, []float64{0, 1}, []float64{0, 1}) },
		"ragged":         func() { SteinDiscrepancy(IMQ{}, 2, []float64{0, 1, 2}, []float64{0, 1, 2}) },
		"scores":         func() { LinearSteinDiscrepancy(IMQ{}, 1, []float64{0, 1}, []float64{0}) },
		"dim":            func() { SteinDiscrepancy(IMQ{}, 0, nil, nil) },
		"one round":      func() { NewStreamKSD(IMQ{}, 2, 4, 7) },
		"stream lengths": func() { NewStreamKSD(IMQ{}, 2, 1, 4).Add([]float64{1, 2, 3}, []float64{1, 2, 3}) },
	} {
		if msg := panicMessage(f); !strings.HasPrefix(msg, "diag: ") {
			t.Errorf("%s: panic %q, want a diag: panic", name, msg)
		}
	}
}

func panicMessage(f func()) (msg string) {
	defer func() {
		if r := recover(); r != nil {
			msg, _ = r.(string)
		}
	}()
	f()
	return ""
}

// Stein identity E_{X~π} k₀(X, y) = 0 for fixed y (Liu, Lee and Jordan
// 2016), by Gauss–Hermite quadrature for π = N(0, 1) at three points
// (E g(X) = π^{−1/2}∫g(√2 t)e^{−t²}dt, gonum quad.Hermite). The integrand
// is analytic near the real line, so the rule converges geometrically and
// the distance between the 400- and 800-node values overestimates the
// error of the 800-node one; the tolerance is that distance plus the
// rounding of the sum (nodes × unit roundoff × largest |weighted term|).
func TestSteinIdentityQuadrature(t *testing.T) {
	rule := func(n int) (x, w []float64) {
		x, w = make([]float64, n), make([]float64, n)
		quad.Hermite{}.FixedLocations(x, w, math.Inf(-1), math.Inf(1))
		return x, w
	}
	x400, w400 := rule(400)
	x800, w800 := rule(800)
	for _, k := range []IMQ{{}, {C: 2, Beta: -0.3}} {
		for _, y := range []float64{0, 1.3, -2} {
			yy, sy := []float64{y}, []float64{-y}
			var big float64
			mean := func(nodes, weights []float64) float64 {
				var sum float64
				for i, u := range nodes {
					x := math.Sqrt2 * u
					v := weights[i] * k.Stein([]float64{x}, []float64{-x}, yy, sy)
					big = math.Max(big, math.Abs(v))
					sum += v
				}
				return sum / math.Sqrt(math.Pi)
			}
			coarse, fine := mean(x400, w400), mean(x800, w800)
			tol := math.Abs(fine-coarse) + 800*0x1p-53*big
			if math.Abs(fine) > tol {
				t.Errorf("%+v, y = %v: E k₀(X, y) = %g, want 0 within %g (Stein identity)", k, y, fine, tol)
			}
		}
	}
}

// gaussian is a correlated Gaussian N(μ, Q⁻¹) with exact draws by
// Cholesky factor of the covariance (gonum mat) and score −Q(x − μ).
type gaussian struct {
	mu   []float64
	q    *mat.SymDense
	chol mat.TriDense // lower factor of Q⁻¹
}

func newGaussian(mu []float64, q *mat.SymDense) *gaussian {
	var c mat.Cholesky
	if !c.Factorize(q) {
		panic("test: precision not positive definite")
	}
	var cov mat.SymDense
	if err := c.InverseTo(&cov); err != nil {
		panic(err)
	}
	var cc mat.Cholesky
	if !cc.Factorize(&cov) {
		panic("test: covariance not positive definite")
	}
	g := &gaussian{mu: mu, q: q}
	cc.LTo(&g.chol)
	return g
}

// draw fills x with an exact draw and s with its score.
func (g *gaussian) draw(r *rand.Rand, x, s []float64) {
	p := len(g.mu)
	z := make([]float64, p)
	for i := range z {
		z[i] = r.NormFloat64()
	}
	for i := range p {
		x[i] = g.mu[i]
		for j := 0; j <= i; j++ {
			x[i] += g.chol.At(i, j) * z[j]
		}
	}
	g.score(x, s)
}

func (g *gaussian) score(x, s []float64) {
	p := len(g.mu)
	for i := range p {
		s[i] = 0
		for j := range p {
			s[i] -= g.q.At(i, j) * (x[j] - g.mu[j])
		}
	}
}

func (g *gaussian) sample(r *rand.Rand, n int) (x, s []float64) {
	p := len(g.mu)
	x, s = make([]float64, n*p), make([]float64, n*p)
	for i := range n {
		g.draw(r, x[i*p:(i+1)*p], s[i*p:(i+1)*p])
	}
	return x, s
}

var testPrecision3 = mat.NewSymDense(3, []float64{
	2, 0.5, 0.2,
	0.5, 1, -0.3,
	0.2, -0.3, 0.8,
})

// Stein identity by Monte Carlo in 3D (Liu, Lee and Jordan 2016; derived here): for
// X ~ N(μ, Q⁻¹) exact, the mean of k₀(X_i, y) over 50000 draws is within 4
// standard errors of 0 for fixed y, with y's own score or any other vector
// in the second slot (the identity is linear in it).
func TestSteinIdentityMonteCarlo(t *testing.T) {
	g := newGaussian([]float64{0.5, -1, 0.2}, testPrecision3)
	r := rand.New(rand.NewPCG(21, 22))
	const n = 50000
	x, s := g.sample(r, n)
	for _, k := range []IMQ{{}, {C: 2, Beta: -0.3}} {
		for _, y := range [][]float64{{0, 0, 0}, {1.5, -2, 0.7}, {0.5, -1, 0.2}} {
			sy := make([]float64, 3)
			g.score(y, sy)
			for _, sv := range [][]float64{sy, {1, -2, 0.5}} {
				var sum, sum2 float64
				for i := range n {
					v := k.Stein(x[3*i:3*i+3], s[3*i:3*i+3], y, sv)
					sum += v
					sum2 += v * v
				}
				m := sum / n
				se := math.Sqrt((sum2/n - m*m) / n)
				if math.Abs(m) > 4*se {
					t.Errorf("%+v, y = %v, s(y) = %v: E k₀(X, y) ≈ %.3g ± %.2g, want 0 within 4 standard errors", k, y, sv, m, se)
				}
			}
		}
	}
}

// Exact i.i.d. draws from π = N(μ, Q⁻¹) in 2D (Q from ULA on a Gaussian, derived here). The
// kernel is degenerate under π (E_X k₀(X, y) = 0), so the U-statistic has
// mean 0 and the exact variance 2ζ/(n(n−1)) with ζ = E k₀(X, X′)²
// (Hoeffding decomposition of a U-statistic whose first-order projection
// vanishes, derived here); n·KSD²_U therefore has mean 0 and variance 2ζ·n/(n−1)
// at every n: the discrepancy shrinks like 1/n. The V-statistic is ≥ 0
// and E[n·KSD²_V] = E k₀(X, X) = tr(Q) + d = 5 exactly (the closed-form
// diagonal, derived here, β = −½, c = 1, with E‖s(X)‖² = tr(Q)). ζ is estimated from
// independent pairs. Checks, for n = 100, 400, 1600: the mean of n·KSD²_U
// over the replicates is 0 within 4 exact standard errors; every single
// n·KSD²_U is within 30 exact standard deviations of 0 (Chebyshev: α ≤
// 1/900 whatever the law; the weighted-χ² limit law makes it far
// smaller), which a discrepancy not shrinking like 1/n would break as n
// grows; the mean of n·KSD²_V is 5 within 4 standard errors.
func TestKSDExactSamplerShrinksLikeOneOverN(t *testing.T) {
	q := mat.NewSymDense(2, []float64{2, 0.5, 0.5, 1})
	g := newGaussian([]float64{1, -0.5}, q)
	r := rand.New(rand.NewPCG(31, 37))
	var k IMQ

	// ζ = E k₀(X, X′)² from 100000 independent pairs.
	const pairs = 100000
	x, s := g.sample(r, 2*pairs)
	var z1, z2 float64
	for i := range pairs {
		a, b := 4*i, 4*i+2
		v := k.Stein(x[a:a+2], s[a:a+2], x[b:b+2], s[b:b+2])
		z1 += v * v
		z2 += v * v * v * v
	}
	zeta := z1 / pairs
	if se := math.Sqrt((z2/pairs - zeta*zeta) / pairs); se > 0.05*zeta {
		t.Fatalf("ζ = %v ± %v: too imprecise for the checks", zeta, se)
	}

	for _, c := range []struct{ n, reps int }{{100, 64}, {400, 16}, {1600, 4}} {
		sd := math.Sqrt(2 * zeta * float64(c.n) / float64(c.n-1))
		var su, sv, sv2, worst float64
		for range c.reps {
			x, s := g.sample(r, c.n)
			d := SteinDiscrepancy(k, 2, x, s)
			if !(d.V2 >= 0) {
				t.Errorf("n = %d: KSD²_V = %v, want ≥ 0", c.n, d.V2)
			}
			u := float64(c.n) * d.U2
			if math.Abs(u) > 30*sd {
				t.Errorf("n = %d: n·KSD²_U = %.4g, beyond 30 standard deviations (%.3g)", c.n, u, sd)
			}
			worst = math.Max(worst, math.Abs(u))
			su += u
			v := float64(c.n) * d.V2
			sv += v
			sv2 += v * v
		}
		reps := float64(c.reps)
		if m, se := su/reps, sd/math.Sqrt(reps); math.Abs(m) > 4*se {
			t.Errorf("n = %d: mean n·KSD²_U = %.4g, want 0 within 4·%.3g", c.n, m, se)
		}
		mv := sv / reps
		sev := math.Sqrt((sv2/reps - mv*mv) / (reps - 1))
		if math.Abs(mv-5) > 4*sev {
			t.Errorf("n = %d: mean n·KSD²_V = %.4g ± %.2g, want tr(Q) + d = 5", c.n, mv, sev)
		}
		t.Logf("n = %4d: mean n·U² = %+.3f (exact sd %.3f, largest |n·U²| %.3f), mean n·V² = %.3f ± %.3f", c.n, su/reps, sd, worst, mv, sev)
	}
}

// KSD ranks LMC step sizes on π = N(0, Q⁻¹), Q from ULA on a Gaussian, derived here: ULA's
// stationary law is N(0, Q⁻¹(I − hQ/2)⁻¹) (ULA on a Gaussian, derived here), further from π
// as h grows (h < 0.906 for stability), so the expected discrepancy grows
// with h. Each of 32 chains of one kernels.NewLMC run per step size is an
// independent replicate; after a burn-in of 10 time units every step's
// draw and the gradient the chain asked for go to the chain's own
// StreamKSD (capacity 256), as a session would feed them. Runs last 409.6
// time units, so every h ends with exactly 256 kept draws 1.6 time units
// apart (equal sample sizes). The ordering of the mean KSD²_U between
// successive step sizes is checked by a one-sided Welch statistic > 4
// (α < 10⁻³ at ≥ 31 degrees of freedom).
func TestKSDRanksLMCStepSizes(t *testing.T) {
	q := []float64{2, 0.5, 0.5, 1}
	const dim, chains, capacity = 2, 32, 256
	type summary struct{ mean, se float64 }
	var res []summary
	for i, h := range []float64{0.1, 0.4, 0.8} {
		k := kernels.NewLMC(dim, chains, h, []float64{0, 0}, kernels.NewSource(uint64(100+i)))
		ans := kernels.NewAnswer(chains, dim)
		streams := make([]*StreamKSD, chains)
		for c := range streams {
			streams[c] = NewStreamKSD(IMQ{}, dim, 1, capacity)
		}
		burn := int(math.Round(10 / h))
		stride := int(math.Round(1.6 / h))
		steps := burn + capacity*stride
		for step := range steps {
			req := k.Next()
			for r := range req.Rows {
				x, g := req.Points[r*dim:(r+1)*dim], ans.Grad[r*dim:(r+1)*dim]
				g[0] = -(q[0]*x[0] + q[1]*x[1])
				g[1] = -(q[2]*x[0] + q[3]*x[1])
				if step >= burn {
					streams[r].Add(x, g)
				}
			}
			k.Tell(ans)
		}
		var sum, sum2 float64
		for c, st := range streams {
			if st.Kept() != capacity || st.Stride() != stride || st.Seen() != capacity*stride {
				t.Fatalf("h = %v chain %d: kept %d at stride %d of %d, want %d at stride %d", h, c, st.Kept(), st.Stride(), st.Seen(), capacity, stride)
			}
			u := st.Result().U2
			sum += u
			sum2 += u * u
		}
		m := sum / chains
		se := math.Sqrt((sum2/chains - m*m) / (chains - 1))
		res = append(res, summary{m, se})
		t.Logf("h = %.2f: mean KSD²_U = %.5f ± %.5f over %d chains", h, m, se, chains)
	}
	for i := 1; i < len(res); i++ {
		w := (res[i].mean - res[i-1].mean) / math.Hypot(res[i].se, res[i-1].se)
		if !(w > 4) {
			t.Errorf("step %d vs %d: KSD²_U %.5f vs %.5f, Welch statistic %.2f, want > 4", i, i-1, res[i].mean, res[i-1].mean, w)
		}
	}
}

// The stream keeps exactly the rounds that are multiples of its stride,
// with the stride the smallest power of two that fits them in its
// capacity (the documented design), and Result equals a brute-force double
// sum over that subset (every ordered pair, not the half sum of
// steinSums).
func TestStreamKSDKeepsEvenlyThinnedRounds(t *testing.T) {
	// 7 rounds of 2 rows (odd, and 15 leaves a spare row), and 8 rounds.
	for _, capacity := range []int{15, 16} {
		testStreamThinning(t, capacity)
	}
}

func testStreamThinning(t *testing.T, capacity int) {
	const dim, rows = 3, 2
	g := newGaussian([]float64{0, 0, 0}, testPrecision3)
	r := rand.New(rand.NewPCG(41, 43))
	st := NewStreamKSD(IMQ{C: 2, Beta: -0.3}, dim, rows, capacity)
	var all, allS []float64
	for n := 1; n <= 200; n++ {
		x, s := g.sample(r, rows)
		st.Add(x, s)
		all, allS = append(all, x...), append(allS, s...)

		stride := 1
		for (n-1)/stride+1 > capacity/rows {
			stride *= 2
		}
		var keptX, keptS []float64
		for round := 0; round < n; round += stride {
			keptX = append(keptX, all[round*rows*dim:(round+1)*rows*dim]...)
			keptS = append(keptS, allS[round*rows*dim:(round+1)*rows*dim]...)
		}
		if st.Stride() != stride || st.Kept() != len(keptX)/dim || st.Seen() != n*rows {
			t.Fatalf("capacity %d, after %d rounds: stride %d, kept %d, seen %d; want %d, %d, %d", capacity, n, st.Stride(), st.Kept(), st.Seen(), stride, len(keptX)/dim, n*rows)
		}
		if n%9 != 0 && n < 190 {
			continue
		}
		got := st.Result()
		k := len(keptX) / dim
		var off, on float64
		for i := range k {
			for j := range k {
				v := IMQ{C: 2, Beta: -0.3}.Stein(keptX[i*dim:(i+1)*dim], keptS[i*dim:(i+1)*dim], keptX[j*dim:(j+1)*dim], keptS[j*dim:(j+1)*dim])
				if i == j {
					on += v
				} else {
					off += v
				}
			}
		}
		wantU, wantV := off/float64(k*(k-1)), (off+on)/float64(k*k)
		if got.N != k || !near(got.U2, wantU, 1e-12*(1+math.Abs(wantU))) || !near(got.V2, wantV, 1e-12*(1+wantV)) {
			t.Fatalf("capacity %d, after %d rounds: %+v, want N %d, U² %v, V² %v", capacity, n, got, k, wantU, wantV)
		}
		if again := st.Result(); again != got {
			t.Fatalf("cached result %+v differs from %+v", again, got)
		}
	}
}

// Fed the 2D points of the worked example one at a time with room for all,
// the stream gives the batch values.
func TestStreamKSDTheoryVector(t *testing.T) {
	x := []float64{0, 0, 1, 0, 0, 1, -1, -1, 0.5, 0.5, 2, -1}
	s := stdNormalScores(x)
	st := NewStreamKSD(IMQ{}, 2, 1, 6)
	if d := st.Result(); d.N != 0 || !math.IsNaN(d.U2) {
		t.Errorf("empty stream: %+v", d)
	}
	for i := range 6 {
		st.Add(x[2*i:2*i+2], s[2*i:2*i+2])
	}
	if d := st.Result(); d.N != 6 || !near(d.V2, 0.4350857008, 1e-8) || !near(d.U2, -0.1945638257, 1e-8) {
		t.Errorf("stream KSD = %+v, want V² 0.4350857008, U² −0.1945638257 (worked example computed for the project)", d)
	}
	// Two more draws halve the store: rounds 0, 2, 4, 6 remain.
	st.Add([]float64{3, 3}, []float64{-3, -3})
	st.Add([]float64{4, 4}, []float64{-4, -4})
	want := SteinDiscrepancy(IMQ{}, 2, []float64{0, 0, 0, 1, 0.5, 0.5, 3, 3}, []float64{0, 0, 0, -1, -0.5, -0.5, -3, -3})
	if d := st.Result(); d != want || st.Stride() != 2 {
		t.Errorf("after halving: %+v at stride %d, want %+v at stride 2", d, st.Stride(), want)
	}
}

func TestStreamKSDAddAllocatesNothing(t *testing.T) {
	st := NewStreamKSD(IMQ{}, 3, 4, 64)
	x, s := make([]float64, 12), make([]float64, 12)
	if a := testing.AllocsPerRun(1000, func() { st.Add(x, s); st.Result() }); a != 0 {
		t.Errorf("Add + Result allocate %v times per call, want 0", a)
	}
}

func BenchmarkSteinDiscrepancyU1000x10(b *testing.B) {
	g := rand.New(rand.NewPCG(1, 2))
	const n, p = 1000, 10
	x := make([]float64, n*p)
	for i := range x {
		x[i] = g.NormFloat64()
	}
	s := stdNormalScores(x)
	b.ReportAllocs()
	for b.Loop() {
		SteinDiscrepancy(IMQ{}, p, x, s)
	}
}

func BenchmarkSteinDiscrepancyU1000x10Beta03(b *testing.B) {
	g := rand.New(rand.NewPCG(1, 2))
	const n, p = 1000, 10
	x := make([]float64, n*p)
	for i := range x {
		x[i] = g.NormFloat64()
	}
	s := stdNormalScores(x)
	b.ReportAllocs()
	for b.Loop() {
		SteinDiscrepancy(IMQ{Beta: -0.3}, p, x, s)
	}
}

// Cost per offered draw of a long run (dimension 10, one row per round,
// capacity 512): mostly skipped rounds once the stride has grown.
func BenchmarkStreamKSDAdd(b *testing.B) {
	const p = 10
	st := NewStreamKSD(IMQ{}, p, 1, 512)
	x, s := make([]float64, p), make([]float64, p)
	b.ReportAllocs()
	for b.Loop() {
		st.Add(x, s)
	}
}

// Cost per draw while every draw is kept (stride 1, before the first
// halving): the worst case of Add, apart from the halving itself. The
// store (capacity 1024) is replaced, off the clock, before it fills.
func BenchmarkStreamKSDAddKept(b *testing.B) {
	const p, capacity = 10, 1024
	x, s := make([]float64, p), make([]float64, p)
	st := NewStreamKSD(IMQ{}, p, 1, capacity)
	b.ReportAllocs()
	for b.Loop() {
		if st.Kept() == capacity {
			b.StopTimer()
			st = NewStreamKSD(IMQ{}, p, 1, capacity)
			b.StartTimer()
		}
		st.Add(x, s)
	}
}

// Result on a full store of 512 draws in dimension 10 (K(K−1)/2 kernel
// evaluations).
func BenchmarkStreamKSDResult512x10(b *testing.B) {
	const p = 10
	g := rand.New(rand.NewPCG(1, 2))
	st := NewStreamKSD(IMQ{}, p, 1, 512)
	x, s := make([]float64, p), make([]float64, p)
	for range 512 {
		for i := range x {
			x[i] = g.NormFloat64()
			s[i] = -x[i]
		}
		st.Add(x, s)
	}
	b.ReportAllocs()
	for b.Loop() {
		st.cacheRounds = -1
		st.Result()
	}
}
