package kernels

// Internal tests of the rejection sampler. References: closed-form
// Gaussian moments and normalisers (targets.Gaussian is normalised), the
// exact acceptance probability Z̃/M of rejection sampling, the tight
// envelope bound of a Gaussian under a Gaussian envelope (derived below),
// the χ²_p law of the Mahalanobis radius (gonum distuv.ChiSquared), and a
// replay of the documented use of the random stream.

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distuv"

	"sluice/kernels/targets"
)

// rejectionEval answers with the log densities of t plus the constant c
// (the client's own normalisation); it allocates only when a.LogDensity is
// too short.
func rejectionEval(t targets.Target, c float64) func(*Request, *Answer) {
	return func(req *Request, a *Answer) {
		p := t.Dim()
		if cap(a.LogDensity) < req.Rows {
			a.LogDensity = make([]float64, req.Rows)
		}
		a.LogDensity = a.LogDensity[:req.Rows]
		for r := range req.Rows {
			a.LogDensity[r] = t.LogDensity(req.Points[r*p:(r+1)*p]) + c
		}
	}
}

// rejectionLogQ is log N(y; mu, s²I), written out.
func rejectionLogQ(y, mu []float64, s float64) float64 {
	var d2 float64
	for i := range y {
		d2 += (y[i] - mu[i]) * (y[i] - mu[i])
	}
	return -0.5*float64(len(y))*math.Log(2*math.Pi*s*s) - d2/(2*s*s)
}

// rejectionTightLogBound returns max_y log π(y) − log q(y) for a normalised
// Gaussian π = N(m, Q⁻¹) and q = N(mu, s²I) (derived: the difference is a
// concave quadratic when Q − I/s² is positive definite; its gradient
// −Q(y − m) + (y − mu)/s² vanishes at (Q − I/s²)y = Qm − mu/s², solved
// with gonum).
func rejectionTightLogBound(t *testing.T, g *targets.Gaussian, mu []float64, s float64) float64 {
	t.Helper()
	p := g.Dim()
	q := g.Precision()
	a := mat.NewSymDense(p, nil)
	a.CopySym(q)
	for i := range p {
		a.SetSym(i, i, a.At(i, i)-1/(s*s))
	}
	var ch mat.Cholesky
	if !ch.Factorize(a) {
		t.Fatal("envelope too narrow: Q − I/s² is not positive definite")
	}
	rhs := mat.NewVecDense(p, nil)
	rhs.MulVec(q, mat.NewVecDense(p, g.Mean()))
	for i := range p {
		rhs.SetVec(i, rhs.AtVec(i)-mu[i]/(s*s))
	}
	var y mat.VecDense
	if err := ch.SolveVecTo(&y, rhs); err != nil {
		t.Fatal(err)
	}
	return g.LogDensity(y.RawVector().Data) - rejectionLogQ(y.RawVector().Data, mu, s)
}

func rejectionGaussian(t *testing.T, mean, q []float64) *targets.Gaussian {
	t.Helper()
	g, err := targets.NewGaussian(mean, mat.NewSymDense(len(mean), append([]float64(nil), q...)))
	if err != nil {
		t.Fatal(err)
	}
	return g
}

func rejectionIdentity(p int) []float64 {
	q := make([]float64, p*p)
	for i := range p {
		q[i*p+i] = 1
	}
	return q
}

// rejectionDraws runs k for steps completed steps and returns every
// chain's draws, draws[chain][step] (a dim-vector each).
func rejectionDraws(k *Rejection, eval func(*Request, *Answer), steps int) [][][]float64 {
	p := k.Dim()
	out := make([][][]float64, k.Chains())
	a := &Answer{}
	for k.Steps() < steps {
		eval(k.Next(), a)
		if !k.Tell(a) {
			continue
		}
		x := k.Positions()
		for c := range out {
			out[c] = append(out[c], append([]float64(nil), x[c*p:(c+1)*p]...))
		}
	}
	return out
}

// rejectionMean returns the mean of f over all draws and its standard
// error sd/√n: the draws are independent.
func rejectionMean(d [][][]float64, f func([]float64) float64) (est, se float64) {
	var s, s2, n float64
	for _, ch := range d {
		for _, x := range ch {
			v := f(x)
			s, s2, n = s+v, s2+v*v, n+1
		}
	}
	est = s / n
	return est, math.Sqrt((s2/n - est*est) / (n - 1))
}

