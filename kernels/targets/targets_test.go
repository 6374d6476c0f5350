package targets

import (
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/floats/scalar"
	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/optimize"
	"gonum.org/v1/gonum/stat/distmv"
)

// q2 is a 2×2 test precision, Q = [[2, .5], [.5, 1]], with closed-form
// eigenvalues (3 ∓ √2)/2 and inverse [[1, −.5], [−.5, 2]]/1.75.
func q2() *mat.SymDense { return mat.NewSymDense(2, []float64{2, 0.5, 0.5, 1}) }

// randomSPD returns Q = AAᵀ/p + I with A having i.i.d. N(0,1) entries: dense,
// symmetric and positive definite (λ_min ≥ 1).
func randomSPD(rng *rand.Rand, p int) *mat.SymDense {
	a := mat.NewDense(p, p, nil)
	for i := range p {
		for j := range p {
			a.Set(i, j, rng.NormFloat64())
		}
	}
	q := mat.NewSymDense(p, nil)
	q.SymOuterK(1/float64(p), a)
	for i := range p {
		q.SetSym(i, i, q.At(i, i)+1)
	}
	return q
}

func randVec(rng *rand.Rand, p int, scale float64) []float64 {
	v := make([]float64, p)
	for i := range v {
		v[i] = scale * rng.NormFloat64()
	}
	return v
}

// expectPanic runs f and fails unless it panics with a "targets: " message.
func expectPanic(t *testing.T, name string, f func()) {
	t.Helper()
	defer func() {
		t.Helper()
		r := recover()
		if r == nil {
			t.Errorf("%s: no panic", name)
			return
		}
		if s, ok := r.(string); !ok || !strings.HasPrefix(s, "targets: ") {
			t.Errorf("%s: panic %v, want a string prefixed \"targets: \"", name, r)
		}
	}()
	f()
}

func TestGaussianLogDensityMatchesDistmv(t *testing.T) {
	rng := rand.New(rand.NewPCG(11, 12))
	cases := []struct {
		name string
		mean []float64
		prec *mat.SymDense
	}{
		{"theory-11a", []float64{1, -2}, q2()},
		{"random-p5", randVec(rng, 5, 1), randomSPD(rng, 5)},
	}
	for _, c := range cases {
		g, err := NewGaussian(c.mean, c.prec)
		if err != nil {
			t.Fatalf("%s: %v", c.name, err)
		}
		// Reference: gonum stat/distmv.Normal.LogProb, built from the
		// covariance (inverse computed independently by mat.Dense.Inverse).
		var inv mat.Dense
		if err := inv.Inverse(c.prec); err != nil {
			t.Fatal(err)
		}
		p := len(c.mean)
		cov := mat.NewSymDense(p, nil)
		for i := range p {
			for j := i; j < p; j++ {
				cov.SetSym(i, j, 0.5*(inv.At(i, j)+inv.At(j, i)))
			}
		}
		ref, ok := distmv.NewNormal(c.mean, cov, nil)
		if !ok {
			t.Fatalf("%s: distmv.NewNormal rejected the covariance", c.name)
		}
		points := [][]float64{c.mean, randVec(rng, p, 1), randVec(rng, p, 3), randVec(rng, p, 0.1)}
		for k, x := range points {
			got, want := g.LogDensity(x), ref.LogProb(x)
			if !scalar.EqualWithinAbsOrRel(got, want, 1e-12, 1e-10) {
				t.Errorf("%s point %d: LogDensity = %.15g, distmv LogProb = %.15g", c.name, k, got, want)
			}
		}
	}
	// Closed form at the mean of the q2 target: −log 2π + ½·log det Q,
	// det Q = 2·1 − 0.5² = 1.75.
	g, _ := NewGaussian([]float64{0, 0}, q2())
	want := -math.Log(2*math.Pi) + 0.5*math.Log(1.75)
	if got := g.LogDensity([]float64{0, 0}); !scalar.EqualWithinAbsOrRel(got, want, 1e-14, 1e-14) {
		t.Errorf("LogDensity at mean = %.17g, closed form %.17g", got, want)
	}
}

