package kernels

// Internal tests: the MALA test vectors (computed for the project) need the unexported acceptance
// ratio. The driver and Monte Carlo error helpers are in drive_test.go.

import (
	"bytes"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/integrate"
	"gonum.org/v1/gonum/mat"

	"sluice/kernels/targets"
)

// malaEval answers a request exactly from t (log density and gradient).
func malaEval(t targets.Target) func(*Request, *Answer) {
	return func(req *Request, a *Answer) {
		p := t.Dim()
		a.Reserve(req.Need, req.Rows, p)
		targets.EvalBatch(t, req.Points[:req.Rows*p], req.Rows, a.Grad[:req.Rows*p], a.LogDensity[:req.Rows])
	}
}

func malaGaussian(t *testing.T, q []float64) *targets.Gaussian {
	t.Helper()
	p := int(math.Sqrt(float64(len(q))))
	g, err := targets.NewGaussian(make([]float64, p), mat.NewSymDense(p, append([]float64(nil), q...)))
	if err != nil {
		t.Fatal(err)
	}
	return g
}

// malaAccepts returns per chain the 0/1 series "the draw moved", which is
// the acceptance indicator (a proposal equals the current point with
// probability 0), for draws 1 … n−1 of d (out[coord][chain][draw]).
func malaAccepts(d [][][]float64) [][]float64 {
	out := make([][]float64, len(d[0]))
	for c := range out {
		n := len(d[0][c])
		out[c] = make([]float64, n-1)
		for t := 1; t < n; t++ {
			for i := range d {
				if d[i][c][t] != d[i][c][t-1] {
					out[c][t-1] = 1
					break
				}
			}
		}
	}
	return out
}

// MALA test vectors computed for the project (standard normal target, log π = −‖x‖²/2,
// ∇log π = −x): A exactly and α = min{1, e^A}.
func TestMALAAcceptanceVectors(t *testing.T) {
	for _, tc := range []struct {
		x, y     []float64
		h, a, al float64
	}{
		{[]float64{0.5}, []float64{2.0}, 0.5, -0.46875, 0.6257840096},
		{[]float64{-1, 0.5}, []float64{1.5, 1.0}, 0.3, -0.15, 0.8607079764},
		{[]float64{1.0}, []float64{0.5}, 0.25, 0.046875, 1},
	} {
		lp := func(v []float64) float64 {
			var s float64
			for _, e := range v {
				s += e * e
			}
			return -s / 2
		}
		neg := func(v []float64) []float64 {
			out := make([]float64, len(v))
			for i, e := range v {
				out[i] = -e
			}
			return out
		}
		a := malaLogAccept(tc.x, tc.y, lp(tc.x), lp(tc.y), neg(tc.x), neg(tc.y), tc.h)
		if math.Abs(a-tc.a) > 1e-12 {
			t.Errorf("x %v y %v h %v: A = %.15g, want %v", tc.x, tc.y, tc.h, a, tc.a)
		}
		if al := math.Min(1, math.Exp(a)); math.Abs(al-tc.al) > 1e-10 {
			t.Errorf("x %v y %v h %v: α = %.12g, want %v", tc.x, tc.y, tc.h, al, tc.al)
		}
	}
}