// The tight bound helper against its closed form: for N(0, I_p) under
// N(0, s²I) the ratio π/q = s^p·exp(−‖y‖²(1 − 1/s²)/2) peaks at y = 0
// with value s^p.
func TestRejectionTightBoundClosedForm(t *testing.T) {
	for p := 1; p <= RejectionMaxDim; p++ {
		g := rejectionGaussian(t, make([]float64, p), rejectionIdentity(p))
		got := rejectionTightLogBound(t, g, make([]float64, p), 1.5)
		if want := float64(p) * math.Log(1.5); math.Abs(got-want) > 1e-12 {
			t.Errorf("p = %d: tight log bound %.15g, closed form %.15g", p, got, want)
		}
	}
}

// Steps replayed by hand from the documented use of the stream: the
// constructor draws every chain's proposal (μ + s·z, chain by chain); Tell
// draws one uniform per row and accepts when log u < log π̃(y) − log M −
// log q(y); then the waiting chains' next proposals are drawn.
func TestRejectionStepByHand(t *testing.T) {
	const seed, s, chains = 29, 1.3, 3
	mu := []float64{0.5, -0.5}
	target := rejectionGaussian(t, []float64{0, 0}, []float64{1, 0, 0, 1})
	logM := rejectionTightLogBound(t, target, mu, s) + 0.2
	k := NewRejection(2, chains, mu, s, logM, NewSource(seed))
	eval := rejectionEval(target, 0)
	rng := rand.New(NewSource(seed))
	waiting := []bool{true, true, true}
	x := []float64{0.5, -0.5, 0.5, -0.5, 0.5, -0.5}
	xn := make([]float64, 6)
	var want []float64
	var wantChains []int
	draw := func() {
		want, wantChains = want[:0], wantChains[:0]
		for c, w := range waiting {
			if w {
				want = append(want, mu[0]+s*rng.NormFloat64(), mu[1]+s*rng.NormFloat64())
				wantChains = append(wantChains, c)
			}
		}
	}
	draw()
	a := &Answer{}
	steps := 0
	for tell := 0; steps < 4; tell++ {
		req := k.Next()
		if fmt.Sprint(req.Chain) != fmt.Sprint(wantChains) || !hitrunEqualBits(req.Points, want) {
			t.Fatalf("tell %d: request chains %v points %v, want %v %v", tell, req.Chain, req.Points, wantChains, want)
		}
		eval(req, a)
		done := k.Tell(a)
		left := 0
		for r, c := range wantChains {
			y := want[2*r : 2*r+2]
			if math.Log(rng.Float64()) < target.LogDensity(y)-logM-rejectionLogQ(y, mu, s) {
				copy(xn[2*c:], y)
				waiting[c] = false
			}
		}
		for _, w := range waiting {
			if w {
				left++
			}
		}
		if done != (left == 0) {
			t.Fatalf("tell %d: step done %v with %d chains waiting", tell, done, left)
		}
		if done {
			steps++
			copy(x, xn)
			waiting = []bool{true, true, true}
		}
		if !hitrunEqualBits(k.Positions(), x) || k.Steps() != steps {
			t.Fatalf("tell %d: positions %v steps %d, want %v %d", tell, k.Positions(), k.Steps(), x, steps)
		}
		draw()
	}
}