func TestGaussianGradientFiniteDifference(t *testing.T) {
	rng := rand.New(rand.NewPCG(21, 22))
	for _, p := range []int{2, 7} {
		var prec *mat.SymDense
		if p == 2 {
			prec = q2()
		} else {
			prec = randomSPD(rng, p)
		}
		g, err := NewGaussian(randVec(rng, p, 1), prec)
		if err != nil {
			t.Fatal(err)
		}
		for k := range 4 {
			x := randVec(rng, p, 2)
			got := make([]float64, p)
			g.GradLogDensity(got, x)
			// Reference: central finite differences of LogDensity (gonum diff/fd).
			want := fd.Gradient(nil, g.LogDensity, x, &fd.Settings{Formula: fd.Central})
			for j := range p {
				if !scalar.EqualWithinAbsOrRel(got[j], want[j], 1e-6, 1e-6) {
					t.Errorf("p=%d point %d coord %d: grad %.10g, finite difference %.10g", p, k, j, got[j], want[j])
				}
			}
		}
	}
}

func TestGaussianCurvatureAndCovariance(t *testing.T) {
	g, err := NewGaussian([]float64{0.3, -0.7}, q2())
	if err != nil {
		t.Fatal(err)
	}
	// Reference: closed form, the roots of λ² − 3λ + 1.75 = 0: the
	// eigenvalues of Q = [[2,.5],[.5,1]] are (3 ∓ √2)/2 =
	// (0.7928932188, 2.2071067812).
	m, M := g.Curvature()
	if math.Abs(m-0.7928932188) > 1e-9 || math.Abs(M-2.2071067812) > 1e-9 {
		t.Errorf("Curvature = (%.12g, %.12g), closed form (0.7928932188, 2.2071067812)", m, M)
	}
	// Reference: closed form, the adjugate over the determinant:
	// Q⁻¹ = [[1, −.5], [−.5, 2]]/1.75 = [[0.5714285714, −0.2857142857],
	// [−0.2857142857, 1.1428571429]].
	want := [][]float64{{0.5714285714, -0.2857142857}, {-0.2857142857, 1.1428571429}}
	cov := g.Covariance()
	for i := range 2 {
		for j := range 2 {
			if math.Abs(cov.At(i, j)-want[i][j]) > 1e-9 {
				t.Errorf("Covariance(%d,%d) = %.12g, closed form %.10g", i, j, cov.At(i, j), want[i][j])
			}
		}
	}
	// Accessors return copies (checked against the inputs themselves).
	mu := g.Mean()
	mu[0] = 99
	if g.Mean()[0] != 0.3 {
		t.Error("Mean does not return a copy")
	}
	pr := g.Precision()
	if !mat.Equal(pr, q2()) {
		t.Errorf("Precision = %v, want the input", mat.Formatted(pr))
	}
	pr.SetSym(0, 0, 99)
	cov.SetSym(0, 0, 99)
	if g.Precision().At(0, 0) != 2 || g.Covariance().At(0, 0) == 99 {
		t.Error("Precision or Covariance does not return a new matrix")
	}
}

func TestNewGaussianErrors(t *testing.T) {
	cases := []struct {
		name string
		mean []float64
		prec *mat.SymDense
	}{
		// [[1,2],[2,1]] has eigenvalues 3 and −1 (closed form), so it is not SPD.
		{"not SPD", []float64{0, 0}, mat.NewSymDense(2, []float64{1, 2, 2, 1})},
		{"NaN mean", []float64{math.NaN(), 0}, q2()},
		{"Inf mean", []float64{0, math.Inf(1)}, q2()},
		{"NaN precision", []float64{0, 0}, mat.NewSymDense(2, []float64{1, math.NaN(), math.NaN(), 1})},
		{"shape mismatch", []float64{0, 0, 0}, q2()},
		{"empty mean", nil, q2()},
		{"nil precision", []float64{0, 0}, nil},
	}
	for _, c := range cases {
		if g, err := NewGaussian(c.mean, c.prec); err == nil {
			t.Errorf("%s: NewGaussian returned %v, want an error", c.name, g)
		}
	}
}