// Two steps by hand, replaying the documented use of the stream: the
// start's answer draws the first proposals' normals chain by chain; a step
// draws one uniform per chain, then the next normals (Roberts and Tweedie 1996).
func TestMALAStepByHand(t *testing.T) {
	const seed, h = 17, 0.3
	target := malaGaussian(t, []float64{1, 0, 0, 1})
	k := NewMALA(2, 3, h, 0, []float64{1, -1, 0.5, 2, -0.3, 0.1}, NewSource(seed))
	rng := rand.New(NewSource(seed))
	eval := malaEval(target)
	x := append([]float64(nil), k.Positions()...)
	grad := func(v []float64) []float64 { return []float64{-v[0], -v[1]} }
	a := &Answer{}
	eval(k.Next(), a)
	if k.Tell(a) || k.Steps() != 0 {
		t.Fatal("the start's answer completed a step")
	}
	for step := range 2 {
		want := make([]float64, 6)
		for c := range 3 {
			g := grad(x[2*c:])
			for i := range 2 {
				want[2*c+i] = x[2*c+i] + h*g[i] + math.Sqrt(2*h)*rng.NormFloat64()
			}
		}
		req := k.Next()
		for i := range want {
			if req.Points[i] != want[i] {
				t.Fatalf("step %d: proposal %v, want %v", step, req.Points[:6], want)
			}
		}
		eval(req, a)
		k.Tell(a)
		for c := range 3 {
			xc, yc := x[2*c:2*c+2], want[2*c:2*c+2]
			la := malaLogAccept(xc, yc, target.LogDensity(xc), target.LogDensity(yc), grad(xc), grad(yc), h)
			if math.Log(rng.Float64()) < la {
				copy(xc, yc)
			}
		}
		for i := range x {
			if k.Positions()[i] != x[i] {
				t.Fatalf("step %d: positions %v, want %v", step, k.Positions(), x)
			}
		}
	}
}

// Evaluation accounting (by the method's definition: one point per proposal): one point
// with log density and gradient per chain per step, plus one per chain at
// the start.
func TestMALAEvaluationsPerStep(t *testing.T) {
	target := malaGaussian(t, []float64{2, .5, .5, 1})
	k := NewMALA(2, 5, 0.2, 3, make([]float64, 2), NewSource(1))
	if k.EvaluationsPerStep() != 5 {
		t.Fatalf("evaluations per step %d, want 5", k.EvaluationsPerStep())
	}
	var rows int
	a := &Answer{}
	for k.Steps() < 7 {
		req := k.Next()
		if req.Need != NeedGradient|NeedLogDensity || req.Rows != 5 {
			t.Fatalf("request %+v", req)
		}
		rows += req.Rows
		malaEval(target)(req, a)
		k.Tell(a)
	}
	if rows != 5*(7+1) {
		t.Fatalf("%d rows for 7 steps of 5 chains, want 40", rows)
	}
}

// MALA leaves π invariant at any step (Roberts and Tweedie 1996). On N(0, Q⁻¹) with
// Q = [[2, .5], [.5, 1]] and a fixed h = 0.5, where ULA's stationary
// covariance is [Q(I − hQ/2)]⁻¹ (derived here, discrete Lyapunov equation) with entries about twice
// those of Q⁻¹, the means and every covariance entry must lie within
// 4 MCSE of 0 and Q⁻¹, and the variances more than 4 MCSE from ULA's.
func TestMALAGaussianUnbiased(t *testing.T) {
	q := []float64{2, .5, .5, 1}
	const h = 0.5
	target := malaGaussian(t, q)
	cov := target.Covariance()
	var ula mat.Dense // [Q(I − hQ/2)]⁻¹ = (Q − hQ²/2)⁻¹
	qm := mat.NewDense(2, 2, q)
	ula.Mul(qm, qm)
	ula.Scale(-h/2, &ula)
	ula.Add(qm, &ula)
	if err := ula.Inverse(&ula); err != nil {
		t.Fatal(err)
	}
	k := NewMALA(2, 16, h, 0, []float64{2, -2}, NewSource(31))
	d := driveKernel(k, malaEval(target), 200, 10200)
	for i := range 2 {
		est, se := statOf(d, func(x []float64) float64 { return x[i] })
		if z := est / se; math.Abs(z) > 4 {
			t.Errorf("mean[%d] = %.5f, exact 0, MCSE %.5f (z = %.1f)", i, est, se, z)
		}
		for j := i; j < 2; j++ {
			est, se := statOf(d, func(x []float64) float64 { return x[i] * x[j] })
			if z := (est - cov.At(i, j)) / se; math.Abs(z) > 4 {
				t.Errorf("Σ[%d][%d] = %.5f, exact %.5f, MCSE %.5f (z = %.1f)", i, j, est, cov.At(i, j), se, z)
			}
			if z := (est - ula.At(i, j)) / se; i == j && math.Abs(z) < 4 {
				t.Errorf("Σ[%d][%d] = %.5f indistinguishable from ULA's %.5f (MCSE %.5f)", i, j, est, ula.At(i, j), se)
			}
		}
	}
	if k.Step() != h || k.Adapting() {
		t.Fatalf("burnIn 0 changed the step to %v", k.Step())
	}
}

