package session

import (
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"testing"
	"time"

	"gonum.org/v1/gonum/integrate/quad"
	"gonum.org/v1/gonum/mat"

	"sluice/kernels"
	"sluice/kernels/bound"
	"sluice/kernels/targets"
)

// targetOracle answers from a kernels/targets target (closed forms);
// sign −1 returns ∇(−log π) instead of ∇log π.
func targetOracle(tg targets.Target, sign float64) oracle {
	return func(p *Points, ev *Evaluations) {
		d := p.Dim
		if p.Need.Has(kernels.NeedGradient) {
			ev.Grad = make([]float64, p.Rows*d)
		}
		if p.Need.Has(kernels.NeedLogDensity) {
			ev.LogDensity = make([]float64, p.Rows)
		}
		for r := range p.Rows {
			x := p.Points[r*d : (r+1)*d]
			if ev.Grad != nil {
				tg.GradLogDensity(ev.Grad[r*d:(r+1)*d], x)
				for i := range d {
					ev.Grad[r*d+i] *= sign
				}
			}
			if ev.LogDensity != nil {
				ev.LogDensity[r] = tg.LogDensity(x)
			}
		}
	}
}

func precisionGaussian(t *testing.T, prec ...float64) *targets.Gaussian {
	t.Helper()
	p := mat.NewSymDense(len(prec), nil)
	for i, v := range prec {
		p.SetSym(i, i, v)
	}
	g, err := targets.NewGaussian(make([]float64, len(prec)), p)
	if err != nil {
		t.Fatal(err)
	}
	return g
}

func checkNamed(cs []Check, name string) (Check, bool) {
	i := slices.IndexFunc(cs, func(c Check) bool { return c.Name == name })
	if i < 0 {
		return Check{}, false
	}
	return cs[i], true
}

// Step 5 on a Gaussian whose precision reaches 2.2: LMC's recursion
// multiplies by 1 − 5·2.2 = −10 per step along that axis (derived here),
// so the chains diverge. The session fails naming the step, the curvature
// seen and a stable step (2/2.2 = 0.909, rounded down to 0.9), never
// "draws collected".
func TestDivergenceNamesStepCurvatureAndRemedy(t *testing.T) {
	spec := Spec{Dim: 2, Chains: 4, Start: []float64{0.5, -0.5}, StartRows: 1, Step: 5, Seed: 11, DrawsPerChain: 1000}
	_, res, err := drive(t, mustNew(t, spec, Limits{}), targetOracle(precisionGaussian(t, 2.2, 1), 1))
	e, ok := AsError(err)
	if !ok || e.Field != "register.step" || res.Finished.Reason != Failed {
		t.Fatalf("got %v (%v)", err, res.Finished.Reason)
	}
	for _, want := range []string{"diverged at step", "the step 5 is too large", "M ≥ 2.2", "try a step below 0.9"} {
		if !strings.Contains(e.Reason, want) {
			t.Fatalf("reason %q lacks %q", e.Reason, want)
		}
	}
	if strings.Contains(e.Reason, "below 0.91") {
		t.Fatalf("reason %q suggests an unstable step", e.Reason)
	}
	if c, ok := checkNamed(res.Finished.Checks, "divergence"); !ok || c.Status != CheckFail {
		t.Fatalf("checks %+v", res.Finished.Checks)
	}
	if c, ok := checkNamed(res.Finished.Checks, "stability"); !ok || c.Status != CheckFail {
		t.Fatalf("stability check %+v", res.Finished.Checks)
	}
}

// A client that returns ∇(−log π): without log densities the chains run
// away from the mode (LMC multiplies by 1 + h per step on N(0, I)), and
// the failure says the gradient may point downhill; with log densities
// (MALA) the gradient check fails before sampling on
// evaluations.gradients.
func TestWrongSignGradientIsNamed(t *testing.T) {
	tg := precisionGaussian(t, 1, 1)
	spec := Spec{Dim: 2, Chains: 4, Start: []float64{0.5, -0.5}, StartRows: 1, Step: 0.1, Seed: 3, DrawsPerChain: 2000}
	_, res, err := drive(t, mustNew(t, spec, Limits{}), targetOracle(tg, -1))
	e, ok := AsError(err)
	if !ok || res.Finished.Reason != Failed || !strings.Contains(e.Reason, "−log π") {
		t.Fatalf("lmc: got %v (%v)", err, res.Finished.Reason)
	}
	if c, ok := checkNamed(res.Finished.Checks, "gradient"); !ok || c.Status != CheckWarn {
		t.Fatalf("lmc: gradient check %+v", res.Finished.Checks)
	}
	spec.Kernel = "mala"
	_, res, err = drive(t, mustNew(t, spec, Limits{}), targetOracle(tg, -1))
	e, ok = AsError(err)
	if !ok || e.Field != "evaluations.gradients" || !strings.Contains(e.Reason, "points downhill") || res.Finished.Reason != Failed {
		t.Fatalf("mala: got %v (%v)", err, res.Finished.Reason)
	}
	// A gradient off by a factor of 2 is named as such.
	half := func(p *Points, ev *Evaluations) {
		targetOracle(tg, 1)(p, ev)
		for i := range ev.Grad {
			ev.Grad[i] *= 2
		}
	}
	_, _, err = drive(t, mustNew(t, spec, Limits{}), half)
	if e, ok = AsError(err); !ok || e.Field != "evaluations.gradients" || !strings.Contains(e.Reason, "off by a factor of about 2") {
		t.Fatalf("mala, doubled gradient: got %v", err)
	}
	// The right gradient passes, and the verdict says so.
	spec.DrawsPerChain = 50
	_, res, err = drive(t, mustNew(t, spec, Limits{}), targetOracle(tg, 1))
	if err != nil {
		t.Fatal(err)
	}
	if c, ok := checkNamed(res.Finished.Checks, "gradient"); !ok || c.Status != CheckPass {
		t.Fatalf("mala: gradient check %+v", res.Finished.Checks)
	}
}

