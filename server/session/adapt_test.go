package session

import (
	"math"
	"slices"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"

	"sluice/kernels"
	"sluice/kernels/diag"
	"sluice/kernels/targets"
)

// correlated3 is N(0, Σ) with sds 1, 10 and 0.1 and correlations 0.8
// (coordinates 0, 1) and −0.4 (coordinates 1, 2): condition number of Σ
// about 2·10⁴.
func correlated3(t *testing.T) (*targets.Gaussian, *mat.SymDense) {
	t.Helper()
	sd := []float64{1, 10, 0.1}
	corr := [][]float64{{1, 0.8, 0}, {0.8, 1, -0.4}, {0, -0.4, 1}}
	cov := mat.NewSymDense(3, nil)
	for i := range 3 {
		for j := i; j < 3; j++ {
			cov.SetSym(i, j, corr[i][j]*sd[i]*sd[j])
		}
	}
	var ch mat.Cholesky
	if !ch.Factorize(cov) {
		t.Fatal("Σ not positive definite")
	}
	var prec mat.SymDense
	if err := ch.InverseTo(&prec); err != nil {
		t.Fatal(err)
	}
	g, err := targets.NewGaussian(make([]float64, 3), &prec)
	if err != nil {
		t.Fatal(err)
	}
	return g, cov
}

// whitenedEigen returns the extreme eigenvalues of Σ^{-1/2}·C·Σ^{-1/2},
// computed as those of C·Σ⁻¹ (similar matrices).
func whitenedEigen(t *testing.T, c []float64, cov *mat.SymDense) (lo, hi float64) {
	t.Helper()
	p := cov.SymmetricDim()
	var inv mat.Dense
	if err := inv.Inverse(cov); err != nil {
		t.Fatal(err)
	}
	var m mat.Dense
	m.Mul(mat.NewDense(p, p, c), &inv)
	var e mat.Eigen
	if !e.Factorize(&m, mat.EigenNone) {
		t.Fatal("eigendecomposition failed")
	}
	lo, hi = math.Inf(1), 0
	for _, v := range e.Values(nil) {
		lo, hi = math.Min(lo, real(v)), math.Max(hi, real(v))
	}
	return lo, hi
}

// A metric adapted on a correlated Gaussian approaches its covariance:
// the eigenvalues of Σ^{-1/2}CΣ^{-1/2} lie near 1. The tolerance: the
// last window pools 8 chains over more than 900 steps; with at least 100
// effective draws in dimension 3, the whitened sample covariance's
// eigenvalues lie within the Marchenko–Pastur edges (1 ± √(3/100))² =
// [0.69, 1.35] (Marchenko and Pastur 1967; the finite-sample spread is
// of that order), the step's own inflation of the variances is at most
// 1.5 during adaptation (travelTolerance), and the shrinkage only pulls
// toward the previous metric; so [0.5, 2.1]. The identity's whitened
// eigenvalues span [10⁻², 10²] here, so the check is far from vacuous.
func TestAdaptedMetricApproachesCovariance(t *testing.T) {
	g, cov := correlated3(t)
	spec := Spec{Dim: 3, Chains: 8, Start: []float64{0.5, -5, 0.05}, StartRows: 1, Seed: 31, BurnIn: 2000, DrawsPerChain: 10}
	r := runTarget(t, spec, g, false, nil)
	if r.err != nil {
		t.Fatal(r.err)
	}
	c := r.res.Kernel.(kernels.MetricUser).Metric()
	if c.Kind() != kernels.DenseMetric {
		t.Fatalf("metric kind %v, want dense", c.Kind())
	}
	lo, hi := whitenedEigen(t, c.Matrix(), cov)
	if lo < 0.5 || hi > 2.1 {
		t.Fatalf("whitened eigenvalues of the adapted metric in [%.3g, %.3g], want within [0.5, 2.1]", lo, hi)
	}
	rep := r.finished.Progress.Metric
	if rep.Source != "adapted" || rep.Updates != len(rep.WindowEnds) || rep.UpdatedAtStep != rep.WindowEnds[len(rep.WindowEnds)-1] {
		t.Fatalf("metric report %+v: want every window to have updated the adapted metric", rep)
	}
}

