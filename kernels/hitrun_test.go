package kernels

// Internal tests of the hit-and-run kernel. References: the slice update of
// Neal (2003), "Slice sampling", Ann. Statist. 31(3), Figs. 3 and 5
// (figure numbers from memory; replayed by hand); closed-form Gaussian moments; the standard Gumbel
// distribution's closed-form CDF; posterior moments of a logistic
// regression by quadrature (gonum integrate.Simpsons).

import (
	"bytes"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/integrate"
	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distuv"

	"sluice/kernels/targets"
)

// hitrunEval answers a request with the log densities of t; it allocates
// only when a.LogDensity is too short.
func hitrunEval(t targets.Target) func(*Request, *Answer) {
	return func(req *Request, a *Answer) {
		p := t.Dim()
		if cap(a.LogDensity) < req.Rows {
			a.LogDensity = make([]float64, req.Rows)
		}
		a.LogDensity = a.LogDensity[:req.Rows]
		for r := range req.Rows {
			a.LogDensity[r] = t.LogDensity(req.Points[r*p : (r+1)*p])
		}
	}
}

// hitrunFunc is a target given by its log density alone.
type hitrunFunc struct {
	p  int
	lp func(x []float64) float64
}

func (f hitrunFunc) Dim() int                       { return f.p }
func (f hitrunFunc) LogDensity(x []float64) float64 { return f.lp(x) }
func (f hitrunFunc) GradLogDensity(dst, x []float64) {
	panic("kernels: hit-and-run test target has no gradient")
}
func (f hitrunFunc) Curvature() (m, M float64) { return 0, math.Inf(1) }

// hitrunGumbel is the standard Gumbel density, log π(x) = −x − e^{−x}
// (log-concave, skewed), with the closed-form CDF F(x) = exp(−e^{−x}).
var hitrunGumbel = hitrunFunc{1, func(x []float64) float64 { return -x[0] - math.Exp(-x[0]) }}

func hitrunGumbelCDF(x float64) float64 { return math.Exp(-math.Exp(-x)) }

// hitrunChi2 bins the values into equiprobable bins of the continuous
// distribution with CDF cdf and returns Pearson's statistic and the
// critical value at level α for bins − 1 degrees of freedom (gonum
// distuv.ChiSquared).
func hitrunChi2(values []float64, cdf func(float64) float64, bins int, alpha float64) (stat, crit float64) {
	counts := make([]float64, bins)
	for _, v := range values {
		b := int(cdf(v) * float64(bins))
		counts[min(max(b, 0), bins-1)]++
	}
	e := float64(len(values)) / float64(bins)
	for _, o := range counts {
		stat += (o - e) * (o - e) / e
	}
	return stat, distuv.ChiSquared{K: float64(bins - 1)}.Quantile(1 - alpha)
}

func hitrunGaussian(t *testing.T, mean, q []float64) *targets.Gaussian {
	t.Helper()
	g, err := targets.NewGaussian(mean, mat.NewSymDense(len(mean), append([]float64(nil), q...)))
	if err != nil {
		t.Fatal(err)
	}
	return g
}

// One chain replayed by hand: the slice update of Neal (2003), Fig. 3
// (stepping-out with m = MaxExpansions + 1, J = ⌊mV⌋, K = m − 1 − J) and
// Fig. 5 (shrinkage), written sequentially, with the stream used in the
// documented order (direction normals, e, U, V, then one U' per
// proposal). With one chain the kernel's batching of the two sides
// changes nothing, so positions and evaluation counts must agree exactly.
func TestHitRunStepByHand(t *testing.T) {
	const seed, w, maxExp = 23, 0.7, 5
	target := hitrunGaussian(t, []float64{0.3, -0.2}, []float64{2, .5, .5, 1})
	start := []float64{1.5, 1}
	k := NewHitAndRun(2, 1, start, HitAndRunOptions{Width: w, MaxExpansions: maxExp}, NewSource(seed))
	eval := hitrunEval(target)
	rng := rand.New(NewSource(seed))
	x := append([]float64(nil), start...)
	lp := target.LogDensity(x)
	evals := 1
	pt := make([]float64, 2)
	g := func(d []float64, t float64) float64 {
		for i := range pt {
			pt[i] = x[i] + t*d[i]
		}
		evals++
		return target.LogDensity(pt)
	}
	a := &Answer{}
	eval(k.Next(), a)
	if k.Tell(a) || k.Steps() != 0 {
		t.Fatal("the start's answer completed a step")
	}
	const m = maxExp + 1
	for step := 1; step <= 30; step++ {
		d := []float64{rng.NormFloat64(), rng.NormFloat64()}
		inv := 1 / math.Sqrt(d[0]*d[0]+d[1]*d[1])
		d[0], d[1] = d[0]*inv, d[1]*inv
		y := lp - rng.ExpFloat64()
		lo := -w * rng.Float64()
		hi := lo + w
		j := int(m * rng.Float64())
		kk := m - 1 - j
		for j > 0 && y < g(d, lo) {
			lo -= w
			j--
		}
		for kk > 0 && y < g(d, hi) {
			hi += w
			kk--
		}
		for {
			tt := lo + rng.Float64()*(hi-lo)
			if f := g(d, tt); y < f {
				copy(x, pt)
				lp = f
				break
			}
			if tt < 0 {
				lo = tt
			} else {
				hi = tt
			}
		}
		for done := false; !done; {
			eval(k.Next(), a)
			done = k.Tell(a)
		}
		if k.Steps() != step {
			t.Fatalf("steps %d, want %d", k.Steps(), step)
		}
		if got := k.Positions(); got[0] != x[0] || got[1] != x[1] {
			t.Fatalf("step %d: position %v, want %v", step, got, x)
		}
		if k.Evaluations() != evals {
			t.Fatalf("step %d: %d evaluations, want %d", step, k.Evaluations(), evals)
		}
	}
}