// logisticData invents a small data set: n rows of N(0,1) features and
// labels drawn from the model with θ_true = (1, −2, 0.5, …).
func logisticData(rng *rand.Rand, n, p int) (*mat.Dense, []float64) {
	x := mat.NewDense(n, p, nil)
	y := make([]float64, n)
	truth := make([]float64, p)
	for j := range truth {
		truth[j] = []float64{1, -2, 0.5}[j%3]
	}
	for i := range n {
		var z float64
		for j := range p {
			v := rng.NormFloat64()
			x.Set(i, j, v)
			z += v * truth[j]
		}
		if rng.Float64() < 1/(1+math.Exp(-z)) {
			y[i] = 1
		}
	}
	return x, y
}

func newTestLogistic(t testing.TB) *Logistic {
	t.Helper()
	x, y := logisticData(rand.New(rand.NewPCG(31, 32)), 50, 3)
	l, err := NewLogistic(x, y, 1.5)
	if err != nil {
		t.Fatal(err)
	}
	return l
}

func TestLogisticGradientFiniteDifference(t *testing.T) {
	l := newTestLogistic(t)
	rng := rand.New(rand.NewPCG(41, 42))
	for k := range 5 {
		theta := randVec(rng, 3, 1.5)
		got := make([]float64, 3)
		l.GradLogDensity(got, theta)
		// Reference: central finite differences of LogDensity (gonum diff/fd).
		want := fd.Gradient(nil, l.LogDensity, theta, &fd.Settings{Formula: fd.Central})
		for j := range got {
			if !scalar.EqualWithinAbsOrRel(got[j], want[j], 1e-6, 1e-6) {
				t.Errorf("point %d coord %d: grad %.10g, finite difference %.10g", k, j, got[j], want[j])
			}
		}
	}
}

func TestLogisticHessianFiniteDifference(t *testing.T) {
	l := newTestLogistic(t)
	rng := rand.New(rand.NewPCG(51, 52))
	h := mat.NewSymDense(3, nil)
	jac := mat.NewDense(3, 3, nil)
	for k := range 5 {
		theta := randVec(rng, 3, 1.5)
		l.Hessian(h, theta)
		// Reference: central finite differences of the gradient (gonum fd.Jacobian).
		fd.Jacobian(jac, l.GradLogDensity, theta, &fd.JacobianSettings{Formula: fd.Central})
		for i := range 3 {
			for j := range 3 {
				if !scalar.EqualWithinAbsOrRel(h.At(i, j), jac.At(i, j), 1e-6, 1e-6) {
					t.Errorf("point %d (%d,%d): Hessian %.10g, finite difference %.10g", k, i, j, h.At(i, j), jac.At(i, j))
				}
			}
		}
	}
	expectPanic(t, "Hessian nil", func() { l.Hessian(nil, make([]float64, 3)) })
	expectPanic(t, "Hessian 2×2", func() { l.Hessian(mat.NewSymDense(2, nil), make([]float64, 3)) })
	expectPanic(t, "Hessian theta", func() { l.Hessian(h, make([]float64, 2)) })
}