// The kernel's metric and step do not change after burn-in: every
// progress report after it shows the same metric, updated last inside
// burn-in, and the same step; the final kernel holds that metric.
func TestMetricFrozenAfterBurnIn(t *testing.T) {
	g, _ := correlated3(t)
	const burn = 400
	spec := Spec{Dim: 3, Chains: 4, Start: []float64{0.5, -5, 0.05}, StartRows: 1, Seed: 32, BurnIn: burn,
		DrawsPerChain: 300, ProgressEverySteps: 25, Kernel: "kinetic"}
	r := runTarget(t, spec, g, true, nil)
	if r.err != nil {
		t.Fatal(r.err)
	}
	var after []Progress
	for _, p := range r.progress {
		if p.Steps >= burn {
			after = append(after, p)
		}
	}
	if len(after) < 10 {
		t.Fatalf("%d progress reports after burn-in", len(after))
	}
	first := after[0]
	if first.Metric.UpdatedAtStep < 0 || first.Metric.UpdatedAtStep >= burn || first.Metric.Adapting {
		t.Fatalf("metric at burn-in's end: %+v", first.Metric)
	}
	for _, p := range after[1:] {
		if p.Metric.UpdatedAtStep != first.Metric.UpdatedAtStep || p.Metric.Condition != first.Metric.Condition ||
			p.Kernel.Step != first.Kernel.Step || !slices.Equal(choiceValues(p.Tuning), choiceValues(first.Tuning)) {
			t.Fatalf("step %d: metric %+v step %v, at burn-in's end %+v step %v", p.Steps, p.Metric, p.Kernel.Step, first.Metric, first.Kernel.Step)
		}
	}
	if c := r.res.Kernel.(kernels.MetricUser).Metric().Condition(); c != first.Metric.Condition {
		t.Fatalf("final kernel's metric has condition %v, the frozen one %v", c, first.Metric.Condition)
	}
}

func choiceValues(cs []Choice) []float64 {
	out := make([]float64, len(cs))
	for i, c := range cs {
		out[i] = c.Value
	}
	return out
}

// Adaptation and automatic tuning run on a step count, not wall time:
// the same seed and answers give bit-identical draws whether the client
// answers at once or pauses, and whether progress is reported every
// request or by the default timer.
func TestAdaptationDeterministicWhateverClientSpeed(t *testing.T) {
	g, _ := correlated3(t)
	spec := Spec{Dim: 3, Chains: 3, Start: []float64{0.5, -5, 0.05}, StartRows: 1, Seed: 33, BurnIn: 300,
		DrawsPerChain: 50, Kernel: "midpoint"}
	fast := runTarget(t, spec, g, false, nil)
	slowSpec := spec
	slowSpec.ProgressInterval = 1 // a nanosecond: a report after every step
	slow := runTarget(t, slowSpec, g, false, func(req uint64) {
		if req%97 == 0 {
			busy := 0.0
			for i := range 200000 { // a slow client: work, not a timer
				busy += math.Sqrt(float64(i))
			}
			_ = busy
		}
	})
	if fast.err != nil || slow.err != nil {
		t.Fatal(fast.err, slow.err)
	}
	for i := range fast.draws {
		for c := range fast.draws[i] {
			if !slices.Equal(fast.draws[i][c], slow.draws[i][c]) {
				t.Fatalf("coordinate %d chain %d: draws differ with the client's speed", i, c)
			}
		}
	}
	if len(fast.draws[0][0]) != 50 {
		t.Fatalf("%d draws, want 50", len(fast.draws[0][0]))
	}
}