// Exact i.i.d. draws from N(m, Q⁻¹), Q = [[2, .5], [.5, 1]], m = (1, −½),
// under the envelope N((0.8, −0.2), 1.6²I) with 1.25 times the tight
// bound: the means and covariance entries within 4 standard errors of the
// closed form; the Mahalanobis radius (x − m)ᵀQ(x − m) ~ χ²₂ by a χ² test
// in 20 equiprobable bins at α = 10⁻⁶; no lag-1 correlation within a chain
// (|r| < 4/√n); and the acceptance rate equal to Z̃/M = 1/1.25·e^{−tight}
// (π normalised, Z̃ = 1) within 4 binomial standard errors
// √(α(1 − α)/proposals) (delta method for the negative-binomial count).
func TestRejectionGaussianExact(t *testing.T) {
	m := []float64{1, -0.5}
	q := []float64{2, .5, .5, 1}
	target := rejectionGaussian(t, m, q)
	mu, s := []float64{0.8, -0.2}, 1.6
	logM := rejectionTightLogBound(t, target, mu, s) + math.Log(1.25)
	k := NewRejection(2, 16, mu, s, logM, NewSource(61))
	d := rejectionDraws(k, rejectionEval(target, 0), 4000)
	if err := k.Violation(); err != nil {
		t.Fatal(err)
	}
	cov := target.Covariance()
	for i := range 2 {
		est, se := rejectionMean(d, func(x []float64) float64 { return x[i] })
		if z := (est - m[i]) / se; math.Abs(z) > 4 {
			t.Errorf("mean[%d] = %.5f, exact %v, SE %.5f (z = %.1f)", i, est, m[i], se, z)
		}
		for j := i; j < 2; j++ {
			est, se := rejectionMean(d, func(x []float64) float64 { return (x[i] - m[i]) * (x[j] - m[j]) })
			if z := (est - cov.At(i, j)) / se; math.Abs(z) > 4 {
				t.Errorf("Σ[%d][%d] = %.5f, exact %.5f, SE %.5f (z = %.1f)", i, j, est, cov.At(i, j), se, z)
			}
		}
	}
	var radii []float64
	for _, ch := range d {
		for _, x := range ch {
			d0, d1 := x[0]-m[0], x[1]-m[1]
			radii = append(radii, q[0]*d0*d0+2*q[1]*d0*d1+q[3]*d1*d1)
		}
	}
	chi := distuv.ChiSquared{K: 2}
	stat, crit := hitrunChi2(radii, chi.CDF, 20, 1e-6)
	if stat > crit {
		t.Errorf("Mahalanobis radii: χ² = %.1f > %.1f", stat, crit)
	}
	for i := range 2 {
		var sxy, sxx float64
		var n int
		for _, ch := range d {
			for s := 1; s < len(ch); s++ {
				a, b := ch[s-1][i]-m[i], ch[s][i]-m[i]
				sxy, sxx, n = sxy+a*b, sxx+a*a, n+1
			}
		}
		if r := sxy / sxx; math.Abs(r) > 4/math.Sqrt(float64(n)) {
			t.Errorf("coordinate %d: lag-1 correlation %.4f (n = %d)", i, r, n)
		}
	}
	want := math.Exp(-logM)
	got := k.AcceptanceRate()
	se := math.Sqrt(want * (1 - want) / float64(k.Evaluations()))
	t.Logf("acceptance %.4f, exact %.4f, SE %.4f; χ² = %.1f (critical %.1f)", got, want, se, stat, crit)
	if z := (got - want) / se; math.Abs(z) > 4 {
		t.Errorf("acceptance %.5f, exact %.5f (z = %.1f)", got, want, z)
	}
}

// Acceptance collapses with the dimension: N(0, I_p) under N(0, 1.5²I)
// with the tight bound p·log 1.5 is accepted with probability exactly
// 1.5^−p (closed form); the measured rate must match within 4 binomial
// standard errors for p = 1 … 4, the draws' means within 4 SE of 0, and
// the tight bound must raise no violation (α(y) touches 1 only at y = 0).
// The client's constant shifts the bound: with log π̃ = log π + 3.7 and
// log M = p·log 1.5 + 3.7 the acceptance is the same.
func TestRejectionAcceptanceByDimension(t *testing.T) {
	for p := 1; p <= RejectionMaxDim; p++ {
		for _, c := range []float64{0, 3.7} {
			t.Run(fmt.Sprintf("p=%d/const=%v", p, c), func(t *testing.T) {
				target := rejectionGaussian(t, make([]float64, p), rejectionIdentity(p))
				k := NewRejection(p, 16, make([]float64, p), 1.5, float64(p)*math.Log(1.5)+c, NewSource(uint64(70+p)))
				d := rejectionDraws(k, rejectionEval(target, c), 2000)
				if err := k.Violation(); err != nil {
					t.Fatal(err)
				}
				want := math.Pow(1.5, -float64(p))
				se := math.Sqrt(want * (1 - want) / float64(k.Evaluations()))
				if z := (k.AcceptanceRate() - want) / se; math.Abs(z) > 4 {
					t.Errorf("acceptance %.5f, exact 1.5^-%d = %.5f, SE %.5f (z = %.1f)", k.AcceptanceRate(), p, want, se, z)
				}
				for i := range p {
					est, se := rejectionMean(d, func(x []float64) float64 { return x[i] })
					if z := est / se; math.Abs(z) > 4 {
						t.Errorf("mean[%d] = %.5f, exact 0, SE %.5f (z = %.1f)", i, est, se, z)
					}
				}
			})
		}
	}
}