// A max_ksd target far below what the draws can show (0.001 with a few
// thousand draws) is never met: the rule is the upper 95 % bound of the
// Stein assessment (kernels/diag), not a clamped point estimate, and the
// report carries the SE, bound and state.
func TestKSDTargetNeedsTheUpperBound(t *testing.T) {
	for _, seed := range []uint64{1, 2} {
		spec := Spec{Dim: 2, Chains: 4, Start: []float64{0.1, -0.1}, StartRows: 1, Step: 0.05, Seed: seed, BurnIn: 100,
			DrawsPerChain: 600, Wants: Wants{MaxKSD: 0.001}}
		_, res, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
		if err != nil || res.Finished.Reason == TargetMet {
			t.Fatalf("seed %d: reason %v err %v", seed, res.Finished.Reason, err)
		}
		st := res.Finished.Progress.Stein
		if st == nil || !(st.SE > 0) || !(st.Upper95 > 0.001) || st.Draws < 8 {
			t.Fatalf("seed %d: stein %+v", seed, st)
		}
		tgt := res.Finished.Progress.Targets[0]
		if tgt.Name != "max_ksd" || tgt.Met || tgt.Current != st.Upper95 {
			t.Fatalf("seed %d: target %+v", seed, tgt)
		}
	}
}

// wants.eps = 1 in W2 with m = M = 1, undeclared stochastic gradient
// noise and a planned step: whenever the session ends "target met", the
// final report's bound is within eps and every target says met (the
// noise, bound and re-plan are updated on the step path, not at timed
// reports).
func TestEpsTargetMetOnlyWhenTheBoundSaysSo(t *testing.T) {
	spec := Spec{Dim: 2, Chains: 4, Start: []float64{0.5, -0.5}, StartRows: 1, Seed: 5, BurnIn: 40,
		Curvature: &Curvature{StrongConvexity: 1, Smoothness: 1}, Wants: Wants{Eps: 1, Metric: bound.W2},
		Noise: Noise{Stochastic: true, Replicates: 2}, MaxEvaluations: 200000}
	r := rand.New(rand.NewPCG(5, 6))
	noisy := func(p *Points, ev *Evaluations) {
		ev.Grad = make([]float64, 2*len(p.Points))
		for row := range p.Rows {
			for j := range 2 {
				for i := range p.Dim {
					ev.Grad[(row*2+j)*p.Dim+i] = -p.Points[row*p.Dim+i] + 2*r.NormFloat64()
				}
			}
		}
	}
	_, res, err := drive(t, mustNew(t, spec, Limits{ProgressInterval: time.Hour}), noisy)
	if err != nil || res.Finished.Reason != TargetMet {
		t.Fatalf("reason %v err %v", res.Finished.Reason, err)
	}
	p := res.Finished.Progress
	if p.Bound == nil || p.Bound.Total > 1 {
		t.Fatalf("target met with bound %+v", p.Bound)
	}
	for _, tg := range p.Targets {
		if !tg.Met {
			t.Fatalf("target met but %+v", tg)
		}
	}
}