// malaExpectedAcceptance estimates E_π[min{1, e^A}] for N(0, Q⁻¹) at step
// h from n exact independent draws x = L⁻ᵀz (Q = LLᵀ, gonum Cholesky and
// inverse) and fresh proposals, with its standard error. It shares no code
// with the kernel's chains beyond malaLogAccept, checked against
// Roberts and Rosenthal (1998).
func malaExpectedAcceptance(t *testing.T, target *targets.Gaussian, h float64, n int, seed uint64) (mean, se float64) {
	var ch mat.Cholesky
	if !ch.Factorize(target.Precision()) {
		t.Fatal("precision not positive definite")
	}
	var l mat.TriDense
	ch.LTo(&l)
	var lit mat.Dense // L⁻ᵀ
	if err := lit.Inverse(l.T()); err != nil {
		t.Fatal(err)
	}
	rng := rand.New(NewSource(seed))
	p := target.Dim()
	z, x, y := make([]float64, p), make([]float64, p), make([]float64, p)
	gx, gy := make([]float64, p), make([]float64, p)
	var s, s2 float64
	for range n {
		for i := range p {
			z[i] = rng.NormFloat64()
		}
		for i := range p {
			x[i] = 0
			for j := range p {
				x[i] += lit.At(i, j) * z[j]
			}
		}
		target.GradLogDensity(gx, x)
		for i := range p {
			y[i] = x[i] + h*gx[i] + math.Sqrt(2*h)*rng.NormFloat64()
		}
		target.GradLogDensity(gy, y)
		a := math.Min(1, math.Exp(malaLogAccept(x, y, target.LogDensity(x), target.LogDensity(y), gx, gy, h)))
		s += a
		s2 += a * a
	}
	mean = s / float64(n)
	return mean, math.Sqrt((s2/float64(n) - mean*mean) / float64(n-1))
}

