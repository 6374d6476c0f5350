package kernels

import (
	"fmt"
	"math"
	"testing"

	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/mat"
)

// sgldcvNewtonMode returns the mode of the project's 1-D logistic test posterior
// by Newton's method on f'(θ) = θ + Σ_i x_i(σ(θx_i) − y_i) with
// f”(θ) = 1 + Σ_i x_i² σ(1 − σ), from 0 until the step is below 1e-15.
func sgldcvNewtonMode() float64 {
	th := 0.0
	for range 100 {
		g, hh := -sgldLogScore(th), 1.0
		for _, x := range sgldLogX {
			s := 1 / (1 + math.Exp(-th*x))
			hh += x * x * s * (1 - s)
		}
		step := g / hh
		th -= step
		if math.Abs(step) < 1e-15 {
			break
		}
	}
	return th
}

// sgldcvSearch answers k's search requests exactly on the 1-D logistic test
// problem until it samples, checking every search request's shape and
// that no step completes; it returns the number of full-data rows asked.
func sgldcvSearch(t *testing.T, k *SGLDCV) int {
	t.Helper()
	start := append([]float64(nil), k.Positions()...)
	a := NewAnswer(2*k.Chains(), 1)
	rows := 0
	for !k.Sampling() {
		req := k.Next()
		if req.Rows != 1 || req.Need != NeedGradient|NeedFullData || len(req.Points) != 1 ||
			len(req.Chain) != 1 || req.Chain[0] != 0 || req.Group != nil {
			t.Fatalf("search request %+v", req)
		}
		rows += req.Rows
		a.Grad[0] = sgldLogScore(req.Points[0])
		if k.Tell(a) {
			t.Fatal("a search Tell completed a step")
		}
		if rows > 1000 {
			t.Fatal("search does not end")
		}
	}
	if k.Steps() != 0 {
		t.Fatalf("%d steps during the search", k.Steps())
	}
	for i, v := range k.Positions() {
		if v != start[i] {
			t.Fatal("chains moved during the search")
		}
	}
	return rows
}

// The search finds the mode of the project's 1-D logistic test posterior
// (1.0175815334 by Newton there) through the ask/tell protocol: our own
// Newton iteration reproduces the computed value to 1e-9, and θ̂ is
// within 1e-8 of it. The search costs exactly Iterations()+1 full-data
// rows, one point per request, none of which completes a step.
func TestSGLDCVFindsTheoryMode(t *testing.T) {
	newton := sgldcvNewtonMode()
	if math.Abs(newton-1.0175815334) > 1e-9 {
		t.Fatalf("Newton mode %.12f, computed value 1.0175815334", newton)
	}
	k := NewSGLDCV(1, 4, 0.3, SGLDCVOptions{Tol: 1e-9}, []float64{0.2, 1.4, -0.5, 0.9}, NewSource(1))
	if k.Sampling() || k.Iterations() != 0 {
		t.Fatal("new kernel not searching")
	}
	if th, g := k.FixedPoint(); th != nil || g != nil {
		t.Fatal("fixed point reported before the search ended")
	}
	if p := k.Next().Points[0]; p != 0.5 {
		t.Fatalf("search starts at %v, want the mean of the starts 0.5", p)
	}
	rows := sgldcvSearch(t, k)
	th, g := k.FixedPoint()
	if math.Abs(th[0]-newton) > 1e-8 || !k.Converged() {
		t.Fatalf("θ̂ = %.12f (converged %v), Newton mode %.12f", th[0], k.Converged(), newton)
	}
	if g[0] != sgldLogScore(th[0]) {
		t.Fatalf("kept gradient %v is not the full gradient %v at θ̂", g[0], sgldLogScore(th[0]))
	}
	if rows != k.Iterations()+1 {
		t.Fatalf("%d full-data rows for %d iterations", rows, k.Iterations())
	}
	t.Logf("θ̂ = %.12f after %d iterations (%d full-data evaluations); Newton %.12f", th[0], k.Iterations(), rows, newton)
	// Sampling requests follow: 2 rows per chain.
	if req := k.Next(); req.Rows != 8 || req.Need != NeedGradient {
		t.Fatalf("first sampling request %+v", req)
	}
}