// Evaluation accounting: the first request is the start (Rows = Chains,
// the start's points); every request asks for log densities only, has at
// most two rows per chain in chain order; every chain costs at least two
// points per step (one expansion test, one proposal); the rows told add up
// to Evaluations = Chains + steps·MeanEvaluationsPerStep, and
// EvaluationsPerStep is its ceiling (2·Chains before any step).
func TestHitRunEvaluations(t *testing.T) {
	const chains = 5
	target := hitrunGaussian(t, []float64{0, 0, 0}, []float64{1, 0, 0, 0, 2, 0, 0, 0, 3})
	start := []float64{1, 2, 3}
	k := NewHitAndRun(3, chains, start, HitAndRunOptions{}, NewSource(3))
	if k.EvaluationsPerStep() != 2*chains || k.Width() != 1 || k.MaxExpansions() != 64 {
		t.Fatalf("before any step: evaluations per step %d, width %v, max expansions %d",
			k.EvaluationsPerStep(), k.Width(), k.MaxExpansions())
	}
	req := k.Next()
	if req.Need != NeedLogDensity || req.Rows != chains {
		t.Fatalf("start request %+v", req)
	}
	for r := range chains {
		if req.Chain[r] != r || fmt.Sprint(req.Points[3*r:3*r+3]) != fmt.Sprint(start) {
			t.Fatalf("start row %d: chain %d point %v", r, req.Chain[r], req.Points[3*r:3*r+3])
		}
	}
	eval := hitrunEval(target)
	a := &Answer{}
	eval(req, a)
	k.Tell(a)
	rows := chains
	perChain := make([]int, chains)
	for k.Steps() < 60 {
		req := k.Next()
		if req.Need != NeedLogDensity || req.Rows < 1 || req.Rows > 2*chains || len(req.Points) != 3*req.Rows {
			t.Fatalf("request need %v rows %d points %d", req.Need, req.Rows, len(req.Points))
		}
		seen := make([]int, chains)
		for r := range req.Rows {
			c := req.Chain[r]
			if seen[c]++; seen[c] > 2 || r > 0 && req.Chain[r-1] > c {
				t.Fatalf("rows' chains %v", req.Chain)
			}
			perChain[c]++
		}
		rows += req.Rows
		eval(req, a)
		if k.Tell(a) {
			for c, n := range perChain {
				if n < 2 {
					t.Fatalf("step %d: chain %d evaluated %d points", k.Steps(), c, n)
				}
				perChain[c] = 0
			}
		}
	}
	mean := k.MeanEvaluationsPerStep()
	if k.Evaluations() != rows || float64(rows-chains) != mean*60 {
		t.Fatalf("%d rows told, kernel counts %d and mean %v per step", rows, k.Evaluations(), mean)
	}
	if want := int(math.Ceil(mean)); k.EvaluationsPerStep() != want {
		t.Fatalf("evaluations per step %d, want ⌈%v⌉", k.EvaluationsPerStep(), mean)
	}
	t.Logf("%.2f evaluations per step of %d chains (%.2f per chain)", mean, chains, mean/chains)
}