// Step adaptation during burn-in only. From a step 100× too small and one
// 10× too large, after 1500 burn-in steps of 16 chains on N(0, Q⁻¹): the
// step is frozen (Adapting false, Step unchanged by later steps), the
// acceptance counts restart at burn-in, the chains' acceptance rate after
// burn-in matches E_π[α(h)] estimated independently (within 4 combined
// standard errors: MCSE of the 0/1 series with its ESS from diag, and the
// i.i.d. error), and E_π[α(h)] is within 0.05 of the target 0.574. The
// last bound is a design tolerance of the Robbins–Monro rule: at t = 1500
// its gain is 0.012 and the mean acceptance of 16 chains has sd ≈ 0.12, so
// log h fluctuates by about √(0.012·0.12²/2) ≈ 0.01 and α by less than
// 0.01 (common practice; the rule is not from a published result).
func TestMALAAdaptation(t *testing.T) {
	target := malaGaussian(t, []float64{2, .5, .5, 1})
	for seed, h0 := range map[uint64]float64{41: 0.005, 42: 5} {
		t.Run(fmt.Sprintf("h0=%v", h0), func(t *testing.T) {
			const burnIn = 1500
			k := NewMALA(2, 16, h0, burnIn, []float64{1, 1}, NewSource(seed))
			eval := malaEval(target)
			a := &Answer{}
			for k.Steps() < burnIn {
				if !k.Adapting() {
					t.Fatalf("not adapting at step %d", k.Steps())
				}
				eval(k.Next(), a)
				k.Tell(a)
			}
			if k.Adapting() {
				t.Fatal("still adapting after burn-in")
			}
			if r := k.AcceptanceRates(); !math.IsNaN(r[0]) {
				t.Fatalf("acceptance rates not restarted at burn-in: %v", r)
			}
			h := k.Step()
			d := driveKernel(k, eval, burnIn, burnIn+4000)
			if k.Step() != h {
				t.Fatalf("step moved from %v to %v after burn-in", h, k.Step())
			}
			acc := malaAccepts(d)
			var rate float64
			for c, r := range k.AcceptanceRates() {
				var s float64
				for _, v := range acc[c] {
					s += v
				}
				// the kernel's counts include the first draw's step, which
				// acc (moves between recorded draws) leaves out
				if math.Abs(r*4000-s) > 1 {
					t.Fatalf("chain %d: kernel rate %v, %v moves in 3999 steps", c, r, s)
				}
				rate += r / 16
			}
			_, se := seriesMean(acc)
			want, wse := malaExpectedAcceptance(t, target, h, 100000, seed+100)
			t.Logf("h0 %v → h %.4f: acceptance %.4f ± %.4f, E_π[α(h)] = %.4f ± %.4f", h0, h, rate, se, want, wse)
			if z := (rate - want) / math.Hypot(se, wse); math.Abs(z) > 4 {
				t.Errorf("acceptance %.4f, expected %.4f (z = %.1f)", rate, want, z)
			}
			if math.Abs(want-malaTarget) > 0.05 {
				t.Errorf("adapted step %v has expected acceptance %.4f, target %v", h, want, malaTarget)
			}
		})
	}
}

// malaLogisticData is an invented data set: 50 rows (1, u_i) with
// u_i ~ N(0, 1) and labels drawn from P(y=1) = σ(0.5 − 1.2u_i), seed 7.
func malaLogisticData(t *testing.T) *targets.Logistic {
	const n = 50
	rng := rand.New(NewSource(7))
	x := mat.NewDense(n, 2, nil)
	y := make([]float64, n)
	for i := range n {
		u := rng.NormFloat64()
		x.Set(i, 0, 1)
		x.Set(i, 1, u)
		if rng.Float64() < 1/(1+math.Exp(-(0.5-1.2*u))) {
			y[i] = 1
		}
	}
	l, err := targets.NewLogistic(x, y, 1)
	if err != nil {
		t.Fatal(err)
	}
	return l
}

// malaQuadrature returns the posterior mean and covariance of the
// 2-parameter target by Simpson's rule (gonum integrate.Simpsons) on an
// n×n grid spanning the mode ± 12 Laplace standard deviations per axis.
func malaQuadrature(t *testing.T, l *targets.Logistic, n int) (mean [2]float64, cov [2][2]float64) {
	mode, err := l.Mode(1e-12, 100)
	if err != nil {
		t.Fatal(err)
	}
	hess := mat.NewSymDense(2, nil)
	l.Hessian(hess, mode)
	var neg, lap mat.Dense
	neg.Scale(-1, hess)
	if err := lap.Inverse(&neg); err != nil {
		t.Fatal(err)
	}
	axis := make([][]float64, 2)
	for i := range 2 {
		sd := math.Sqrt(lap.At(i, i))
		axis[i] = make([]float64, n)
		for j := range n {
			axis[i][j] = mode[i] + sd*(-12+24*float64(j)/float64(n-1))
		}
	}
	lpMode := l.LogDensity(mode)
	// moments[f] integrates w·f with f ∈ {1, θ₀, θ₁, θ₀², θ₀θ₁, θ₁²}
	var moments [6]float64
	inner := make([][6]float64, n)
	col := make([]float64, n)
	theta := make([]float64, 2)
	for a := range n {
		vals := make([][6]float64, n)
		for b := range n {
			theta[0], theta[1] = axis[0][a], axis[1][b]
			w := math.Exp(l.LogDensity(theta) - lpMode)
			vals[b] = [6]float64{w, w * theta[0], w * theta[1], w * theta[0] * theta[0], w * theta[0] * theta[1], w * theta[1] * theta[1]}
		}
		for f := range 6 {
			for b := range n {
				col[b] = vals[b][f]
			}
			inner[a][f] = integrate.Simpsons(axis[1], col)
		}
	}
	for f := range 6 {
		for a := range n {
			col[a] = inner[a][f]
		}
		moments[f] = integrate.Simpsons(axis[0], col)
	}
	z := moments[0]
	mean = [2]float64{moments[1] / z, moments[2] / z}
	cov[0][0] = moments[3]/z - mean[0]*mean[0]
	cov[0][1] = moments[4]/z - mean[0]*mean[1]
	cov[1][1] = moments[5]/z - mean[1]*mean[1]
	cov[1][0] = cov[0][1]
	return mean, cov
}