// The search's steps by hand: α_0 = h, then the BB1 step
// α_1 = ‖s‖²/⟨s, y⟩ on ∇f (derived here: 1/α is the secant Rayleigh
// quotient r_in), ascent θ_{k+1} = θ_k + α_k·∇log π(θ_k).
func TestSGLDCVSearchStepsByHand(t *testing.T) {
	const h = 0.3
	k := NewSGLDCV(1, 1, h, SGLDCVOptions{Tol: 1e-12}, []float64{0}, NewSource(1))
	a := NewAnswer(2, 1)
	th0 := k.Next().Points[0]
	g0 := sgldLogScore(th0)
	a.Grad[0] = g0
	k.Tell(a)
	th1 := k.Next().Points[0]
	if th1 != th0+h*g0 {
		t.Fatalf("θ_1 = %v, want θ_0 + h·g_0 = %v", th1, th0+h*g0)
	}
	g1 := sgldLogScore(th1)
	a.Grad[0] = g1
	k.Tell(a)
	s, y := th1-th0, -(g1 - g0)
	alpha := s * s / (s * y)
	if th2 := k.Next().Points[0]; math.Abs(th2-(th1+alpha*g1)) > 1e-15 {
		t.Fatalf("θ_2 = %v, want θ_1 + α_1·g_1 = %v (α_1 = %v)", th2, th1+alpha*g1, alpha)
	}
	if k.Iterations() != 2 || k.Sampling() {
		t.Fatalf("iterations %d, sampling %v", k.Iterations(), k.Sampling())
	}
}

// With MaxIter reached first the search stops unconverged after MaxIter+1
// full-data rows and keeps the visited point with the smallest gradient;
// a start at the exact mode (zero gradient) ends the search at once.
func TestSGLDCVSearchLimits(t *testing.T) {
	k := NewSGLDCV(1, 2, 0.3, SGLDCVOptions{Tol: 1e-12, MaxIter: 2}, []float64{-3}, NewSource(1))
	var pts, norms []float64
	a := NewAnswer(4, 1)
	for !k.Sampling() {
		p := k.Next().Points[0]
		pts = append(pts, p)
		a.Grad[0] = sgldLogScore(p)
		norms = append(norms, math.Abs(a.Grad[0]))
		k.Tell(a)
	}
	if len(pts) != 3 || k.Iterations() != 2 || k.Converged() {
		t.Fatalf("%d full-data rows, %d iterations, converged %v", len(pts), k.Iterations(), k.Converged())
	}
	best := 0
	for i := range norms {
		if norms[i] < norms[best] {
			best = i
		}
	}
	if th, _ := k.FixedPoint(); th[0] != pts[best] {
		t.Fatalf("θ̂ = %v, best visited point %v (norms %v)", th[0], pts[best], norms)
	}
	z := NewSGLDCV(2, 1, 0.1, SGLDCVOptions{}, []float64{0, 0}, NewSource(1))
	z.Tell(NewAnswer(2, 2)) // zero gradient at the start
	if !z.Sampling() || !z.Converged() || z.Iterations() != 0 {
		t.Fatalf("zero-gradient start: sampling %v converged %v iterations %d", z.Sampling(), z.Converged(), z.Iterations())
	}
	if o := z.Options(); o.Tol != 1e-6 || o.MaxIter != 100 {
		t.Fatalf("defaults %+v, documented Tol 1e-6, MaxIter 100", o)
	}
}

// The project's logistic test vectors through the SGLD-CV kernel: 36 chains at
// θ = 0.9 (so the search starts there), search to the mode, then one
// sampling step with chain m's two rows (θ_m and θ̂, same group m)
// answered on pair m. Recovering ĝ_CV from the step must give the CV
// estimate −0.1461817608 (of ∇f) for S = {x₀, x₃}, mean −0.2645247955 and
// variance 0.0060765906 over the 36 pairs.
func TestSGLDCVTheoryVectors(t *testing.T) {
	const h, seed = 0.5, 12
	k := NewSGLDCV(1, 36, h, SGLDCVOptions{Tol: 1e-10}, []float64{0.9}, NewSource(seed))
	sgldcvSearch(t, k)
	req := k.Next()
	if req.Rows != 72 || len(req.Group) != 72 || len(req.Chain) != 72 {
		t.Fatalf("sampling request %+v", req)
	}
	th, _ := k.FixedPoint()
	for c := range 36 {
		if req.Points[c] != 0.9 || req.Points[36+c] != th[0] || req.Chain[c] != c || req.Chain[36+c] != c ||
			req.Group[c] != c || req.Group[36+c] != c {
			t.Fatalf("rows %d and %d: points %v, %v, chains %d, %d, groups %d, %d", c, 36+c,
				req.Points[c], req.Points[36+c], req.Chain[c], req.Chain[36+c], req.Group[c], req.Group[36+c])
		}
	}
	before := append([]float64(nil), k.Positions()...)
	a := NewAnswer(72, 1)
	sgldPairOracle(t)(req, a)
	if !k.Tell(a) || k.Steps() != 1 {
		t.Fatal("sampling step not completed")
	}
	g := sgldRecover(before, k.Positions(), randNormals(seed, 36), h)
	sgldCheckPairs(t, g, -0.1461817608, 0.0060765906)
}