// A bound too small is caught. For N(0, I₂) under N(0, 1.5²I) with
// log M = 2·log 1.5 − 0.3, α(y) = exp(0.3 − ‖y‖²(1 − 1/1.5²)/2) exceeds 1
// exactly when ‖y‖² < 0.6/(1 − 1/2.25) (closed form): the recorded point
// must lie there, with the ratio recomputed at it. A bound that leaves out
// the client's constant (answers log π + 3.7, bound 2·log 1.5) is caught
// too. The first violation is kept.
func TestRejectionDetectsViolation(t *testing.T) {
	target := rejectionGaussian(t, []float64{0, 0}, rejectionIdentity(2))
	for _, tc := range []struct {
		name      string
		c, logM   float64
		maxRadius float64 // ‖y‖² below which α > 1
	}{
		{"bound too small", 0, 2*math.Log(1.5) - 0.3, 0.6 / (1 - 1/2.25)},
		{"client constant left out", 3.7, 2 * math.Log(1.5), 2 * 3.7 / (1 - 1/2.25)},
	} {
		t.Run(tc.name, func(t *testing.T) {
			k := NewRejection(2, 4, []float64{0, 0}, 1.5, tc.logM, NewSource(83))
			if k.Violation() != nil {
				t.Fatal("violation before any proposal")
			}
			eval := rejectionEval(target, tc.c)
			a := &Answer{}
			for tells := 0; k.Violation() == nil; tells++ {
				if tells > 10000 {
					t.Fatal("no violation seen")
				}
				eval(k.Next(), a)
				k.Tell(a)
			}
			err := k.Violation()
			var v *BoundViolation
			if !errors.As(err, &v) {
				t.Fatalf("violation %T %v", err, err)
			}
			y := v.Point
			lr := target.LogDensity(y) + tc.c - tc.logM - rejectionLogQ(y, []float64{0, 0}, 1.5)
			if !(v.LogRatio > 0) || math.Abs(v.LogRatio-lr) > 1e-12 || v.Chain < 0 || v.Chain >= 4 || v.LogBound != tc.logM {
				t.Fatalf("violation %+v, recomputed log ratio %v", v, lr)
			}
			if r2 := y[0]*y[0] + y[1]*y[1]; r2 >= tc.maxRadius {
				t.Fatalf("violation at ‖y‖² = %v, outside the region ‖y‖² < %v where α > 1", r2, tc.maxRadius)
			}
			if msg := err.Error(); !strings.HasPrefix(msg, "kernels: ") || !strings.Contains(msg, "violated") {
				t.Fatalf("message %q", msg)
			}
			first := *v
			for range 200 {
				eval(k.Next(), a)
				k.Tell(a)
			}
			if v2 := k.Violation().(*BoundViolation); v2.LogRatio != first.LogRatio || v2.Chain != first.Chain {
				t.Fatal("the first violation was not kept")
			}
			t.Logf("%v", err)
		})
	}
}