// MALA on a Bayesian logistic regression posterior (2 parameters, 50
// invented rows, prior N(0, I)): the posterior mean and covariance by
// quadrature (malaQuadrature, converged: 81 and 161 points per axis agree
// to 1e-9) must match the chains' moments within 4 MCSE, with the step
// adapted during burn-in.
func TestMALALogisticPosterior(t *testing.T) {
	l := malaLogisticData(t)
	mean, cov := malaQuadrature(t, l, 161)
	m2, c2 := malaQuadrature(t, l, 81)
	for i := range 2 {
		if math.Abs(mean[i]-m2[i]) > 1e-9 {
			t.Fatalf("quadrature mean[%d] not converged: %v vs %v", i, mean[i], m2[i])
		}
		for j := range 2 {
			if math.Abs(cov[i][j]-c2[i][j]) > 1e-9 {
				t.Fatalf("quadrature cov[%d][%d] not converged: %v vs %v", i, j, cov[i][j], c2[i][j])
			}
		}
	}
	t.Logf("posterior mean %v, covariance %v", mean, cov)
	const burnIn = 1000
	k := NewMALA(2, 16, 0.05, burnIn, []float64{0, 0}, NewSource(51))
	d := driveKernel(k, malaEval(l), burnIn, burnIn+6000)
	t.Logf("adapted step %.4f, acceptance rates %.3f", k.Step(), k.AcceptanceRates()[:4])
	for i := range 2 {
		est, se := statOf(d, func(x []float64) float64 { return x[i] })
		if z := (est - mean[i]) / se; math.Abs(z) > 4 {
			t.Errorf("mean[%d] = %.5f, quadrature %.5f, MCSE %.5f (z = %.1f)", i, est, mean[i], se, z)
		}
		for j := i; j < 2; j++ {
			est, se := statOf(d, func(x []float64) float64 { return (x[i] - mean[i]) * (x[j] - mean[j]) })
			if z := (est - cov[i][j]) / se; math.Abs(z) > 4 {
				t.Errorf("cov[%d][%d] = %.5f, quadrature %.5f, MCSE %.5f (z = %.1f)", i, j, est, cov[i][j], se, z)
			}
		}
	}
}