// Evaluation accounting (by the method's definition): Iterations()+1 full-data rows
// once, then 2·chains minibatch rows per step.
func TestSGLDCVEvaluationsPerStep(t *testing.T) {
	k := NewSGLDCV(1, 5, 0.1, SGLDCVOptions{}, []float64{0.3}, NewSource(1))
	_, n := drive(k, sgldPairOracle(t), 0, 7, 1)
	if k.EvaluationsPerStep() != 10 || n.fullRows != k.Iterations()+1 || n.fullRequests != n.fullRows ||
		n.rows != n.fullRows+70 || n.requests != n.fullRequests+7 {
		t.Fatalf("evaluations per step %d, iterations %d, counts %+v", k.EvaluationsPerStep(), k.Iterations(), n)
	}
}

// A checkpointed kernel resumes bit for bit from any phase: during the
// search, right after it, and while sampling (also after Prepare).
func TestSGLDCVStateRoundTrip(t *testing.T) {
	mk := func() sgldOracle { return sgldPairOracle(t) }
	for _, tc := range []struct {
		tells    int
		prepared bool
	}{{0, false}, {2, false}, {2, true}, {30, false}, {30, true}} {
		t.Run(fmt.Sprintf("tells=%d,prepared=%v", tc.tells, tc.prepared), func(t *testing.T) {
			k := NewSGLDCV(1, 3, 0.2, SGLDCVOptions{Tol: 1e-8, MaxIter: 50}, []float64{0.1, 0.4, 2}, NewSource(5))
			a := NewAnswer(6, 1)
			o := mk()
			for range tc.tells {
				o(k.Next(), a)
				k.Tell(a)
			}
			if tc.prepared {
				k.Prepare()
			}
			state, err := k.MarshalBinary()
			if err != nil {
				t.Fatal(err)
			}
			var r SGLDCV
			if err := r.UnmarshalBinary(state); err != nil {
				t.Fatal(err)
			}
			if r.Steps() != k.Steps() || r.Sampling() != k.Sampling() || r.Iterations() != k.Iterations() ||
				r.Converged() != k.Converged() || r.Options() != k.Options() || r.Step() != k.Step() {
				t.Fatal("restored header differs")
			}
			sgldSameRun(t, k, &r, mk, 20)
			if err := r.UnmarshalBinary(state[:40]); err == nil {
				t.Fatal("truncated state accepted")
			}
			if err := r.UnmarshalBinary(state[:len(state)-1]); err == nil {
				t.Fatal("state missing a byte accepted")
			}
			if err := r.UnmarshalBinary([]byte("nonsense")); err == nil {
				t.Fatal("foreign state accepted")
			}
		})
	}
}