// The stationary variance of the LMC recursion on a Gaussian direction
// of curvature λ is 1/(λ(1 − hλ/2)) (closed form of the AR(1) recursion
// x' = (1 − hλ)x + √(2h)ξ), and its autocorrelation time (1 + a)/(1 − a)
// with a = 1 − hλ; the solver reproduces both and finds the step unstable
// at hλ ≥ 2.
func TestStationaryVarianceClosedForms(t *testing.T) {
	for _, c := range []struct{ h, l float64 }{{0.01, 1}, {0.1, 5}, {0.5, 3}, {1.9, 1}} {
		v, ok := stationaryVariance(lmcScheme(c.h), c.l)
		want := 1 / (c.l * (1 - c.h*c.l/2))
		if !ok || math.Abs(v-want) > 1e-12*want {
			t.Fatalf("h %v λ %v: variance %v (%v), want %v", c.h, c.l, v, ok, want)
		}
		a := 1 - c.h*c.l
		if tau := autocorrelationTime(lmcScheme(c.h), c.l); math.Abs(tau-(1+a)/(1-a)) > 1e-9*math.Abs((1+a)/(1-a)) {
			t.Fatalf("h %v λ %v: τ %v, want %v", c.h, c.l, tau, (1+a)/(1-a))
		}
	}
	if _, ok := stationaryVariance(lmcScheme(2.1), 1); ok {
		t.Fatal("hλ = 2.1 found stable")
	}
	// The lmc rule: h = 2τ/((1 + τ)·1.1·M̂) puts the stiffest direction's
	// variance error exactly at the tolerance.
	set, _ := choose(ruleOverdamped, 1, 50, 0, 0, varianceTolerance, settings{})
	if v, _ := stationaryVariance(lmcScheme(set.step), 1.1*50); math.Abs(v*1.1*50-1-varianceTolerance) > 1e-9 {
		t.Fatalf("lmc rule: variance error %v at 1.1·M̂, want %v", v*1.1*50-1, varianceTolerance)
	}
}

// The exact stationary variances of the kinetic, randomised midpoint and
// overdamped midpoint steps (solved from their linear recursions) match
// the kernels themselves, run on a one-dimensional Gaussian of curvature
// λ = 4 with 4000 independent chains: the mean of x² over chains after
// 400 steps, within 4 standard errors (the chains are independent, so
// the standard error is the sample sd of x² over √4000). The steps are
// large enough that the variance errors (5–40 %) are many standard errors
// away from 1/λ, so a wrong recursion fails.
func TestStationaryVarianceMatchesKernels(t *testing.T) {
	const chains, steps, l = 4000, 400, 4.0
	cases := []struct {
		name  string
		sc    scheme
		build func() kernels.Kernel
	}{
		{"kinetic", kineticScheme(0.4, 0.5, 0.25), func() kernels.Kernel {
			return kernels.NewKinetic(1, chains, 0.4, 0.5, 0.25, []float64{0}, nil, kernels.NewSource(41))
		}},
		{"midpoint", midpointScheme(0.6, 2), func() kernels.Kernel {
			return kernels.NewMidpoint(1, chains, 0.6, 2, []float64{0}, nil, kernels.NewSource(42))
		}},
		{"midpoint-overdamped", overdampedMidpointScheme(0.3), func() kernels.Kernel {
			return kernels.NewOverdampedMidpoint(1, chains, 0.3, []float64{0}, kernels.NewSource(43))
		}},
	}
	for _, c := range cases {
		want, ok := stationaryVariance(c.sc, l)
		if !ok {
			t.Fatalf("%s: unstable", c.name)
		}
		k := c.build()
		a := kernels.NewAnswer(chains, 1)
		for k.Steps() < steps {
			req := k.Next()
			for i := range req.Rows {
				a.Grad[i] = -l * req.Points[i]
			}
			k.Tell(a)
		}
		var s, s2 float64
		for _, x := range k.Positions() {
			s += x * x
			s2 += x * x * x * x
		}
		m := s / chains
		se := math.Sqrt((s2/chains - m*m) / chains)
		if math.Abs(m-want) > 4*se {
			t.Fatalf("%s: kernel's variance %v ± %v, the recursion's %v (1/λ = %v)", c.name, m, se, want, 1/l)
		}
		if math.Abs(want*l-1) < 8*se*l {
			t.Fatalf("%s: variance error %v too small to test the recursion", c.name, want*l-1)
		}
	}
}