// The line move is exact (Neal 2003, Section 4): started from exact draws of the
// standard Gumbel (inverse CDF x = −log(−log u)), the chains are still
// Gumbel-distributed after four steps, with widths and caps that make
// most intervals smaller than the slice; there, only the random split
// J, K of the budget and the random placement of the first interval keep
// the move exact (a trial run of altered code failed here: χ² = 392 with
// J = K fixed, 92 with every expansion given to the left, 369 with the
// first interval centred on x). From a point start far in the tail, 12 steps with the
// defaults reach the Gumbel. Each case is a χ² test of one draw per chain
// (independent across chains) in 20 equiprobable bins of the closed-form
// CDF, at α = 10⁻⁶. The chains must also move.
func TestHitRunLineStepExact(t *testing.T) {
	for _, tc := range []struct {
		name          string
		chains, steps int
		opt           HitAndRunOptions
		exactStart    bool
	}{
		{"narrow, cap 2, from exact draws", 50000, 4, HitAndRunOptions{Width: 0.25, MaxExpansions: 2}, true},
		{"cap 1 from exact draws", 50000, 4, HitAndRunOptions{Width: 2, MaxExpansions: 1}, true},
		{"wide from exact draws", 20000, 2, HitAndRunOptions{Width: 6}, true},
		{"defaults from x=6", 5000, 12, HitAndRunOptions{}, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			start := []float64{6}
			if tc.exactStart {
				rng := rand.New(NewSource(99))
				start = make([]float64, tc.chains)
				for i := range start {
					start[i] = -math.Log(-math.Log(rng.Float64()))
				}
			}
			k := NewHitAndRun(1, tc.chains, start, tc.opt, NewSource(7))
			init := append([]float64(nil), k.Positions()...)
			driveKernel(k, hitrunEval(hitrunGumbel), tc.steps, tc.steps)
			moved := 0
			for i, v := range k.Positions() {
				if v != init[i] {
					moved++
				}
			}
			if moved != tc.chains {
				t.Errorf("%d of %d chains moved", moved, tc.chains)
			}
			stat, crit := hitrunChi2(k.Positions(), hitrunGumbelCDF, 20, 1e-6)
			t.Logf("χ² = %.1f (critical %.1f), %.2f evaluations per chain per step",
				stat, crit, k.MeanEvaluationsPerStep()/float64(tc.chains))
			if stat > crit {
				t.Errorf("χ² = %.1f > %.1f: the draws are not Gumbel", stat, crit)
			}
		})
	}
}

// Hit-and-run leaves π invariant with no discretisation bias: on
// N(μ, Q⁻¹) with Q = [[2, .5], [.5, 1]] the means and covariance entries
// (closed form, gonum inverse in targets) lie within 4 MCSE.
func TestHitRunGaussian(t *testing.T) {
	mu := []float64{1, -2}
	target := hitrunGaussian(t, mu, []float64{2, .5, .5, 1})
	cov := target.Covariance()
	k := NewHitAndRun(2, 16, []float64{-2, 2}, HitAndRunOptions{}, NewSource(37))
	d := driveKernel(k, hitrunEval(target), 200, 4200)
	for i := range 2 {
		est, se := statOf(d, func(x []float64) float64 { return x[i] })
		if z := (est - mu[i]) / se; math.Abs(z) > 4 {
			t.Errorf("mean[%d] = %.5f, exact %v, MCSE %.5f (z = %.1f)", i, est, mu[i], se, z)
		}
		for j := i; j < 2; j++ {
			est, se := statOf(d, func(x []float64) float64 { return (x[i] - mu[i]) * (x[j] - mu[j]) })
			if z := (est - cov.At(i, j)) / se; math.Abs(z) > 4 {
				t.Errorf("Σ[%d][%d] = %.5f, exact %.5f, MCSE %.5f (z = %.1f)", i, j, est, cov.At(i, j), se, z)
			}
		}
	}
	t.Logf("%.2f evaluations per chain per step", k.MeanEvaluationsPerStep()/16)
}

// hitrunLogistic is an invented data set: 50 rows (1, u_i) with
// u_i ~ N(0, 1) and labels drawn from P(y=1) = σ(−0.3 + 0.9u_i), seed 13;
// prior N(0, I).
func hitrunLogistic(t *testing.T) *targets.Logistic {
	const n = 50
	rng := rand.New(NewSource(13))
	x := mat.NewDense(n, 2, nil)
	y := make([]float64, n)
	for i := range n {
		u := rng.NormFloat64()
		x.Set(i, 0, 1)
		x.Set(i, 1, u)
		if rng.Float64() < 1/(1+math.Exp(0.3-0.9*u)) {
			y[i] = 1
		}
	}
	l, err := targets.NewLogistic(x, y, 1)
	if err != nil {
		t.Fatal(err)
	}
	return l
}