// A checkpointed kernel resumes bit for bit: before the start's answer,
// during burn-in and after it.
func TestMALAStateRoundTrip(t *testing.T) {
	target := malaGaussian(t, []float64{2, .5, .5, 1})
	eval := malaEval(target)
	for _, tells := range []int{0, 5, 40} {
		t.Run(fmt.Sprintf("tells=%d", tells), func(t *testing.T) {
			k := NewMALA(2, 3, 0.4, 20, []float64{1, -1}, NewSource(5))
			a := &Answer{}
			for range tells {
				eval(k.Next(), a)
				k.Tell(a)
			}
			state, err := k.MarshalBinary()
			if err != nil {
				t.Fatal(err)
			}
			var r MALA
			if err := r.UnmarshalBinary(state); err != nil {
				t.Fatal(err)
			}
			if r.Steps() != k.Steps() || r.Step() != k.Step() || r.Adapting() != k.Adapting() || r.BurnIn() != 20 {
				t.Fatalf("restored header wrong: steps %d h %v", r.Steps(), r.Step())
			}
			want := driveKernel(k, eval, 0, k.Steps()+30)
			got := driveKernel(&r, eval, 0, r.Steps()+30)
			for i := range want {
				for c := range want[i] {
					for s := range want[i][c] {
						if want[i][c][s] != got[i][c][s] {
							t.Fatalf("resumed draw differs at coord %d chain %d step %d", i, c, s)
						}
					}
				}
			}
			if k.Step() != r.Step() || fmt.Sprint(k.AcceptanceRates()) != fmt.Sprint(r.AcceptanceRates()) {
				t.Fatal("step size or acceptance rates differ after identical continuation")
			}
			again, _ := r.MarshalBinary()
			now, _ := k.MarshalBinary()
			if !bytes.Equal(again, now) {
				t.Fatal("states differ after identical continuation")
			}
			if err := r.UnmarshalBinary(state[:40]); err == nil {
				t.Fatal("truncated state accepted")
			}
			if err := r.UnmarshalBinary([]byte("sluice.ozaki.v1 not ours")); err == nil {
				t.Fatal("foreign state accepted")
			}
		})
	}
}

// A warmed-up step allocates nothing.
func TestMALAStepAllocatesNothing(t *testing.T) {
	k := NewMALA(10, 8, 0.1, 50, make([]float64, 10), NewSource(1))
	a := &Answer{}
	a.Reserve(NeedGradient|NeedLogDensity, 8, 10)
	k.Tell(a)
	if n := testing.AllocsPerRun(100, func() {
		k.Next()
		k.Tell(a)
	}); n != 0 {
		t.Fatalf("%v allocations per step", n)
	}
}

func TestMALAPanicsOnProgrammerErrors(t *testing.T) {
	for name, f := range map[string]func(){
		"zero step":      func() { NewMALA(1, 1, 0, 0, []float64{0}, NewSource(1)) },
		"NaN step":       func() { NewMALA(1, 1, math.NaN(), 0, []float64{0}, NewSource(1)) },
		"negative burn":  func() { NewMALA(1, 1, 0.1, -1, []float64{0}, NewSource(1)) },
		"bad start":      func() { NewMALA(2, 2, 0.1, 0, []float64{0, 0, 0}, NewSource(1)) },
		"no log density": func() { NewMALA(2, 1, 0.1, 0, []float64{0, 0}, NewSource(1)).Tell(&Answer{Grad: []float64{0, 0}}) },
	} {
		func() {
			defer func() {
				if recover() == nil {
					t.Errorf("%s: no panic", name)
				}
			}()
			f()
		}()
	}
}

// BenchmarkMALAStep reports one MALA step over all chains with the answers
// already supplied (a standard normal's values at the first proposals);
// ns/coord is per chain-coordinate.
func BenchmarkMALAStep(b *testing.B) {
	for _, p := range []int{10, 100, 1000} {
		for _, c := range []int{8, 64} {
			b.Run(fmt.Sprintf("mala/p=%d/chains=%d", p, c), func(b *testing.B) {
				k := NewMALA(p, c, 0.5/float64(p), 0, make([]float64, p), NewSource(1))
				a := &Answer{}
				a.Reserve(NeedGradient|NeedLogDensity, c, p)
				k.Tell(a)
				pts := k.Next().Points
				for r := range c {
					var s float64
					for i := range p {
						v := pts[r*p+i]
						a.Grad[r*p+i] = -v
						s += v * v
					}
					a.LogDensity[r] = -s / 2
				}
				b.ReportAllocs()
				for b.Loop() {
					k.Next()
					k.Tell(a)
				}
				b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(p*c), "ns/coord")
			})
		}
	}
}