// StepStability: LMC is unstable exactly from h·M = 2 (derived in the
// function's comment); the kinetic step at a tiny step is stable and at a
// huge one unstable; kernels without a step never are.
func TestStepStability(t *testing.T) {
	if v := StepStability("lmc", 0.019, 0, 0, 100); v.Unstable {
		t.Fatal(v.Reason)
	}
	if v := StepStability("lmc", 0.02, 0, 0, 100); !v.Unstable || !strings.Contains(v.Reason, "h·M") {
		t.Fatalf("h·M = 2 not unstable: %+v", v)
	}
	if v := StepStability("kinetic", 0.01, 2, 0.01, 100); v.Unstable {
		t.Fatal(v.Reason)
	}
	if v := StepStability("kinetic", 50, 0.1, 1, 100); !v.Unstable {
		t.Fatalf("kinetic at h = 50, u·M = 100 found stable: %+v", v)
	}
	// BAOAB on a direction of angular frequency ω = √(u·M) is stable
	// exactly below ω·h = 2, whatever γ (derived here: its 2×2 map has
	// trace (1 + e)(1 − (ωh)²/2) and determinant e = e^{−γh} < 1, and
	// a real 2×2 map is stable iff |trace| < 1 + det, which is
	// |1 − (ωh)²/2| < 1); here ω = 10.
	if v := StepStability("baoab", 0.199, 0.5, 1, 100); v.Unstable {
		t.Fatalf("baoab at ω·h = 1.99 found unstable: %+v", v)
	}
	if v := StepStability("baoab", 0.201, 0.5, 1, 100); !v.Unstable {
		t.Fatalf("baoab at ω·h = 2.01 found stable: %+v", v)
	}
	if v := StepStability("midpoint-overdamped", 1, 0, 0, 100); !v.Unstable {
		t.Fatalf("overdamped midpoint at h·M = 100 found stable: %+v", v)
	}
	if v := StepStability("hit-and-run", 10, 0, 0, 100); v.Unstable {
		t.Fatal("a kernel without a step was found unstable")
	}
}

// The schedule: windows end in order, the first after the skipped
// transient, the last at least B/10 (and 20) steps before burn-in ends,
// window lengths at least the first's; no schedule below the minimum.
func TestAdaptSchedule(t *testing.T) {
	if _, ends := adaptSchedule(minAdaptBurnIn - 1); ends != nil {
		t.Fatal("adapts in a burn-in below the minimum")
	}
	for _, b := range []int64{minAdaptBurnIn, 151, 400, 1000, 5000, 123457} {
		start, ends := adaptSchedule(b)
		w := max(10, b/20)
		if start != max(10, b/10) || len(ends) == 0 || ends[0] != start+w {
			t.Fatalf("B = %d: start %d, ends %v", b, start, ends)
		}
		prev := start
		for _, e := range ends {
			if e-prev < w {
				t.Fatalf("B = %d: window ending at %d shorter than %d (ends %v)", b, e, w, ends)
			}
			prev = e
		}
		if last := ends[len(ends)-1]; last > b-max(20, b/10) || last < b-max(20, b/10)-w {
			t.Fatalf("B = %d: last window ends at %d (ends %v)", b, last, ends)
		}
	}
}