func TestLogisticCurvature(t *testing.T) {
	const alpha = 1.5
	x, y := logisticData(rand.New(rand.NewPCG(31, 32)), 50, 3)
	l, err := NewLogistic(x, y, alpha)
	if err != nil {
		t.Fatal(err)
	}
	m, M := l.Curvature()
	if m != alpha {
		t.Errorf("m = %v, want α = %v exactly", m, alpha)
	}
	// Reference: M = α + ¼·λ_max(XᵀX) (M bounds the Hessian's largest eigenvalue, with
	// σ(1−σ) ≤ ¼), λ_max computed independently: XᵀX by mat.Dense.Mul, then
	// gonum mat.EigenSym.
	var xtx mat.Dense
	xtx.Mul(x.T(), x)
	sym := mat.NewSymDense(3, nil)
	for i := range 3 {
		for j := i; j < 3; j++ {
			sym.SetSym(i, j, xtx.At(i, j))
		}
	}
	var eig mat.EigenSym
	if !eig.Factorize(sym, false) {
		t.Fatal("EigenSym failed")
	}
	wantM := alpha + eig.Values(nil)[2]/4
	if !scalar.EqualWithinAbsOrRel(M, wantM, 1e-12, 1e-12) {
		t.Errorf("M = %.15g, independent computation %.15g", M, wantM)
	}
	// The bound itself: for every θ, the eigenvalues of −∇²log π = XᵀWX + αI
	// lie in [m, M] (0 < σ(1−σ) ≤ ¼; closed-form argument in doc.go).
	// Slack 1e-12 relative covers rounding in EigenSym.
	rng := rand.New(rand.NewPCG(61, 62))
	h := mat.NewSymDense(3, nil)
	neg := mat.NewSymDense(3, nil)
	for k := range 50 {
		theta := randVec(rng, 3, []float64{0.01, 1, 10}[k%3])
		l.Hessian(h, theta)
		neg.ScaleSym(-1, h)
		if !eig.Factorize(neg, false) {
			t.Fatal("EigenSym failed")
		}
		v := eig.Values(nil)
		if v[0] < m*(1-1e-12) || v[2] > M*(1+1e-12) {
			t.Errorf("θ=%v: eigenvalues of −Hessian %v outside [m, M] = [%g, %g]", theta, v, m, M)
		}
	}
}

func TestLogisticMode(t *testing.T) {
	l := newTestLogistic(t)
	mode, err := l.Mode(1e-12, 50)
	if err != nil {
		t.Fatal(err)
	}
	g := make([]float64, 3)
	l.GradLogDensity(g, mode)
	if n := math.Sqrt(dot(g, g)); n > 1e-8 {
		t.Errorf("‖∇log π(mode)‖ = %g, want < 1e-8", n)
	}
	// Reference: gonum optimize.Minimize with BFGS on f = −log π.
	problem := optimize.Problem{
		Func: func(x []float64) float64 { return -l.LogDensity(x) },
		Grad: func(grad, x []float64) {
			l.GradLogDensity(grad, x)
			for j := range grad {
				grad[j] = -grad[j]
			}
		},
	}
	res, err := optimize.Minimize(problem, make([]float64, 3), &optimize.Settings{GradientThreshold: 1e-10}, &optimize.BFGS{})
	if err != nil {
		t.Fatal(err)
	}
	for j := range mode {
		if math.Abs(mode[j]-res.X[j]) > 1e-5 {
			t.Errorf("mode[%d] = %.10g, BFGS %.10g", j, mode[j], res.X[j])
		}
	}
	// One Newton step cannot reach ‖step‖∞ < 1e-12 from θ = 0 here.
	if _, err := l.Mode(1e-12, 1); err == nil {
		t.Error("Mode with maxIter=1 converged, want an error")
	}
	if _, err := l.Mode(0, 10); err == nil {
		t.Error("Mode with tol=0 succeeded, want an error")
	}
}

func TestNewLogisticErrors(t *testing.T) {
	x, y := logisticData(rand.New(rand.NewPCG(71, 72)), 5, 2)
	badY := append([]float64(nil), y...)
	badY[2] = 2
	nanX := mat.DenseCopyOf(x)
	nanX.Set(1, 1, math.NaN())
	cases := []struct {
		name  string
		x     *mat.Dense
		y     []float64
		alpha float64
	}{
		{"y=2", x, badY, 1},
		{"alpha=0", x, y, 0},
		{"alpha<0", x, y, -1},
		{"alpha NaN", x, y, math.NaN()},
		{"alpha Inf", x, y, math.Inf(1)},
		{"NaN in x", nanX, y, 1},
		{"length mismatch", x, y[:4], 1},
		{"nil x", nil, y, 1},
		{"empty x", &mat.Dense{}, y, 1},
	}
	for _, c := range cases {
		if l, err := NewLogistic(c.x, c.y, c.alpha); err == nil {
			t.Errorf("%s: NewLogistic returned %v, want an error", c.name, l)
		}
	}
	l, err := NewLogistic(x, y, 1)
	if err != nil {
		t.Fatal(err)
	}
	if l.Rows() != 5 || l.Dim() != 2 {
		t.Errorf("Rows, Dim = %d, %d, want 5, 2", l.Rows(), l.Dim())
	}
	// The design is copied: changing the caller's matrix changes nothing.
	before := l.LogDensity([]float64{0.3, 0.4})
	x.Set(0, 0, 100)
	if after := l.LogDensity([]float64{0.3, 0.4}); after != before {
		t.Errorf("LogDensity changed from %v to %v after editing the input", before, after)
	}
}