// Chains started at (30, 30) on N(0, I) with m = M = 1 and a W2 bound:
// the start distance is certified from the start gradient,
// ‖∇log π(x₀)‖/m + √(p/m) = 42.43 + 1.41 = 43.84 ≥ the exact
// W2(δ_{x₀}, N(0, I)) = √(1800 + 2) = 42.45, and the reported bound
// dominates the exact W2 of the chains' law after K steps of LMC with
// step h (a Gaussian: mean (1 − h)^K·x₀, per-coordinate variance
// 2h(1 − (1 − h)^{2K})/(1 − (1 − h)²), derived here from the AR(1)
// recursion; W2 between Gaussians with proportional-to-identity
// covariances is √(‖Δμ‖² + p(s₁ − s₂)²), the closed form of Givens and
// Shortt (1984)).
func TestW2StartCertifiedFromGradient(t *testing.T) {
	const h, K = 0.05, 40
	spec := Spec{Dim: 2, Chains: 2, Start: []float64{30, 30}, StartRows: 1, Step: h, Seed: 4, DrawsPerChain: K,
		Curvature: &Curvature{StrongConvexity: 1, Smoothness: 1}, Wants: Wants{Metric: bound.W2}}
	s := mustNew(t, spec, Limits{})
	_, res, err := drive(t, s, gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	if d := s.guarantee.setting.StartDistance; math.Abs(d-(math.Sqrt(1800)+math.Sqrt(2))) > 1e-9 {
		t.Fatalf("certified start distance %v, want 43.84", d)
	}
	b := res.Finished.Progress.Bound
	a := math.Pow(1-h, K)
	v := 2 * h * (1 - a*a) / (1 - (1-h)*(1-h))
	exact := math.Sqrt(2*900*a*a + 2*(math.Sqrt(v)-1)*(math.Sqrt(v)-1))
	if b == nil || !(b.Total >= exact) {
		t.Fatalf("bound %+v below the exact W2 %v", b, exact)
	}
	c, ok := checkNamed(res.Finished.Checks, "guarantee")
	if !ok || !strings.Contains(c.Message, "certified from the start gradients") {
		t.Fatalf("guarantee check %+v", c)
	}
}

// With a declared metric C the W2 start certificate is taken in the
// metric's units: on N(0, 100·I) with C = 100·I (so m = M = 1 in those
// units, y = x/10 ~ N(0, I)), chains started at x₀ = (30, 30) have
// y₀ = (3, 3) and the exact W2(δ_{y₀}, N(0, I)) = √(18 + 2) = 4.47. The
// certificate ‖Lᵀ∇log π(x₀)‖/m + √(p/m) = √18 + √2 = 5.66 covers it
// (the Euclidean gradient's norm, 0.42, would give 1.84, a bound below the
// truth), and the reported bound dominates the exact W2, in y, of the
// chains' law after K steps (lmcIsoLaw, since LMC with metric C on x is
// plain LMC on y).
func TestW2StartCertifiedInTheDeclaredMetric(t *testing.T) {
	const h, K = 0.05, 40
	prec := mat.NewSymDense(2, []float64{0.01, 0, 0, 0.01})
	tg, err := targets.NewGaussian(make([]float64, 2), prec)
	if err != nil {
		t.Fatal(err)
	}
	spec := Spec{Dim: 2, Chains: 2, Start: []float64{30, 30}, StartRows: 1, Step: h, Seed: 4, DrawsPerChain: K,
		Metric: []float64{100, 100}, Curvature: &Curvature{StrongConvexity: 1, Smoothness: 1}, Wants: Wants{Metric: bound.W2}}
	r := runTarget(t, spec, tg, false, nil)
	if r.err != nil {
		t.Fatal(r.err)
	}
	b := r.finished.Progress.Bound
	a, v := lmcIsoLaw(h, K, 0)
	exact := math.Sqrt(2*9*a*a + 2*(math.Sqrt(v)-1)*(math.Sqrt(v)-1))
	if b == nil || !(b.Total >= exact) {
		t.Fatalf("bound %+v below the exact W2 %v (in the metric's units)", b, exact)
	}
	c, ok := checkNamed(r.finished.Checks, "guarantee")
	if !ok || !strings.Contains(c.Message, "declared metric's units") || !strings.Contains(c.Message, "5.657") {
		t.Fatalf("guarantee check %+v: want the start distance 5.657 in the declared metric's units", c)
	}
}

// lmcIsoLaw is the law of one LMC chain on N(0, I) (gradient −x) after k
// steps of size h from N(μ₀, v₀I): LMC's recursion x ← (1 − h)x + √(2h)ξ
// is linear and Gaussian, so the law stays N(a·μ₀, v·I) with a = (1 − h)^k
// and v = a²v₀ + 2h(1 − a²)/(1 − (1 − h)²) (derived here: the variance
// obeys v_{j+1} = (1 − h)²v_j + 2h; docs/methods.md, section 4).
func lmcIsoLaw(h float64, k int, v0 float64) (a, v float64) {
	a = math.Pow(1-h, float64(k))
	return a, a*a*v0 + 2*h*(1-a*a)/(1-(1-h)*(1-h))
}

// tvCentred2D is the exact TV between N(0, s²I₂) and N(0, I₂), a closed
// form derived here: the densities cross on the circle ‖x‖² = ρ² =
// 2s²·log s²/(s² − 1), and ‖x‖²/s² is χ²₂ (exponential with mean 2) under
// the first, so TV = |exp(−ρ²/(2s²)) − exp(−ρ²/2)|.
func tvCentred2D(s2 float64) float64 {
	if s2 == 1 {
		return 0
	}
	rho2 := 2 * s2 * math.Log(s2) / (s2 - 1)
	return math.Abs(math.Exp(-rho2/(2*s2)) - math.Exp(-rho2/2))
}

// The closed form of tvCentred2D against gonum's Gauss–Legendre rule on
// the radial integral ½∫₀^∞ |p(r) − q(r)|·2πr dr, split where the
// densities cross.
func TestTVCentred2DMatchesIntegral(t *testing.T) {
	for _, s2 := range []float64{0.5, 1.0005, 1.3, 4} {
		dens := func(r, v float64) float64 { return math.Exp(-r*r/(2*v)) / (2 * math.Pi * v) }
		f := func(r float64) float64 { return math.Pi * r * math.Abs(dens(r, s2)-dens(r, 1)) }
		rho := math.Sqrt(2 * s2 * math.Log(s2) / (s2 - 1))
		got := quad.Fixed(f, 0, rho, 300, nil, 0) + quad.Fixed(f, rho, 40*math.Sqrt(math.Max(s2, 1)), 600, nil, 0)
		if math.Abs(got-tvCentred2D(s2)) > 1e-10 {
			t.Errorf("s² = %v: integral %.12g, closed form %.12g", s2, got, tvCentred2D(s2))
		}
	}
}

// The example: a TV target of 0.1 on N(0, I) in 2-D with
// m = M = 1 declared, chains given the start (30, 30) or (100, 100). The
// mode search runs first (counted in the evaluations): its step
// 2/(m + M) = 1 lands exactly on the mode 0 (x − 1·x), where the
// certified radius is 0, so it takes two gradients and adds no shift.
// The chains then start from N(0, I), the plan is the rule of Dalalyan
// (2017) for 0.9 of the target (kernels/bound), and the session from
// (30, 30) ends "target met" with a bound ≥ the exact TV of the chains'
// law, N(0, vI) after k steps (lmcIsoLaw) against N(0, I) (tvCentred2D).
// From (100, 100) the search ends at the same x̂ = 0 and the same seed
// draws the same starts, bit for bit, so the rest of that run is the
// same chain: it runs 50 steps, where the bound again dominates the
// exact TV.
func TestTVGuaranteeStartsFromTheCertifiedMode(t *testing.T) {
	plan, err := bound.NewPlan(bound.Spec{Setting: bound.Setting{Convexity: 1, Smoothness: 1, Dim: 2, Source: bound.Declared},
		Metric: bound.TV, Eps: 0.1 * (1 - bound.TVShiftShare), Chains: 2})
	if err != nil {
		t.Fatal(err)
	}
	var first []float64
	for _, x0 := range []float64{30, 100} {
		spec := Spec{Dim: 2, Chains: 2, Start: []float64{x0, x0}, StartRows: 1, Seed: 4, MaxEvaluations: 2 * 8000,
			Curvature: &Curvature{StrongConvexity: 1, Smoothness: 1}, Wants: Wants{Eps: 0.1, Metric: bound.TV}}
		want := TargetMet
		if x0 == 100 {
			spec.DrawsPerChain, want = 50, DrawsCollected
		}
		s := mustNew(t, spec, Limits{ProgressInterval: time.Hour})
		tr, res, err := drive(t, s, gaussian(1))
		if err != nil || res.Finished.Reason != want {
			t.Fatalf("start %v: reason %v err %v", x0, res.Finished.Reason, err)
		}
		if tr.registered.Step != plan.Step || tr.registered.PlannedSteps != plan.Iterations {
			t.Fatalf("start %v: registered step %v planned %d; plan %v, %d", x0, tr.registered.Step, tr.registered.PlannedSteps, plan.Step, plan.Iterations)
		}
		ms := s.mode
		if ms == nil || ms.evaluated != 2 || ms.iters != 1 || ms.r != 0 || ms.xhat[0] != 0 || ms.xhat[1] != 0 || s.guarantee.shift != 0 {
			t.Fatalf("start %v: mode search %+v", x0, ms)
		}
		if first == nil {
			first = ms.starts
		} else if !sameBits(first, ms.starts) {
			t.Fatalf("start %v: starts %v, from (30, 30) %v", x0, ms.starts, first)
		}
		p := res.Finished.Progress
		if p.EvaluationsUsed != 2+2*p.Steps {
			t.Fatalf("start %v: %d evaluations for %d steps and a 2-gradient search", x0, p.EvaluationsUsed, p.Steps)
		}
		_, v := lmcIsoLaw(plan.Step, int(p.Steps), 1)
		exact := tvCentred2D(v)
		b := p.Bound
		if b == nil || !(b.Total >= exact) || (want == TargetMet && !(b.Total <= 0.1)) {
			t.Fatalf("start %v: bound %+v, exact TV %v", x0, b, exact)
		}
		t.Logf("start (%v, %v): %d steps, %d evaluations, bound %.4f ≥ exact TV %.3g", x0, x0, p.Steps, p.EvaluationsUsed, b.Total, exact)
		c, ok := checkNamed(res.Finished.Checks, "guarantee")
		if !ok || c.Status != CheckPass || !strings.Contains(c.Message, "mode search") {
			t.Fatalf("start %v: guarantee check %+v", x0, c)
		}
	}
}

// A looser declaration, m = 0.5 and M = 1, on the same N(0, I): the
// search's step 2/(m + M) = 4/3 maps x to −x/3 (derived here), the
// contraction (M − m)/(M + m) = 1/3 of Nesterov's (2004) theorem; the
// certified radius ‖∇log π(x)‖/m = 2‖x‖ starts at 84.85 and must reach
// ShiftRadius(0.01, 1) = 0.02507, which takes 8 steps (3⁷ < 84.85/0.02507
// < 3⁸), 9 gradients. The bound's start term carries the shift
// erf(r/(2√2)) exactly, and the reported bound is ≥ a proven upper bound
// on the exact TV of the chains' law N(a·x̂, vI) (lmcIsoLaw, from the
// start N(x̂, I)): by the triangle inequality TV(N(a·x̂, vI), N(0, I)) ≤
// TV(N(a·x̂, vI), N(0, vI)) + TV(N(0, vI), N(0, I)) = erf(a‖x̂‖/(2√(2v)))
// + tvCentred2D(v) (bound.ShiftTV's closed form, then the one above).
func TestTVShiftTermAfterAMultiStepSearch(t *testing.T) {
	spec := Spec{Dim: 2, Chains: 2, Start: []float64{30, 30}, StartRows: 1, Seed: 5, DrawsPerChain: 400,
		Curvature: &Curvature{StrongConvexity: 0.5, Smoothness: 1}, Wants: Wants{Eps: 0.1, Metric: bound.TV}}
	s := mustNew(t, spec, Limits{})
	_, res, err := drive(t, s, gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	ms := s.mode
	want := 30 / math.Pow(3, 8)
	if ms == nil || ms.iters != 8 || ms.evaluated != 9 || math.Abs(ms.xhat[0]-want) > 1e-12*want || math.Abs(ms.xhat[1]-want) > 1e-12*want ||
		math.Abs(ms.r-2*math.Hypot(ms.xhat[0], ms.xhat[1])) > 1e-15 {
		t.Fatalf("mode search %+v, want x̂ = (%v, %v) after 8 steps", ms, want, want)
	}
	p := res.Finished.Progress
	h := s.guarantee.h
	tvb, err := bound.TVBound(bound.Setting{Convexity: 0.5, Smoothness: 1, Dim: 2, Source: bound.Declared}, 0, h, int(p.Steps))
	if err != nil {
		t.Fatal(err)
	}
	shift := bound.ShiftTV(ms.r, 1)
	b := p.Bound
	if b == nil || b.Start != tvb.Start+shift || b.Total != tvb.Total+shift || !(shift > 0.004) || p.EvaluationsUsed != 9+2*p.Steps {
		t.Fatalf("bound %+v, theorem's %+v, shift %v; %d evaluations", b, tvb, shift, p.EvaluationsUsed)
	}
	a, v := lmcIsoLaw(h, int(p.Steps), 1)
	upper := math.Erf(a*math.Hypot(ms.xhat[0], ms.xhat[1])/(2*math.Sqrt(2*v))) + tvCentred2D(v)
	if !(b.Total >= upper) {
		t.Fatalf("bound %v below the upper bound %v on the exact TV", b.Total, upper)
	}
	t.Logf("%d steps: bound %.4f (shift %.3g) ≥ exact TV ≤ %.3g", p.Steps, b.Total, shift, upper)
}

// The starts come from a stream of the session's seed: the same seed
// gives the same bits, another seed other starts. With 400 chains their
// sample mean and variance match N(x̂, M⁻¹I) (M = 1) within 4 standard
// errors (a sample mean of n normals has sd √(v/n), a sample variance
// √(2/(n−1))·v; common practice).
func TestModeSearchStartsAreSeeded(t *testing.T) {
	starts := func(seed uint64, chains int) ([]float64, []float64) {
		spec := Spec{Dim: 2, Chains: chains, Start: []float64{30, 30}, StartRows: 1, Seed: seed, DrawsPerChain: 1,
			Curvature: &Curvature{StrongConvexity: 0.5, Smoothness: 1}, Wants: Wants{Eps: 0.1, Metric: bound.TV}}
		s := mustNew(t, spec, Limits{})
		tr, _, err := drive(t, s, gaussian(1))
		if err != nil || len(tr.draws) == 0 {
			t.Fatal(err)
		}
		return s.mode.starts, tr.draws[0].Values
	}
	a, da := starts(21, 4)
	b, db := starts(21, 4)
	c, _ := starts(22, 4)
	if !sameBits(a, b) || !sameBits(da, db) || slices.Equal(a, c) {
		t.Fatalf("same seed: %v and %v; another seed: %v", a, b, c)
	}
	n := 400
	x, _ := starts(23, n)
	want := 30 / math.Pow(3, 8)
	for i := range 2 {
		var sum, sq float64
		for c := range n {
			sum += x[c*2+i]
		}
		mean := sum / float64(n)
		for c := range n {
			d := x[c*2+i] - mean
			sq += d * d
		}
		v := sq / float64(n-1)
		if math.Abs(mean-want) > 4/math.Sqrt(float64(n)) || math.Abs(v-1) > 4*math.Sqrt(2/float64(n-1)) {
			t.Fatalf("coordinate %d: mean %v (x̂ %v), variance %v", i, mean, want, v)
		}
	}
}

// A declared M below the target's curvature (N(0, I/4), precision 4,
// declared m = M = 1): the search's step 1 maps x to −3x (derived here),
// so it cannot certify within the steps the theorem allows (one, plus
// one for rounding); the session fails on register.curvature saying the
// declaration does not hold, and never samples.
func TestModeSearchFailsOnAFalseDeclaration(t *testing.T) {
	spec := Spec{Dim: 2, Chains: 2, Start: []float64{30, 30}, StartRows: 1, Seed: 4, DrawsPerChain: 10,
		Curvature: &Curvature{StrongConvexity: 1, Smoothness: 1}, Wants: Wants{Eps: 0.1, Metric: bound.TV}}
	tr, res, err := drive(t, mustNew(t, spec, Limits{}), gaussian(4))
	e, ok := AsError(err)
	if !ok || e.Kind != Invalid || e.Field != "register.curvature" || !strings.Contains(e.Reason, "do not hold") ||
		res.Finished.Reason != Failed || len(tr.draws) != 0 || res.Finished.Progress.EvaluationsUsed != 3 {
		t.Fatalf("got %v (%v), %d draws, %d evaluations", err, res.Finished.Reason, len(tr.draws), res.Finished.Progress.EvaluationsUsed)
	}
	if c, ok := checkNamed(res.Finished.Checks, "guarantee"); !ok || c.Status != CheckFail || !strings.Contains(c.Message, "mode search") {
		t.Fatalf("guarantee check %+v", res.Finished.Checks)
	}
}

// A TV guarantee whose assumptions the engine cannot establish is refused
// at registration, with INVALID_ARGUMENT's kind (server/status.go maps
// Invalid to it), naming the field and saying why.
func TestTVGuaranteeRefusedAtRegistration(t *testing.T) {
	base := func() Spec {
		return Spec{Dim: 2, Chains: 2, Start: []float64{30, 30}, StartRows: 1, Seed: 4,
			Curvature: &Curvature{StrongConvexity: 1, Smoothness: 1}, Wants: Wants{Eps: 0.1, Metric: bound.TV}}
	}
	for _, c := range []struct {
		name, field, says string
		edit              func(*Spec)
	}{
		{"no curvature", "register.curvature", "needs the declared curvature m > 0 and M", func(s *Spec) { s.Curvature = nil }},
		{"no curvature, no eps", "register.curvature", "N(x*, M⁻¹I)", func(s *Spec) { s.Curvature, s.Wants.Eps, s.Step = nil, 0, 0.01 }},
		{"m = 0 without a second moment", "register.curvature.strong_convexity", "needs m > 0", func(s *Spec) { s.Curvature.StrongConvexity = 0 }},
		{"another kernel", "register.kernel", "lmc", func(s *Spec) { s.Kernel = "mala" }},
		{"stochastic gradients", "register.noise.kind", "exact gradients", func(s *Spec) { s.Noise = Noise{Stochastic: true} }},
		{"a start distance", "register.curvature.start_distance", "is for W2", func(s *Spec) { s.Curvature.StartDistance = 3 }},
		{"a step beyond 1/M", "register.step", "h ≤ 1/M", func(s *Spec) { s.Wants.Eps, s.Step = 0, 1.5 }},
	} {
		spec := base()
		c.edit(&spec)
		_, err := New("x", spec, Limits{})
		e, ok := AsError(err)
		if !ok || e.Kind != Invalid || e.Field != c.field || !strings.Contains(e.Reason, c.says) {
			t.Errorf("%s: got %v, want %s saying %q", c.name, err, c.field, c.says)
		}
	}
}

// A slow and a fast client with the same seed and answers get
// bit-identical draws and the same ending, for every kernel in the
// registry, and with stochastic gradients and an eps target (whose noise
// estimate, bound and re-plan run on the step path): progress reports
// are timed (1 ms), so they fall on different steps in the two runs.
func TestDrawsDoNotDependOnClientSpeed(t *testing.T) {
	type run struct {
		name string
		spec Spec
		o    func() oracle
	}
	var runs []run
	for _, name := range KernelNames() {
		spec := registrySpec(t, name)
		spec.DrawsPerChain = 60
		runs = append(runs, run{name, spec, func() oracle {
			return func(p *Points, ev *Evaluations) {
				req := &kernels.Request{Need: p.Need, Rows: p.Rows, Points: p.Points, Vectors: p.Vectors}
				a := kernels.NewAnswer(p.Rows, p.Dim)
				gaussianAnswer(req, a, p.Dim)
				if p.Need.Has(kernels.NeedGradient) {
					ev.Grad = slices.Repeat(a.Grad[:p.Rows*p.Dim], 1)
				}
				if p.Need.Has(kernels.NeedLogDensity) {
					ev.LogDensity = append([]float64(nil), a.LogDensity[:p.Rows]...)
				}
				if p.Need.Has(kernels.NeedHessian) {
					ev.Hessian = append([]float64(nil), a.Hessian[:p.Rows*p.Dim*p.Dim]...)
				}
				if p.Need.Has(kernels.NeedHessianVector) {
					ev.HessVec = append([]float64(nil), a.HessVec[:p.Rows*p.Dim]...)
				}
			}
		}})
	}
	eps := Spec{Dim: 2, Chains: 4, Start: []float64{0.5, -0.5}, StartRows: 1, Seed: 5, BurnIn: 40, DrawsPerChain: 200,
		Curvature: &Curvature{StrongConvexity: 1, Smoothness: 1}, Wants: Wants{Eps: 1, Metric: bound.W2},
		Noise: Noise{Stochastic: true, Replicates: 2}}
	runs = append(runs, run{"lmc, stochastic, eps", eps, func() oracle {
		r := rand.New(rand.NewPCG(5, 6))
		return func(p *Points, ev *Evaluations) {
			ev.Grad = make([]float64, 2*len(p.Points))
			for row := range p.Rows {
				for j := range 2 {
					for i := range p.Dim {
						ev.Grad[(row*2+j)*p.Dim+i] = -p.Points[row*p.Dim+i] + 2*r.NormFloat64()
					}
				}
			}
		}
	}})
	for _, rn := range runs {
		var got [2][]float64
		var reasons [2]Reason
		for i, delay := range []time.Duration{0, 300 * time.Microsecond} {
			o := rn.o()
			slow := func(p *Points, ev *Evaluations) {
				time.Sleep(delay)
				o(p, ev)
			}
			tr, res, err := drive(t, mustNew(t, rn.spec, Limits{ProgressInterval: time.Millisecond}), slow)
			if err != nil {
				t.Fatalf("%s: %v", rn.name, err)
			}
			for _, d := range tr.draws {
				got[i] = append(got[i], d.Values...)
			}
			reasons[i] = res.Finished.Reason
		}
		if len(got[0]) == 0 || !slices.Equal(got[0], got[1]) || reasons[0] != reasons[1] {
			t.Fatalf("%s: %d and %d draw values, equal %v; reasons %v", rn.name, len(got[0]), len(got[1]), slices.Equal(got[0], got[1]), reasons)
		}
	}
}

// A 20-parameter logistic posterior (200 invented observations, prior
// precision 1) sampled with the kinetic kernel at step 0.1 and inverse
// mass 1: the posterior's curvature reaches about 0.25·λ_max(XᵀX) + 1
// (the bound of kernels/targets), far beyond what that step follows, so
// the run is wasted. The session does not end "target met": the verdict
// names stability (and divergence or bias, whichever the run reaches).
func TestKineticTooLargeAStepIsNamed(t *testing.T) {
	const n, p = 200, 20
	r := rand.New(rand.NewPCG(8, 9))
	x := mat.NewDense(n, p, nil)
	y := make([]float64, n)
	for i := range n {
		var z float64
		for j := range p {
			v := r.NormFloat64()
			x.Set(i, j, v)
			z += 0.3 * v
		}
		if r.Float64() < 1/(1+math.Exp(-z)) {
			y[i] = 1
		}
	}
	tg, err := targets.NewLogistic(x, y, 1)
	if err != nil {
		t.Fatal(err)
	}
	spec := Spec{Dim: p, Chains: 4, Kernel: "kinetic", Start: make([]float64, p), StartRows: 1, Step: 0.1, Seed: 12, BurnIn: 200,
		Wants: Wants{MinBulkESS: 400}, MaxEvaluations: 4 * 3000}
	_, res, err := drive(t, mustNew(t, spec, Limits{}), targetOracle(tg, 1))
	if res.Finished.Reason == TargetMet {
		t.Fatalf("target met: %+v", res.Finished.Checks)
	}
	c, ok := checkNamed(res.Finished.Checks, "stability")
	if !ok || c.Status == CheckPass {
		t.Fatalf("stability check %+v (err %v)", res.Finished.Checks, err)
	}
}

// A guaranteed W2 bound much larger than the posterior's spread is
// flagged as saying little: on N(0, I/400) (sd 0.05) with the loose
// declaration m = 1, M = 400 and a start distance of 30, the bound after
// a few hundred steps stays far above √2·0.05.
func TestUninformativeGuaranteeWarns(t *testing.T) {
	spec := Spec{Dim: 2, Chains: 4, Start: []float64{0.01, -0.01}, StartRows: 1, Step: 0.002, Seed: 2, BurnIn: 50,
		DrawsPerChain: 300, Curvature: &Curvature{StrongConvexity: 1, Smoothness: 400, StartDistance: 30}, Wants: Wants{Metric: bound.W2}}
	_, res, err := drive(t, mustNew(t, spec, Limits{}), gaussian(400))
	if err != nil {
		t.Fatal(err)
	}
	c, ok := checkNamed(res.Finished.Checks, "guarantee")
	if !ok || c.Status != CheckWarn || !strings.Contains(c.Message, "says little") {
		t.Fatalf("guarantee check %+v", res.Finished.Checks)
	}
}

// LMC at step 1.9 on N(0, 1) multiplies by 1 − 1.9 = −0.9 per step
// (derived here): strongly antithetic chains, whose ESS exceeds the
// draws. Every reported ESS stays positive and at most S·log₁₀ S (the
// floor of Vehtari et al. 2021 on the autocorrelation time, in
// kernels/diag), and the verdict warns that the step is over half the
// stable limit 2/M.
func TestAntitheticChainsReportPossibleESS(t *testing.T) {
	spec := Spec{Dim: 1, Chains: 4, Start: []float64{0.3}, StartRows: 1, Step: 1.9, Seed: 6, BurnIn: 100, DrawsPerChain: 1000}
	_, res, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	s := float64(4 * 1000)
	for _, p := range res.Finished.Progress.Parameters {
		if !(p.BulkESS > 0 && p.BulkESS <= s*math.Log10(s)) || !(p.TailESS > 0 && p.TailESS <= s*math.Log10(s)) {
			t.Fatalf("ESS %+v from %v draws", p, s)
		}
	}
	c, ok := checkNamed(res.Finished.Checks, "stability")
	if !ok || c.Status != CheckWarn {
		t.Fatalf("stability check %+v", res.Finished.Checks)
	}
}

// Declared curvature is read in the declared metric's units: on
// N(0, diag(1, 100)) with the metric C = diag(1, 100), the curvature of
// −log π in y = L⁻¹x is the identity, so m = M = 1. The search's step
// x ← x + 1·C·∇log π(x) = x − x lands on the mode at once (derived here),
// and the starts x̂ + L·ξ/√M have variances (1, 100): within 4 standard
// errors of a sample variance (√(2/(n−1))·v; common practice) over 400
// chains.
func TestModeSearchInTheDeclaredMetric(t *testing.T) {
	const n = 400
	spec := Spec{Dim: 2, Chains: n, Start: []float64{30, -300}, StartRows: 1, Seed: 8, Step: 0.01, DrawsPerChain: 1,
		Metric: []float64{1, 100}, Curvature: &Curvature{StrongConvexity: 1, Smoothness: 1}, Wants: Wants{Metric: bound.TV}}
	s := mustNew(t, spec, Limits{})
	_, res, err := drive(t, s, func(p *Points, ev *Evaluations) {
		ev.Grad = make([]float64, len(p.Points))
		for i, x := range p.Points {
			ev.Grad[i] = -x * []float64{1, 0.01}[i%2]
		}
	})
	if err != nil {
		t.Fatal(err)
	}
	ms := s.mode
	if ms == nil || ms.evaluated != 2 || ms.xhat[0] != 0 || ms.xhat[1] != 0 || res.Finished.Progress.Bound == nil {
		t.Fatalf("mode search %+v, bound %+v", ms, res.Finished.Progress.Bound)
	}
	for i, want := range []float64{1, 100} {
		var sum, sq float64
		for c := range n {
			sum += ms.starts[c*2+i]
		}
		mean := sum / n
		for c := range n {
			d := ms.starts[c*2+i] - mean
			sq += d * d
		}
		if v := sq / (n - 1); math.Abs(v-want) > 4*math.Sqrt(2.0/(n-1))*want {
			t.Fatalf("coordinate %d: start variance %v, want %v", i, v, want)
		}
	}
}