// Bad metric fields get clear errors naming the field.
func TestMetricValidation(t *testing.T) {
	base := Spec{Dim: 2, Chains: 2, Start: []float64{0, 0}, StartRows: 1, Step: 0.1, BurnIn: 200}
	for _, c := range []struct {
		name  string
		edit  func(*Spec)
		field string
	}{
		{"wrong length", func(s *Spec) { s.Metric = []float64{1, 2, 3} }, "register.metric"},
		{"not positive", func(s *Spec) { s.Metric = []float64{1, -2} }, "register.metric"},
		{"not symmetric", func(s *Spec) { s.Metric = []float64{1, 0.5, 0.2, 1} }, "register.metric"},
		{"diagonal form, dense values", func(s *Spec) { s.Metric, s.MetricForm = []float64{1, 0, 0, 1}, MetricDiagonal }, "register.metric"},
		{"identity with values", func(s *Spec) { s.Metric, s.MetricForm = []float64{1, 1}, MetricIdentity }, "register.metric"},
		{"kernel without a metric", func(s *Spec) { s.Kernel, s.MetricForm = "ozaki", MetricDense }, "register.metric_form"},
		{"unknown form", func(s *Spec) { s.MetricForm = 9 }, "register.metric_form"},
		{"short burn-in", func(s *Spec) { s.MetricForm, s.BurnIn = MetricDense, 20 }, "register.burn_in"},
		{"stochastic automatic", func(s *Spec) { s.Step, s.Noise = 0, Noise{Stochastic: true} }, "register.step"},
	} {
		spec := base
		c.edit(&spec)
		_, err := New("x", spec, Limits{})
		e, ok := AsError(err)
		if !ok || e.Field != c.field {
			t.Errorf("%s: error %v, want one naming %s", c.name, err, c.field)
		}
	}
	// A declared dense metric is used as given.
	spec := base
	spec.Metric = []float64{2, 0.5, 0.5, 1}
	s, err := New("x", spec, Limits{})
	if err != nil {
		t.Fatal(err)
	}
	if m := s.kernel.(kernels.MetricUser).Metric(); m.Kind() != kernels.DenseMetric || !slices.Equal(m.Matrix(), spec.Metric) {
		t.Fatalf("declared metric not in use: %v", m.Matrix())
	}
}

// A friction the client gives wins, and the automatic step is chosen for
// it: the chosen step meets the variance tolerance with that friction
// (the scheme's exact stationary variance, worstError).
func TestGivenFrictionWins(t *testing.T) {
	set, why := choose(ruleKinetic, 1, 100, 0, 0, varianceTolerance, settings{friction: 0.7})
	if set.friction != 0.7 || why[1].Reason != "given by the client" {
		t.Fatalf("friction %v (%q), want the client's 0.7", set.friction, why[1].Reason)
	}
	if e := worstError(kineticScheme(set.step, 0.7, set.inverseMass), 1, probeSafety*100); e > varianceTolerance {
		t.Fatalf("step %v with the client's friction has variance error %v", set.step, e)
	}
}

// Every setting a rule chooses reaches the kernel: after the automatic
// tuning, the kernel's own step (and inverse mass, friction) equal the
// reported choices.
func TestChoicesReachTheKernel(t *testing.T) {
	g, _ := correlated3(t)
	for _, k := range []string{"lmc", "kinetic", "baoab", "midpoint", "midpoint-overdamped", "sgld", "sgld-cv", "svrg"} {
		spec := Spec{Dim: 3, Chains: 2, Kernel: k, Start: []float64{0.5, -5, 0.05}, StartRows: 1, Seed: 34, BurnIn: 20, DrawsPerChain: 5}
		r := runTarget(t, spec, g, false, nil)
		if r.err != nil {
			t.Fatalf("%s: %v", k, r.err)
		}
		for _, c := range r.finished.Progress.Tuning {
			var have float64
			switch c.Setting {
			case "step":
				have = stepOf(r.res.Kernel)
			case "friction":
				have = r.res.Kernel.(interface{ Friction() float64 }).Friction()
			case "inverse_mass":
				have = r.res.Kernel.(interface{ InverseMass() float64 }).InverseMass()
			}
			if k == "midpoint" && c.Setting == "friction" {
				have = 2 // the kernel's fixed friction
			}
			if have != c.Value {
				t.Fatalf("%s: %s chosen %v, the kernel has %v", k, c.Setting, c.Value, have)
			}
		}
	}
}