func TestSoftplusSigmoidStable(t *testing.T) {
	// Reference: the definitions log(1+e^z) and 1/(1+e^−z) evaluated
	// directly where they do not overflow.
	for _, z := range []float64{-30, -5, -0.5, 0, 0.5, 5, 30} {
		if got, want := softplus(z), math.Log(1+math.Exp(z)); !scalar.EqualWithinAbsOrRel(got, want, 1e-15, 1e-14) {
			t.Errorf("softplus(%g) = %.17g, want %.17g", z, got, want)
		}
		if got, want := sigmoid(z), 1/(1+math.Exp(-z)); !scalar.EqualWithinAbsOrRel(got, want, 1e-15, 1e-14) {
			t.Errorf("sigmoid(%g) = %.17g, want %.17g", z, got, want)
		}
	}
	// Large |z|: softplus(z) → z and → 0, σ → 1 and → 0, with no Inf or NaN
	// (limits of the definitions).
	if softplus(800) != 800 || softplus(-800) != 0 || sigmoid(800) != 1 || sigmoid(-800) != 0 {
		t.Errorf("extremes: softplus(±800) = %v, %v; sigmoid(±800) = %v, %v",
			softplus(800), softplus(-800), sigmoid(800), sigmoid(-800))
	}
	l := newTestLogistic(t)
	theta := []float64{1e3, -1e3, 1e3}
	g := make([]float64, 3)
	l.GradLogDensity(g, theta)
	if v := l.LogDensity(theta); math.IsNaN(v) || math.IsInf(v, 0) || !allFinite(g) {
		t.Errorf("at θ = %v: LogDensity %v, gradient %v, want finite", theta, v, g)
	}
}

func TestEvalBatch(t *testing.T) {
	rng := rand.New(rand.NewPCG(81, 82))
	gauss, err := NewGaussian([]float64{1, -1, 0.5}, randomSPD(rng, 3))
	if err != nil {
		t.Fatal(err)
	}
	for _, tg := range []Target{gauss, newTestLogistic(t)} {
		const rows = 6
		p := tg.Dim()
		points := randVec(rng, rows*p, 1)
		grad := make([]float64, rows*p)
		ld := make([]float64, rows)
		EvalBatch(tg, points, rows, grad, ld)
		// Reference: the definition, row-by-row calls (exact equality).
		for i := range rows {
			x := points[i*p : (i+1)*p]
			want := make([]float64, p)
			tg.GradLogDensity(want, x)
			for j := range p {
				if grad[i*p+j] != want[j] {
					t.Errorf("%T row %d coord %d: batch %v, single %v", tg, i, j, grad[i*p+j], want[j])
				}
			}
			if w := tg.LogDensity(x); ld[i] != w {
				t.Errorf("%T row %d: batch log density %v, single %v", tg, i, ld[i], w)
			}
		}
		grad2 := make([]float64, rows*p)
		EvalBatch(tg, points, rows, grad2, nil)
		for k := range grad {
			if grad2[k] != grad[k] {
				t.Fatalf("%T: nil logDensity changed the gradients", tg)
			}
		}
		EvalBatch(tg, nil, 0, nil, nil) // zero rows is fine

		expectPanic(t, "short points", func() { EvalBatch(tg, points[1:], rows, grad, ld) })
		expectPanic(t, "short grad", func() { EvalBatch(tg, points, rows, grad[1:], ld) })
		expectPanic(t, "short logDensity", func() { EvalBatch(tg, points, rows, grad, ld[1:]) })
		expectPanic(t, "negative rows", func() { EvalBatch(tg, nil, -1, nil, nil) })
		expectPanic(t, "grad dst length", func() { tg.GradLogDensity(make([]float64, p+1), points[:p]) })
		expectPanic(t, "grad x length", func() { tg.GradLogDensity(make([]float64, p), points[:p-1]) })
		expectPanic(t, "grad aliasing", func() { tg.GradLogDensity(points[:p], points[:p]) })
		expectPanic(t, "log density length", func() { tg.LogDensity(points[:p+1]) })
	}
}