// hitrunQuadrature returns the posterior mean and covariance of a
// 2-parameter target by a tensor Simpson rule (gonum integrate.Simpsons)
// on an n×n grid spanning the mode ± 12 Laplace standard deviations.
func hitrunQuadrature(t *testing.T, l *targets.Logistic, n int) (mean [2]float64, cov [2][2]float64) {
	mode, err := l.Mode(1e-12, 100)
	if err != nil {
		t.Fatal(err)
	}
	hess := mat.NewSymDense(2, nil)
	l.Hessian(hess, mode)
	var lap mat.Dense
	if err := lap.Inverse(hess); err != nil {
		t.Fatal(err)
	}
	var axis [2][]float64
	for i := range 2 {
		sd := math.Sqrt(-lap.At(i, i))
		axis[i] = make([]float64, n)
		for j := range axis[i] {
			axis[i][j] = mode[i] + sd*(-12+24*float64(j)/float64(n-1))
		}
	}
	lpMode := l.LogDensity(mode)
	var mom [6]float64 // ∫w·{1, θ₀, θ₁, θ₀², θ₀θ₁, θ₁²}
	inner := make([][6]float64, n)
	col, theta := make([]float64, n), make([]float64, 2)
	vals := make([][6]float64, n)
	for a := range n {
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
		mom[f] = integrate.Simpsons(axis[0], col)
	}
	mean = [2]float64{mom[1] / mom[0], mom[2] / mom[0]}
	cov[0][0] = mom[3]/mom[0] - mean[0]*mean[0]
	cov[0][1] = mom[4]/mom[0] - mean[0]*mean[1]
	cov[1][1] = mom[5]/mom[0] - mean[1]*mean[1]
	cov[1][0] = cov[0][1]
	return mean, cov
}

// A non-Gaussian log-concave target: the posterior of a 2-parameter
// Bayesian logistic regression (50 invented rows). Its mean and covariance
// by quadrature (converged: 81 and 161 points per axis agree to 1e-9)
// must match the chains' moments within 4 MCSE.
func TestHitRunLogisticPosterior(t *testing.T) {
	l := hitrunLogistic(t)
	mean, cov := hitrunQuadrature(t, l, 161)
	m2, c2 := hitrunQuadrature(t, l, 81)
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
	k := NewHitAndRun(2, 16, []float64{0, 0}, HitAndRunOptions{Width: 0.5}, NewSource(53))
	d := driveKernel(k, hitrunEval(l), 100, 1200)
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
	t.Logf("%.2f evaluations per chain per step", k.MeanEvaluationsPerStep()/16)
}

// hitrunTrace drives k for tells Tells and returns every request's points
// and every position after a completed step, concatenated.
func hitrunTrace(k *HitAndRun, eval func(*Request, *Answer), tells int) []float64 {
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

// Same seed, same run; a checkpoint resumes bit for bit, before the
// start's answer, right after it, in the middle of a step (chains at
// different stages) and at a step boundary.
func TestHitRunStateRoundTrip(t *testing.T) {
	target := hitrunGaussian(t, []float64{0, 1}, []float64{2, .5, .5, 1})
	eval := hitrunEval(target)
	opt := HitAndRunOptions{Width: 0.3, MaxExpansions: 9}
	ref := hitrunTrace(NewHitAndRun(2, 3, []float64{1, -1}, opt, NewSource(5)), eval, 300)
	if again := hitrunTrace(NewHitAndRun(2, 3, []float64{1, -1}, opt, NewSource(5)), eval, 300); !hitrunEqualBits(ref, again) {
		t.Fatal("same seed, different run")
	}
	for _, tells := range []int{0, 1, 3, 8, 40} {
		t.Run(fmt.Sprintf("tells=%d", tells), func(t *testing.T) {
			k := NewHitAndRun(2, 3, []float64{1, -1}, opt, NewSource(5))
			hitrunTrace(k, eval, tells)
			state, err := k.MarshalBinary()
			if err != nil {
				t.Fatal(err)
			}
			var r HitAndRun
			if err := r.UnmarshalBinary(state); err != nil {
				t.Fatal(err)
			}
			if r.Steps() != k.Steps() || r.Width() != 0.3 || r.MaxExpansions() != 9 || r.Evaluations() != k.Evaluations() {
				t.Fatalf("restored header wrong: steps %d width %v cap %d", r.Steps(), r.Width(), r.MaxExpansions())
			}
			if !hitrunEqualBits(hitrunTrace(k, eval, 200), hitrunTrace(&r, eval, 200)) {
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
			if err := r.UnmarshalBinary([]byte("sluice.mala.v1 not ours")); err == nil {
				t.Fatal("foreign state accepted")
			}
		})
	}
}

func hitrunEqualBits(a, b []float64) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float64bits(a[i]) != math.Float64bits(b[i]) {
			return false
		}
	}
	return true
}