// Why the kinetic kernel gains nothing over lmc at equal accuracy (the
// rule in tune.go and docs/methods.md): on a Gaussian direction of
// curvature λ, the frozen-gradient kinetic step with step h, friction γ
// and inverse mass u has, up to terms of order γh, the stationary
// position variance 1/(λ(1 − uλh/(2γ))) and the integrated
// autocorrelation time 2γ/(uλh) − 1 of lmc with the step uh/γ (closed
// forms of lmc in TestStationaryVarianceClosedForms; the h → 0 limit,
// τ·h → 2γ/(uλ), is the diffusion's own integrated autocorrelation time,
// derived here: the mean path from (x₀, v₀) solves d²m/dt² + γ·dm/dt + uλ·m = 0,
// whose integral over [0, ∞) is (v₀ + γx₀)/(uλ), so ∫ρ = γ/(uλ)). So the
// step that keeps the stiffest direction's variance error at a tolerance
// gives the slowest direction the same autocorrelation time as lmc's, for
// every γ and u: on κ = 100 no friction on a grid from a tenth of the
// slowest direction's critical damping to ten times the stiffest's brings
// the worst autocorrelation time below 0.85 of lmc's at the same
// tolerance.
func TestKineticIsLMCAtItsEffectiveStep(t *testing.T) {
	for _, c := range []struct{ h, g, u, l float64 }{
		{0.03, 0.19, 1.0 / 110, 110}, {0.01, 0.1, 1, 5}, {0.1, 0.5, 0.25, 10}, {0.368, 2, 1.0 / 110, 110}, {0.368, 2, 1.0 / 110, 1},
	} {
		eff := c.u * c.h / c.g // lmc's step with the same law
		v, ok := stationaryVariance(kineticScheme(c.h, c.g, c.u), c.l)
		want := 1 / (c.l * (1 - eff*c.l/2))
		tau, wantTau := autocorrelationTime(kineticScheme(c.h, c.g, c.u), c.l), 2/(eff*c.l)-1
		// Order-γh terms: a relative tolerance of γh/10 (a wrong rule is
		// off by O(1)).
		tol := math.Max(1e-4, c.g*c.h/10)
		if !ok || math.Abs(v/want-1) > tol || math.Abs(tau/wantTau-1) > tol {
			t.Fatalf("%+v: variance %v τ %v, lmc at step uh/γ = %v: %v and %v", c, v, tau, eff, want, wantTau)
		}
	}
	// The diffusion's limit.
	const g, u, l, h = 0.7, 0.3, 2.0, 1e-5
	if tau := autocorrelationTime(kineticScheme(h, g, u), l) * h; math.Abs(tau/(2*g/(u*l))-1) > 1e-3 {
		t.Fatalf("τ·h = %v, want 2γ/(uλ) = %v", tau, 2*g/(u*l))
	}
	// Equal accuracy, κ = 100.
	lo, hi := 1.0, probeSafety*100
	uu := 1 / hi
	lmcTau := worstTau(lmcScheme(2*varianceTolerance/((1+varianceTolerance)*hi)), lo, hi)
	gLo, gHi := 0.1*2*math.Sqrt(uu*lo), 10*2*math.Sqrt(uu*hi)
	for k := 0; k <= 12; k++ {
		gg := gLo * math.Pow(gHi/gLo, float64(k)/12)
		mk := func(h float64) scheme { return kineticScheme(h, gg, uu) }
		st := largestStep(mk, lo, hi, 1/math.Sqrt(uu*hi), varianceTolerance)
		if tau := worstTau(mk(st), lo, hi); tau < 0.85*lmcTau {
			t.Fatalf("γ = %v: worst τ %v at step %v, below 0.85 × lmc's %v", gg, tau, st, lmcTau)
		}
	}
}