func TestNoAllocations(t *testing.T) {
	rng := rand.New(rand.NewPCG(91, 92))
	gauss, err := NewGaussian(randVec(rng, 20, 1), randomSPD(rng, 20))
	if err != nil {
		t.Fatal(err)
	}
	for _, tg := range []Target{gauss, newTestLogistic(t)} {
		p := tg.Dim()
		x := randVec(rng, p, 1)
		dst := make([]float64, p)
		var sink float64
		// Reference: testing.AllocsPerRun (allocation budget of zero is the
		// package's contract, doc.go).
		if a := testing.AllocsPerRun(100, func() { tg.GradLogDensity(dst, x) }); a != 0 {
			t.Errorf("%T.GradLogDensity allocates %v per call", tg, a)
		}
		if a := testing.AllocsPerRun(100, func() { sink += tg.LogDensity(x) }); a != 0 {
			t.Errorf("%T.LogDensity allocates %v per call", tg, a)
		}
		_ = sink
	}
}

func TestConcurrentUse(t *testing.T) {
	// Run under -race: concurrent evaluation must not write shared state.
	// The expected values are the single-goroutine results (exact equality).
	l := newTestLogistic(t)
	gauss, _ := NewGaussian([]float64{0, 0}, q2())
	for _, tg := range []Target{gauss, l} {
		p := tg.Dim()
		x := make([]float64, p)
		for j := range x {
			x[j] = 0.1 * float64(j+1)
		}
		want := make([]float64, p)
		tg.GradLogDensity(want, x)
		wantLD := tg.LogDensity(x)
		done := make(chan error)
		for range 8 {
			go func() {
				g := make([]float64, p)
				for range 100 {
					tg.GradLogDensity(g, x)
					if tg.LogDensity(x) != wantLD {
						done <- fmt.Errorf("%T: log density differs", tg)
						return
					}
					for j := range g {
						if g[j] != want[j] {
							done <- fmt.Errorf("%T: gradient differs", tg)
							return
						}
					}
				}
				done <- nil
			}()
		}
		for range 8 {
			if err := <-done; err != nil {
				t.Error(err)
			}
		}
	}
}

func BenchmarkGaussianGrad(b *testing.B) {
	for _, p := range []int{10, 100, 1000} {
		b.Run(fmt.Sprintf("p=%d", p), func(b *testing.B) {
			rng := rand.New(rand.NewPCG(101, uint64(p)))
			g, err := NewGaussian(randVec(rng, p, 1), randomSPD(rng, p))
			if err != nil {
				b.Fatal(err)
			}
			x := randVec(rng, p, 1)
			dst := make([]float64, p)
			b.ReportAllocs()
			for b.Loop() {
				g.GradLogDensity(dst, x)
			}
		})
	}
}

func BenchmarkLogisticGrad(b *testing.B) {
	for _, sz := range []struct{ n, p int }{{1000, 10}, {10000, 100}} {
		b.Run(fmt.Sprintf("n=%d,p=%d", sz.n, sz.p), func(b *testing.B) {
			rng := rand.New(rand.NewPCG(111, uint64(sz.n)))
			x, y := logisticData(rng, sz.n, sz.p)
			l, err := NewLogistic(x, y, 1)
			if err != nil {
				b.Fatal(err)
			}
			theta := randVec(rng, sz.p, 0.1)
			dst := make([]float64, sz.p)
			b.ReportAllocs()
			for b.Loop() {
				l.GradLogDensity(dst, theta)
			}
		})
	}
}