// Diabetes regression (see sgldRegression): SGLD-CV's search finds θ̂
// within the bound documented on SGLDCVOptions.Tol, Tol·(λ_max/λ_min)·
// ‖θ_0 − μ‖ [standard for a strongly convex quadratic: ‖∇f(θ)‖ ≥
// λ_min‖θ − μ‖ and ‖∇f(θ_0)‖ ≤ λ_max‖θ_0 − μ‖], the posterior means land
// within 3 MCSE of μ, and the covariance matches the exact prediction with
// the control variate's θ-dependent noise at the kernel's own θ̂ (about
// 11% above the exact-gradient ULA covariance here, against 7× for plain
// SGLD).
func TestSGLDCVDiabetesRegression(t *testing.T) {
	reg := sgldLoadDiabetes(t)
	pr := sgldNewPrediction(reg, sgldRegStep, sgldRegBatch)
	k := NewSGLDCV(reg.p, sgldRegChains, sgldRegStep, SGLDCVOptions{}, make([]float64, reg.p), NewSource(31))
	o := sgldNewMinibatch(reg, sgldRegBatch, 32)
	d, n := drive(k, o.answer, sgldRegBurnIn, sgldRegSteps, sgldRegThin)
	th, _ := k.FixedPoint()
	var eig mat.EigenSym
	if !eig.Factorize(reg.q, false) {
		t.Fatal("eigen-decomposition failed")
	}
	ev := eig.Values(nil)
	bound := k.Options().Tol * ev[len(ev)-1] / ev[0] * floats.Norm(reg.mu, 2) // θ_0 = 0
	dist := floats.Distance(th, reg.mu, 2)
	if !k.Converged() || dist > bound {
		t.Fatalf("‖θ̂ − μ‖ = %.3g, bound %.3g, converged %v", dist, bound, k.Converged())
	}
	if n.fullRows != k.Iterations()+1 || n.rows != n.fullRows+2*sgldRegChains*sgldRegSteps {
		t.Fatalf("counts %+v, iterations %d", n, k.Iterations())
	}
	t.Logf("search: %d iterations, ‖θ̂ − μ‖ = %.3g (bound %.3g, posterior spread %.3g)",
		k.Iterations(), dist, bound, math.Sqrt(sgldPosteriorTrace(reg)))
	ratio := sgldCheckRegression(t, d, reg, pr.cv(th), pr.ula, 3)
	t.Logf("inflation over ULA %.3f", ratio)
}

// A warmed-up sampling step allocates nothing, nor does a search step.
func TestSGLDCVStepAllocatesNothing(t *testing.T) {
	k := NewSGLDCV(10, 8, 0.01, SGLDCVOptions{MaxIter: 1000}, make([]float64, 10), NewSource(1))
	a := NewAnswer(16, 10)
	for i := range a.Grad {
		a.Grad[i] = 1
	}
	if allocs := testing.AllocsPerRun(100, func() { k.Next(); k.Tell(a) }); allocs != 0 || k.Sampling() {
		t.Fatalf("%v allocations per search step (sampling %v)", allocs, k.Sampling())
	}
	clear(a.Grad)
	for !k.Sampling() {
		k.Tell(a)
	}
	if allocs := testing.AllocsPerRun(100, func() { k.Next(); k.Tell(a) }); allocs != 0 {
		t.Fatalf("%v allocations per step", allocs)
	}
	if allocs := testing.AllocsPerRun(100, func() { k.Next(); k.Prepare(); k.Tell(a) }); allocs != 0 {
		t.Fatalf("%v allocations per prepared step", allocs)
	}
}

func TestSGLDCVPanicsOnProgrammerErrors(t *testing.T) {
	for name, f := range map[string]func(){
		"zero step":     func() { NewSGLDCV(1, 1, 0, SGLDCVOptions{}, []float64{0}, NewSource(1)) },
		"negative tol":  func() { NewSGLDCV(1, 1, 0.1, SGLDCVOptions{Tol: -1}, []float64{0}, NewSource(1)) },
		"negative iter": func() { NewSGLDCV(1, 1, 0.1, SGLDCVOptions{MaxIter: -1}, []float64{0}, NewSource(1)) },
		"bad start":     func() { NewSGLDCV(2, 2, 0.1, SGLDCVOptions{}, []float64{0, 0, 0}, NewSource(1)) },
		"short search answer": func() {
			NewSGLDCV(2, 2, 0.1, SGLDCVOptions{}, []float64{0, 0}, NewSource(1)).Tell(&Answer{Grad: []float64{0}})
		},
		"short sampling answer": func() {
			k := NewSGLDCV(2, 2, 0.1, SGLDCVOptions{}, []float64{0, 0}, NewSource(1))
			k.Tell(NewAnswer(1, 2))
			k.Tell(NewAnswer(3, 2))
		},
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

// BenchmarkSGLDCVStep reports the cost of one SGLD-CV sampling step over
// all chains (2·chains rows) with the gradients already supplied.
func BenchmarkSGLDCVStep(b *testing.B) {
	for _, p := range []int{10, 100, 1000} {
		for _, c := range []int{8, 64} {
			b.Run(fmt.Sprintf("p=%d/chains=%d", p, c), func(b *testing.B) {
				k := NewSGLDCV(p, c, 0.01, SGLDCVOptions{}, make([]float64, p), NewSource(1))
				a := NewAnswer(2*c, p)
				k.Tell(a) // zero gradient: the search ends at once
				sgldBench(b, k, a, p, c)
			})
		}
	}
}