// The prediction of docs/methods.md for a splitting integrator: BAOAB's
// stationary position variance on a Gaussian is exactly 1/λ at every
// stable step (Leimkuhler and Matthews 2013, from memory; the solver
// confirms it here), so on κ = 100 at γ = 2√(u·m̂) and ω_max·h = 1 its
// worst autocorrelation time is about 42 steps against lmc's 1 209.
func TestSplittingIntegratorPrediction(t *testing.T) {
	lo, hi := 1.0, probeSafety*100
	u := 1 / hi
	sc := baoabScheme(1, 2*math.Sqrt(u*lo), u)
	if e := worstError(sc, lo, hi); e > 1e-9 {
		t.Fatalf("BAOAB variance error %v, want 0", e)
	}
	tau := worstTau(sc, lo, hi)
	lmcTau := worstTau(lmcScheme(2*varianceTolerance/((1+varianceTolerance)*hi)), lo, hi)
	t.Logf("worst τ: BAOAB %.1f, lmc %.1f (%.1f×)", tau, lmcTau, lmcTau/tau)
	if tau > lmcTau/20 {
		t.Fatalf("BAOAB worst τ %v, lmc %v", tau, lmcTau)
	}
}

// The splitting rule on κ = 100: u = 1/(1.1·M̂), the step at ω_max·h = 1
// (h = 1/√(u·1.1M̂) = 1), a friction on the grid between the critical
// dampings of the slowest and stiffest directions, and a worst-case
// autocorrelation time at least 20 times below lmc's at its automatic
// step (TestSplittingIntegratorPrediction's figure). A friction the client
// gives wins and keeps the same step.
func TestSplittingRule(t *testing.T) {
	lo, hi := 1.0, probeSafety*100
	set, why := choose(ruleSplitting, lo, 100, 0, 0, varianceTolerance, settings{})
	if set.inverseMass != 1/hi || math.Abs(set.step-1) > 1e-12 || len(why) != 3 {
		t.Fatalf("u %v h %v (%d choices), want 1/%v and 1", set.inverseMass, set.step, len(why), hi)
	}
	crit := 2 * math.Sqrt(set.inverseMass*lo)
	if set.friction < crit*(1-1e-12) || set.friction > 2*(1+1e-12) {
		t.Fatalf("friction %v outside [%v, 2]", set.friction, crit)
	}
	tau := worstTau(baoabScheme(set.step, set.friction, set.inverseMass), lo, hi)
	lmcTau := worstTau(lmcScheme(2*varianceTolerance/((1+varianceTolerance)*hi)), lo, hi)
	if tau > lmcTau/20 {
		t.Fatalf("worst τ %v at the chosen friction %v, lmc's %v", tau, set.friction, lmcTau)
	}
	given, why := choose(ruleSplitting, lo, 100, 0, 0, varianceTolerance, settings{friction: 0.7})
	if given.friction != 0.7 || why[1].Reason != "given by the client" || given.step != set.step {
		t.Fatalf("given friction: %+v (%q)", given, why[1].Reason)
	}
}

// baoab through the engine with every tuning field at zero, on the
// correlated Gaussian of condition number 2·10⁴: the draws' means and
// variances match the target's within 4 MCSE (the variance's MCSE from
// the ESS of the squared deviations), so the automatic step at half the
// stability limit buys no visible bias on a Gaussian.
func TestBAOABAutomaticSamplesTheTarget(t *testing.T) {
	g, cov := correlated3(t)
	spec := Spec{Dim: 3, Chains: 8, Kernel: "baoab", Start: []float64{0.5, -5, 0.05}, StartRows: 1, Seed: 35,
		BurnIn: 1000, DrawsPerChain: 2000}
	r := runTarget(t, spec, g, false, nil)
	if r.err != nil {
		t.Fatal(r.err)
	}
	for i := range 3 {
		m, se := chainsMean(r.draws[i]), diag.MeanMCSE(r.draws[i])
		if math.Abs(m) > 4*se {
			t.Errorf("mean[%d] = %.4g ± %.2g, want 0", i, m, se)
		}
		sq := make([][]float64, len(r.draws[i]))
		for c, ch := range r.draws[i] {
			sq[c] = make([]float64, len(ch))
			for k, v := range ch {
				sq[c][k] = v * v
			}
		}
		v, vse := chainsMean(sq), diag.MeanMCSE(sq)
		if want := cov.At(i, i); math.Abs(v-want) > 4*vse {
			t.Errorf("variance[%d] = %.4g ± %.2g, want %.4g", i, v, vse, want)
		}
	}
}