// Evaluation accounting: each request has one row per waiting chain, in
// chain order, asking for log densities only; a chain whose proposal was
// accepted has no row until the step completes; Positions changes only at
// step completion; the rows add up to Evaluations, steps·Chains accepted
// draws give AcceptanceRate at a step boundary, MeanEvaluationsPerStep is
// Evaluations/Steps and EvaluationsPerStep its ceiling (Chains before any
// step).
func TestRejectionEvaluations(t *testing.T) {
	const p, chains = 3, 6
	target := rejectionGaussian(t, make([]float64, p), rejectionIdentity(p))
	k := NewRejection(p, chains, make([]float64, p), 1.5, float64(p)*math.Log(1.5), NewSource(5))
	if k.EvaluationsPerStep() != chains || !math.IsNaN(k.AcceptanceRate()) {
		t.Fatalf("before any step: evaluations per step %d, acceptance %v", k.EvaluationsPerStep(), k.AcceptanceRate())
	}
	eval := rejectionEval(target, 0)
	a := &Answer{}
	waiting := make([]bool, chains)
	reset := func() {
		for c := range waiting {
			waiting[c] = true
		}
	}
	reset()
	rows := 0
	prev := append([]float64(nil), k.Positions()...)
	for k.Steps() < 50 {
		req := k.Next()
		var want []int
		for c, w := range waiting {
			if w {
				want = append(want, c)
			}
		}
		if req.Need != NeedLogDensity || fmt.Sprint(req.Chain) != fmt.Sprint(want) || len(req.Points) != p*req.Rows {
			t.Fatalf("request need %v chains %v, want chains %v", req.Need, req.Chain, want)
		}
		rows += req.Rows
		eval(req, a)
		done := k.Tell(a)
		// a chain stops waiting exactly when its draw arrives; find which
		// did from the next request
		next := k.Next()
		if done {
			reset()
			if hitrunEqualBits(prev, k.Positions()) {
				t.Fatal("positions unchanged by a completed step")
			}
			prev = append(prev[:0], k.Positions()...)
			continue
		}
		if !hitrunEqualBits(prev, k.Positions()) {
			t.Fatal("positions changed in the middle of a step")
		}
		for c := range waiting {
			waiting[c] = false
		}
		for _, c := range next.Chain {
			if !slices.Contains(want, c) {
				t.Fatalf("chain %d asked again after its draw was accepted", c)
			}
			waiting[c] = true
		}
	}
	if rows != k.Evaluations() || k.AcceptanceRate() != float64(50*chains)/float64(rows) {
		t.Fatalf("%d rows told, kernel counts %d, acceptance %v", rows, k.Evaluations(), k.AcceptanceRate())
	}
	mean := k.MeanEvaluationsPerStep()
	if mean != float64(rows)/50 || k.EvaluationsPerStep() != int(math.Ceil(mean)) {
		t.Fatalf("mean evaluations per step %v, EvaluationsPerStep %d, want %v", mean, k.EvaluationsPerStep(), float64(rows)/50)
	}
}

// rejectionTrace drives k for tells Tells and returns every request's
// points and chains and every position after a completed step.
func rejectionTrace(k *Rejection, eval func(*Request, *Answer), tells int) []float64 {
	var out []float64
	a := &Answer{}
	for range tells {
		req := k.Next()
		out = append(out, req.Points...)
		for _, c := range req.Chain {
			out = append(out, float64(c))
		}
		eval(req, a)
		if k.Tell(a) {
			out = append(out, k.Positions()...)
		}
	}
	return out
}

// Same seed, same run; a checkpoint resumes bit for bit, before any answer,
// in the middle of a step and with a violation recorded.
func TestRejectionStateRoundTrip(t *testing.T) {
	target := rejectionGaussian(t, []float64{0, 0}, []float64{2, .5, .5, 1})
	eval := rejectionEval(target, 0)
	mu := []float64{0.1, -0.1}
	tight := rejectionTightLogBound(t, target, mu, 1.5)
	mk := func(logM float64) *Rejection { return NewRejection(2, 5, mu, 1.5, logM, NewSource(9)) }
	if !hitrunEqualBits(rejectionTrace(mk(tight), eval, 200), rejectionTrace(mk(tight), eval, 200)) {
		t.Fatal("same seed, different run")
	}
	for _, tc := range []struct {
		tells int
		logM  float64
	}{{0, tight}, {1, tight}, {4, tight + 1}, {30, tight}, {60, tight - 1}} {
		t.Run(fmt.Sprintf("tells=%d/logM=%.3f", tc.tells, tc.logM), func(t *testing.T) {
			k := mk(tc.logM)
			rejectionTrace(k, eval, tc.tells)
			if tc.logM < tight && k.Violation() == nil {
				t.Fatal("no violation recorded to round-trip")
			}
			state, err := k.MarshalBinary()
			if err != nil {
				t.Fatal(err)
			}
			var r Rejection
			if err := r.UnmarshalBinary(state); err != nil {
				t.Fatal(err)
			}
			if r.Steps() != k.Steps() || r.Evaluations() != k.Evaluations() || fmt.Sprint(r.Violation()) != fmt.Sprint(k.Violation()) {
				t.Fatalf("restored header wrong: steps %d proposed %d violation %v", r.Steps(), r.Evaluations(), r.Violation())
			}
			if !hitrunEqualBits(rejectionTrace(k, eval, 100), rejectionTrace(&r, eval, 100)) {
				t.Fatal("resumed run differs")
			}
			again, _ := r.MarshalBinary()
			now, _ := k.MarshalBinary()
			if !bytes.Equal(again, now) {
				t.Fatal("states differ after identical continuation")
			}
			if err := r.UnmarshalBinary(state[:len(state)-40]); err == nil {
				t.Fatal("truncated state accepted")
			}
			if err := r.UnmarshalBinary([]byte("sluice.hitrun.v1 not ours")); err == nil {
				t.Fatal("foreign state accepted")
			}
		})
	}
}