// A warmed-up step (all its rounds) allocates nothing.
func TestHitRunStepAllocatesNothing(t *testing.T) {
	target := hitrunGaussian(t, []float64{0, 0, 0}, []float64{1, 0, 0, 0, 1, 0, 0, 0, 1})
	eval := hitrunEval(target)
	k := NewHitAndRun(3, 8, make([]float64, 3), HitAndRunOptions{}, NewSource(1))
	a := &Answer{LogDensity: make([]float64, 16)}
	driveKernel(k, eval, 5, 5)
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

func TestHitRunPanicsOnProgrammerErrors(t *testing.T) {
	src := func() *rand.PCG { return NewSource(1) }
	for name, f := range map[string]func(){
		"zero dim":       func() { NewHitAndRun(0, 1, nil, HitAndRunOptions{}, src()) },
		"zero chains":    func() { NewHitAndRun(1, 0, []float64{0}, HitAndRunOptions{}, src()) },
		"bad start":      func() { NewHitAndRun(2, 2, []float64{0, 0, 0}, HitAndRunOptions{}, src()) },
		"negative width": func() { NewHitAndRun(1, 1, []float64{0}, HitAndRunOptions{Width: -1}, src()) },
		"NaN width":      func() { NewHitAndRun(1, 1, []float64{0}, HitAndRunOptions{Width: math.NaN()}, src()) },
		"infinite width": func() { NewHitAndRun(1, 1, []float64{0}, HitAndRunOptions{Width: math.Inf(1)}, src()) },
		"negative cap":   func() { NewHitAndRun(1, 1, []float64{0}, HitAndRunOptions{MaxExpansions: -1}, src()) },
		"short answer": func() {
			NewHitAndRun(1, 2, []float64{0}, HitAndRunOptions{}, src()).Tell(&Answer{LogDensity: []float64{0}})
		},
		"infinite start": func() {
			NewHitAndRun(1, 1, []float64{0}, HitAndRunOptions{}, src()).Tell(&Answer{LogDensity: []float64{math.Inf(1)}})
		},
		"infinite value": func() {
			k := NewHitAndRun(1, 1, []float64{0}, HitAndRunOptions{}, src())
			k.Tell(&Answer{LogDensity: []float64{0, 0}})
			k.Tell(&Answer{LogDensity: []float64{math.Inf(1), 0}})
		},
		"NaN start value": func() {
			NewHitAndRun(1, 1, []float64{0}, HitAndRunOptions{}, src()).Tell(&Answer{LogDensity: []float64{math.NaN()}})
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

// BenchmarkHitRunStep reports one complete step (all its rounds) over all
// chains on N(0, I_p), the log density computed in the loop; evals/step is
// the mean number of points per step over all chains, requests/step the
// mean number of ask/tell rounds (the round trips a remote client sees).
func BenchmarkHitRunStep(b *testing.B) {
	for _, p := range []int{2, 10, 100, 1000} {
		for _, c := range []int{8, 64} {
			b.Run(fmt.Sprintf("hit-and-run/p=%d/chains=%d", p, c), func(b *testing.B) {
				k := NewHitAndRun(p, c, make([]float64, p), HitAndRunOptions{}, NewSource(1))
				a := &Answer{LogDensity: make([]float64, 2*c)}
				eval := func() {
					req := k.Next()
					for r := range req.Rows {
						var s float64
						for _, v := range req.Points[r*p : (r+1)*p] {
							s += v * v
						}
						a.LogDensity[r] = -s / 2
					}
				}
				for range 10 {
					for eval(); !k.Tell(a); eval() {
					}
				}
				e0, s0, rounds := k.stepEvals, k.steps, 0
				b.ReportAllocs()
				for b.Loop() {
					for eval(); !k.Tell(a); eval() {
						rounds++
					}
					rounds++
				}
				b.ReportMetric(float64(k.stepEvals-e0)/float64(k.steps-s0), "evals/step")
				b.ReportMetric(float64(rounds)/float64(k.steps-s0), "requests/step")
			})
		}
	}
}