// A warmed-up step (all its rounds) allocates nothing.
func TestRejectionStepAllocatesNothing(t *testing.T) {
	target := rejectionGaussian(t, make([]float64, 3), rejectionIdentity(3))
	eval := rejectionEval(target, 0)
	k := NewRejection(3, 8, make([]float64, 3), 1.5, 3*math.Log(1.5), NewSource(1))
	a := &Answer{LogDensity: make([]float64, 8)}
	rejectionDraws(k, eval, 3)
	if n := testing.AllocsPerRun(100, func() {
		for {
			eval(k.Next(), a)
			if k.Tell(a) {
				return
			}
		}
	}); n != 0 {
		t.Fatalf("%v allocations per step", n)
	}
}

func TestRejectionPanicsOnProgrammerErrors(t *testing.T) {
	src := func() *rand.PCG { return NewSource(1) }
	z := []float64{0}
	for name, f := range map[string]func(){
		"zero dim":       func() { NewRejection(0, 1, nil, 1, 0, src()) },
		"dim 5":          func() { NewRejection(5, 1, make([]float64, 5), 1, 0, src()) },
		"zero chains":    func() { NewRejection(1, 0, z, 1, 0, src()) },
		"short mean":     func() { NewRejection(2, 1, z, 1, 0, src()) },
		"NaN mean":       func() { NewRejection(1, 1, []float64{math.NaN()}, 1, 0, src()) },
		"zero scale":     func() { NewRejection(1, 1, z, 0, 0, src()) },
		"NaN scale":      func() { NewRejection(1, 1, z, math.NaN(), 0, src()) },
		"infinite scale": func() { NewRejection(1, 1, z, math.Inf(1), 0, src()) },
		"NaN bound":      func() { NewRejection(1, 1, z, 1, math.NaN(), src()) },
		"infinite bound": func() { NewRejection(1, 1, z, 1, math.Inf(1), src()) },
		"short answer":   func() { NewRejection(1, 2, z, 1, 0, src()).Tell(&Answer{LogDensity: []float64{0}}) },
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

// BenchmarkRejectionStep reports one complete step (every chain gets a
// draw) on N(0, I_p) under the fixed envelope N(0, 1.5²I) with the tight
// bound p·log 1.5, the log density computed in the loop, for p = 1 … 4:
// the measured acceptance beside the exact 1.5^−p shows the collapse with
// dimension; evals/step is per step over all chains.
func BenchmarkRejectionStep(b *testing.B) {
	const chains = 16
	for p := 1; p <= RejectionMaxDim; p++ {
		b.Run(fmt.Sprintf("rejection/p=%d/chains=%d", p, chains), func(b *testing.B) {
			k := NewRejection(p, chains, make([]float64, p), 1.5, float64(p)*math.Log(1.5), NewSource(1))
			a := &Answer{LogDensity: make([]float64, chains)}
			c := -0.5 * float64(p) * math.Log(2*math.Pi)
			eval := func() {
				req := k.Next()
				for r := range req.Rows {
					var s float64
					for _, v := range req.Points[r*p : (r+1)*p] {
						s += v * v
					}
					a.LogDensity[r] = c - s/2
				}
			}
			for range 10 {
				for eval(); !k.Tell(a); eval() {
				}
			}
			b.ReportAllocs()
			for b.Loop() {
				for eval(); !k.Tell(a); eval() {
				}
			}
			if k.Violation() != nil {
				b.Fatal(k.Violation())
			}
			b.ReportMetric(k.AcceptanceRate(), "acceptance")
			b.ReportMetric(math.Pow(1.5, -float64(p)), "exact-acceptance")
			b.ReportMetric(k.MeanEvaluationsPerStep(), "evals/step")
		})
	}
}
