package session

import (
	"fmt"
	"math"

	"sluice/kernels"
)

// Automatic settings: when the client leaves the step at 0, the engine
// chooses the step (and the kinetic kernels' friction and inverse mass)
// from the curvature it sees in the current metric's units: m̂ and M̂,
// the smallest and largest eigenvalues of Lᵀ∇²(−log π)L (C = L·Lᵀ the
// metric) at one chain's position, from a Lanczos probe (lanczosProbe
// below) or from the client's declared m and M.
//
// Every rule is the same criterion, derived here on a Gaussian direction
// of curvature λ, where each kernel's step is a linear map of the state
// (position, and velocity for the kinetic kernels) plus Gaussian noise,
// so that its stationary covariance solves a small linear equation
// (stationaryVariance): the step is the largest at which the chain's
// stationary variance of the position is within varianceTolerance of the
// target's 1/λ for every λ in [m̂, 1.1·M̂] (the factor 1.1 because a Ritz
// value or a Rayleigh quotient underestimates the largest eigenvalue).
// The discretisation error of these kernels is largest in the variances
// of the stiffest directions, so the criterion bounds the bias that the
// ESS does not see, at the same level for every kernel, and the kernels
// are compared at equal accuracy.
//
//   - lmc, sgld, sgld-cv, svrg: x' = (1 − hλ)x + √(2h)ξ has stationary
//     variance 1/(λ(1 − hλ/2)), so h = 2τ/((1 + τ)·1.1·M̂) with τ the
//     tolerance; it is unstable at hλ ≥ 2.
//   - kinetic: inverse mass u = 1/(1.1·M̂) (Cheng, Chatterji, Bartlett and
//     Jordan (2018) take u = 1/M), and the friction on a grid from
//     γ = 2√(u·m̂), which critically damps the slowest direction (on a
//     direction of curvature λ the position and velocity form a damped
//     oscillator with ω² = uλ, critically damped at γ = 2ω; the rate of
//     the kinetic diffusion is of order √(m·u) at that friction, Dalalyan
//     and Riou-Durand (2020), from memory), to the stiffest direction's
//     critical damping, each with the largest h meeting the criterion for
//     the frozen-gradient step, keeping the one with the smallest
//     worst-case autocorrelation time. For this integrator the choice
//     hardly matters: on a Gaussian direction the frozen-gradient step
//     with (h, γ, u) has, up to terms of order γh, the stationary variance
//     and autocorrelation time of lmc with step uh/γ
//     (TestKineticIsLMCAtItsEffectiveStep; docs/methods.md), so the step
//     that holds the stiffest direction's variance error at the tolerance
//     leaves the slowest direction as slow as lmc leaves it, whatever γ
//     and u. Its step is bound by that accuracy, far inside its stability
//     range (which is h < 2γ/(uM) for small γh, not ω·h < 2), and a step
//     near the stability limit would buy speed with a variance error of
//     order one on the stiff directions.
//   - baoab: the same u and friction grid, but the splitting's stationary
//     position variance on a Gaussian is exact at every stable step
//     (Leimkuhler and Matthews 2013), so the criterion never binds and the
//     step is capped at ω_max·h = 1, half its stability limit ω·h < 2;
//     the friction that critically damps the slowest direction then makes
//     the slowest direction about √κ times faster than lmc
//     (TestSplittingIntegratorPrediction).
//   - midpoint: its friction is 2, so the inverse mass critically damps
//     the slowest direction, u = 1/m̂, and h meets the criterion in mean
//     square over the random midpoint (the expectation over α by
//     Gauss–Legendre quadrature).
//   - midpoint-overdamped: the largest h meeting the criterion in mean
//     square over α.
//   - mala: the acceptance-rate adaptation keeps its own step; the engine
//     starts it at h = 1/M̂ (the drift's stable range is hM̂ < 2) and, after
//     each metric update, carries over the product h·M̂ the adaptation had
//     reached, since acceptance depends on the step through the curvature
//     it meets.
//
// A value the client gave always wins; StepStability says whether it is
// unstable for the curvature seen.

// varianceTolerance is the largest relative error of a stationary
// variance the automatic step allows on a Gaussian direction.
const varianceTolerance = 0.1

// travelTolerance is the looser tolerance of the steps taken while
// metric adaptation windows remain: those draws are never kept, and the
// chains must travel far enough for each window to see the target's
// spread; the last choice, after the last update, is made at
// varianceTolerance.
const travelTolerance = 0.5

// probeSafety multiplies the probe's M̂: Ritz values and Rayleigh
// quotients are at most the largest eigenvalue.
const probeSafety = 1.1

// maxCondition caps the condition number the friction rule assumes when
// the probe sees no positive smallest curvature (a non-convex or flat
// direction at the probed point).
const maxCondition = 1e4

// tuneRule says how a kernel's settings are chosen automatically.
type tuneRule int

const (
	ruleNone tuneRule = iota
	ruleOverdamped
	ruleKinetic
	ruleSplitting
	ruleMidpoint
	ruleOverdampedMidpoint
	ruleMALA
)

// Choice is one setting the engine chose (or took from the client), with
// its value and the reason in words.
type Choice struct {
	Setting string
	Value   float64
	Reason  string
}

// settings are the values a rule chooses.
type settings struct {
	step, friction, inverseMass float64
}

// scheme is one step on a Gaussian direction of curvature λ, in mean
// square: the stationary covariance σ = (σxx, σxv, σvv) of position and
// velocity solves σ = T·σ + q, and the mean of the step's linear map is
// a (T, q and a averaged over the step's own randomness; the velocity
// entries are zero for the overdamped kernels).
type scheme func(lambda float64) (t [3][3]float64, q [3]float64, a [2][2]float64)

// lyapunovMap returns the map Σ ↦ AΣAᵀ of a 2×2 A on (σxx, σxv, σvv).
func lyapunovMap(a11, a12, a21, a22 float64) [3][3]float64 {
	return [3][3]float64{
		{a11 * a11, 2 * a11 * a12, a12 * a12},
		{a11 * a21, a11*a22 + a12*a21, a12 * a22},
		{a21 * a21, 2 * a21 * a22, a22 * a22},
	}
}

// apply3 returns T·σ.
func apply3(t [3][3]float64, s [3]float64) [3]float64 {
	var out [3]float64
	for i := range 3 {
		for j := range 3 {
			out[i] += t[i][j] * s[j]
		}
	}
	return out
}

// stationary returns the stationary covariance of sc on a direction of
// curvature λ, and false when the step is not mean-square stable there.
//
// Stability test (derived here): T is a positive map (it takes positive
// semidefinite covariances to positive semidefinite ones), and for a
// positive map the spectral radius is below 1 exactly when some positive
// definite X has X − T(X) positive definite (the Stein–Lyapunov criterion
// for positive maps). With q positive definite, the solution of
// σ = Tσ + q is then σ = Σₖ Tᵏq ≻ 0, and a positive definite solution is
// such an X; so the step is stable exactly when the solution exists and
// is positive definite (for the overdamped kernels, when σxx > 0).
func stationary(sc scheme, lambda float64) (sigma [3]float64, ok bool) {
	t, q, _ := sc(lambda)
	oneDim := q[1] == 0 && q[2] == 0 && t[0][1] == 0 && t[0][2] == 0
	var a [3][4]float64
	for i := range 3 {
		for j := range 3 {
			a[i][j] = -t[i][j]
		}
		a[i][i]++
		a[i][3] = q[i]
	}
	for c := range 3 {
		p := c
		for r := c + 1; r < 3; r++ {
			if math.Abs(a[r][c]) > math.Abs(a[p][c]) {
				p = r
			}
		}
		a[c], a[p] = a[p], a[c]
		if a[c][c] == 0 {
			return sigma, false
		}
		for r := range 3 {
			if r != c {
				f := a[r][c] / a[c][c]
				for k := c; k < 4; k++ {
					a[r][k] -= f * a[c][k]
				}
			}
		}
	}
	for i := range 3 {
		sigma[i] = a[i][3] / a[i][i]
	}
	for _, v := range sigma {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return sigma, false
		}
	}
	if oneDim {
		return sigma, sigma[0] > 0
	}
	return sigma, sigma[0] > 0 && sigma[2] > 0 && sigma[0]*sigma[2] > sigma[1]*sigma[1]
}

// stationaryVariance is the stationary variance of the position.
func stationaryVariance(sc scheme, lambda float64) (float64, bool) {
	s, ok := stationary(sc, lambda)
	if !ok {
		return math.Inf(1), false
	}
	return s[0], true
}

// autocorrelationTime returns the integrated autocorrelation time of the
// position at stationarity under sc on a direction of curvature λ (derived
// here: the lag-k autocovariance is [āᵏΣ]xx with ā the mean map, since
// the steps' randomness is independent, and Σₖ≥₁ āᵏ = (I − ā)⁻¹ā, so
// τ = 1 + 2[(I − ā)⁻¹āΣ]xx/Σxx); +Inf when unstable. ESS per step is 1/τ.
func autocorrelationTime(sc scheme, lambda float64) float64 {
	s, ok := stationary(sc, lambda)
	if !ok {
		return math.Inf(1)
	}
	_, _, a := sc(lambda)
	// B = āΣ.
	sig := [2][2]float64{{s[0], s[1]}, {s[1], s[2]}}
	var b [2][2]float64
	for i := range 2 {
		for j := range 2 {
			b[i][j] = a[i][0]*sig[0][j] + a[i][1]*sig[1][j]
		}
	}
	// (I − ā)⁻¹ first row, applied to B's first column.
	m11, m12, m21, m22 := 1-a[0][0], -a[0][1], -a[1][0], 1-a[1][1]
	det := m11*m22 - m12*m21
	if det == 0 {
		return math.Inf(1)
	}
	sum := (m22*b[0][0] - m12*b[1][0]) / det
	return 1 + 2*sum/s[0]
}

// lmcScheme is x' = (1 − hλ)x + √(2h)ξ (also sgld, sgld-cv and svrg with
// exact gradients).
func lmcScheme(h float64) scheme {
	return func(l float64) ([3][3]float64, [3]float64, [2][2]float64) {
		a := 1 - h*l
		return [3][3]float64{{a * a}}, [3]float64{2 * h}, [2][2]float64{{a}}
	}
}

// overdampedMidpointScheme is x' = (1 − hλ + αh²λ²)x − hλ√2·B_{αh} + √2·B_h,
// α ~ U[0, 1), in mean square (derived here from the kernel's two
// updates with G = −λx): E[a²] and the noise variance
// 2(h − 2λh·αh + λ²h²·αh) averaged over α in closed form.
func overdampedMidpointScheme(h float64) scheme {
	return func(l float64) ([3][3]float64, [3]float64, [2][2]float64) {
		c, d := 1-h*l, h*h*l*l
		// E[(c + αd)²] = c² + c·d + d²/3; E[α] = 1/2.
		ea2 := c*c + c*d + d*d/3
		noise := 2 * (h - l*h*h + l*l*h*h*h/2)
		return [3][3]float64{{ea2}}, [3]float64{noise}, [2][2]float64{{c + d/2}}
	}
}

// kineticScheme is the frozen-gradient kinetic step (kernels.Kinetic) on
// a direction of curvature λ: A = [[1 − ax·λ, c], [−av·λ, e]] plus its
// noise covariance.
func kineticScheme(h, gamma, u float64) scheme {
	c := kineticCoefficients(gamma, u, h)
	return func(l float64) ([3][3]float64, [3]float64, [2][2]float64) {
		a := [2][2]float64{{1 - c.ax*l, c.c}, {-c.av * l, c.e}}
		return lyapunovMap(a[0][0], a[0][1], a[1][0], a[1][1]), [3]float64{c.varX, c.cov, c.varV}, a
	}
}

// baoabScheme is one step of the BAOAB splitting (kernels.BAOAB: half
// kick, half drift, exact friction and noise, half drift, half kick;
// Leimkuhler and Matthews 2013) on a direction of curvature λ, in the
// full-step state (x, v).
func baoabScheme(h, g, u float64) scheme {
	mul := func(a, b [2][2]float64) (c [2][2]float64) {
		for i := range 2 {
			for j := range 2 {
				c[i][j] = a[i][0]*b[0][j] + a[i][1]*b[1][j]
			}
		}
		return c
	}
	e := math.Exp(-g * h)
	s := u * -math.Expm1(-2*g*h) // u(1 − e^{−2γh})
	drift := [2][2]float64{{1, h / 2}, {0, 1}}
	fric := [2][2]float64{{1, 0}, {0, e}}
	return func(l float64) ([3][3]float64, [3]float64, [2][2]float64) {
		kick := [2][2]float64{{1, 0}, {-(h / 2) * u * l, 1}}
		after := mul(kick, drift) // what follows the noise
		m := mul(after, mul(fric, mul(drift, kick)))
		q := [3]float64{after[0][1] * after[0][1] * s, after[0][1] * after[1][1] * s, after[1][1] * after[1][1] * s}
		return lyapunovMap(m[0][0], m[0][1], m[1][0], m[1][1]), q, m
	}
}

// midpointNodes are the 16-point Gauss–Legendre nodes and weights on
// [0, 1] (Abramowitz and Stegun, table 25.4, mapped from [−1, 1]).
var midpointNodes = func() (n [16][2]float64) {
	x := []float64{0.0950125098376374, 0.2816035507792589, 0.4580167776572274, 0.6178762444026438,
		0.7554044083550030, 0.8656312023878318, 0.9445750230732326, 0.9894009349916499}
	w := []float64{0.1894506104550685, 0.1826034150449236, 0.1691565193950025, 0.1495959888165767,
		0.1246289712555339, 0.0951585116824928, 0.0622535239386479, 0.0271524594117541}
	for i := range 8 {
		n[2*i] = [2]float64{(1 - x[i]) / 2, w[i] / 2}
		n[2*i+1] = [2]float64{(1 + x[i]) / 2, w[i] / 2}
	}
	return n
}()

// midpointScheme is the randomised midpoint step (kernels.Midpoint,
// friction 2) on a direction of curvature λ, in mean square over α
// (derived here from the kernel's updates with G = −λx):
//
//	x' = (1 − cx·λ(1 − s0.ax·λ))x + (b − cx·λ·s0.c)v + N1
//	v' = (−cv·λ(1 − s0.ax·λ))x + (e − cv·λ·s0.c)v + N2
//	(N1, N2) = B·(X0, V0) + (X1, V1),  B = [[1 − cx·λ, s1.c], [−cv·λ, s1.e]]
//
// with s0, s1 the frozen-force coefficients over [0, αh] and [αh, h].
func midpointScheme(h, u float64) scheme {
	type node struct {
		w      float64
		s0, s1 kineticCoef
		cx, cv float64
	}
	var nodes [16]node
	for i, nw := range midpointNodes {
		a := nw[0] * h
		s0, s1 := kineticCoefficients(2, u, a), kineticCoefficients(2, u, h-a)
		nodes[i] = node{nw[1], s0, s1, u * h * s1.c, u * h * s1.e}
	}
	e, b := math.Exp(-2*h), -math.Expm1(-2*h)/2
	return func(l float64) ([3][3]float64, [3]float64, [2][2]float64) {
		var t [3][3]float64
		var q [3]float64
		var am [2][2]float64
		for _, n := range nodes {
			k := 1 - n.s0.ax*l
			a := [2][2]float64{{1 - n.cx*l*k, b - n.cx*l*n.s0.c}, {-n.cv * l * k, e - n.cv*l*n.s0.c}}
			ta := lyapunovMap(a[0][0], a[0][1], a[1][0], a[1][1])
			tb := lyapunovMap(1-n.cx*l, n.s1.c, -n.cv*l, n.s1.e)
			nb := apply3(tb, [3]float64{n.s0.varX, n.s0.cov, n.s0.varV})
			s1 := [3]float64{n.s1.varX, n.s1.cov, n.s1.varV}
			for i := range 3 {
				for j := range 3 {
					t[i][j] += n.w * ta[i][j]
				}
				q[i] += n.w * (nb[i] + s1[i])
			}
			for i := range 2 {
				for j := range 2 {
					am[i][j] += n.w * a[i][j]
				}
			}
		}
		return t, q, am
	}
}

// coefficients of one frozen-gradient kinetic step (the kernels' own
// formulas: Cheng et al. 2018, integrated exactly with G frozen).
type kineticCoef struct{ e, c, ax, av, varX, cov, varV float64 }

// kineticCoefficients are kernels.Kinetic's coefficients for friction
// gamma, inverse mass u and duration h, from the kernel's own code.
func kineticCoefficients(gamma, u, h float64) kineticCoef {
	k := kernels.KineticStepCoefficients(gamma, u, h)
	return kineticCoef{e: k.E, c: k.C, ax: k.AX, av: k.AV, varX: k.VarX, cov: k.Cov, varV: k.VarV}
}

// worstError is the largest relative error of the stationary position
// variance over curvatures log-spaced in [lo, hi] (24 points and the
// ends); +Inf when the step is unstable at one of them.
func worstError(sc scheme, lo, hi float64) float64 {
	const n = 24
	var worst float64
	for i := 0; i <= n; i++ {
		l := hi
		if i < n && hi > lo {
			l = lo * math.Pow(hi/lo, float64(i)/n)
		}
		v, ok := stationaryVariance(sc, l)
		if !ok {
			return math.Inf(1)
		}
		worst = math.Max(worst, math.Abs(v*l-1))
	}
	return worst
}

// largestStep returns the largest h in (0, ceiling] with
// worstError(make(h)) ≤ varianceTolerance: a geometric scan up from
// ceiling/4096 by factors of 2, then 30 bisections. The scan stops at the
// first failure, so a step beyond an unstable range is never chosen.
func largestStep(make func(h float64) scheme, lo, hi, ceiling, tol float64) float64 {
	ok := func(h float64) bool { return worstError(make(h), lo, hi) <= tol }
	h := ceiling / 4096
	if !ok(h) {
		return h / 4 // a target too stiff for any step on the grid: a small one
	}
	for h < ceiling && ok(math.Min(2*h, ceiling)) {
		h = math.Min(2*h, ceiling)
	}
	if h >= ceiling {
		return ceiling
	}
	a, b := h, 2*h
	for range 30 {
		m := (a + b) / 2
		if ok(m) {
			a = m
		} else {
			b = m
		}
	}
	return a
}

// worstTau is the largest integrated autocorrelation time of the position
// over curvatures log-spaced in [lo, hi] (as worstError).
func worstTau(sc scheme, lo, hi float64) float64 {
	const n = 24
	var worst float64
	for i := 0; i <= n; i++ {
		l := hi
		if i < n && hi > lo {
			l = lo * math.Pow(hi/lo, float64(i)/n)
		}
		worst = math.Max(worst, autocorrelationTime(sc, l))
	}
	return worst
}

// bestFree searches a kernel's one free parameter on 17 values
// log-spaced over [from, to]: for each value the largest step meeting the
// variance tolerance, scored by the worst-case autocorrelation time over
// [lo, hi]; it returns the best value and its step.
func bestFree(from, to float64, family func(v float64) func(h float64) scheme, lo, hi float64, ceiling func(v float64) float64, tol float64) (best, step float64) {
	bestTau := math.Inf(1)
	best, step = from, 0
	for k := range 17 {
		v := from * math.Pow(to/from, float64(k)/16)
		mk := family(v)
		h := largestStep(mk, lo, hi, ceiling(v), tol)
		if tau := worstTau(mk(h), lo, hi); tau < bestTau {
			best, step, bestTau = v, h, tau
		}
	}
	if step == 0 {
		step = largestStep(family(from), lo, hi, ceiling(from), tol)
	}
	return best, step
}

// choose returns the automatic settings of rule for the curvatures seen in
// the metric's units, with their reasons. prev is the kernel's current
// step and prevM the M̂ it was chosen for (0 when none), for MALA's
// carry-over.
//
// tol is the variance tolerance: varianceTolerance for the kept draws,
// travelTolerance while adaptation windows remain.
//
// given holds the friction and inverse mass the client set (0: free); the
// step is then chosen for them.
func choose(rule tuneRule, m, bigM float64, prev, prevM float64, tol float64, given settings) (settings, []Choice) {
	hi := probeSafety * bigM
	lo := m
	floor := false
	if !(lo > 0) || lo > hi {
		lo, floor = hi/maxCondition, true
	}
	var s settings
	var out []Choice
	mText := fmt.Sprintf("m̂ = %.4g", m)
	if floor {
		mText = fmt.Sprintf("no positive smallest curvature seen (m̂ = %.4g), condition number %g assumed", m, maxCondition)
	}
	tolText := fmt.Sprintf("stationary variance within %g%% of the target's for every curvature in [%.4g, %.4g] (1.1 × M̂ = %.4g)",
		100*tol, lo, hi, hi)
	switch rule {
	case ruleOverdamped:
		s.step = 2 * tol / ((1 + tol) * hi)
		out = append(out, Choice{"step", s.step, "largest step with the " + tolText + "; unstable at h·M ≥ 2"})
	case ruleOverdampedMidpoint:
		s.step = largestStep(overdampedMidpointScheme, lo, hi, 4/hi, tol)
		out = append(out, Choice{"step", s.step, "largest step with the mean-square " + tolText})
	case ruleKinetic:
		// u fixes the time unit (the kinetic diffusion with (γ, u, h) is
		// the one with (γs, us², h/s) run s times slower, derived here by
		// rescaling time), so only γ and h are free: γ is the value on a
		// grid from critical damping of the slowest direction to that of
		// the stiffest (γ = 2√(u·1.1M̂) = 2) that gives the smallest
		// worst-case autocorrelation time at its largest step meeting the
		// tolerance. Beyond the stiffest's every direction is overdamped and
		// the kernel only imitates lmc. The step is capped at ω_max·h = 1,
		// half the stable range of the undamped frozen-gradient step
		// (derived here: as γ → 0 its trace is 2 − (ωh)², stable only
		// below ωh = 2), so that an M̂ the probe underestimates leaves a
		// margin.
		var why [2]string
		s, why = dampedSettings(kineticScheme, lo, hi, mText, "at its largest step meeting the tolerance", tol, given)
		out = append(out,
			Choice{"inverse_mass", s.inverseMass, why[0]},
			Choice{"friction", s.friction, why[1]},
			Choice{"step", s.step, "largest step with the " + tolText +
				"; on a Gaussian this integrator is lmc at step u·h/γ, so it gains little over lmc: the baoab kernel samples the same dynamics with a step bound only by stability"})
	case ruleSplitting:
		// As for kinetic, u = 1/(1.1·M̂) fixes the time unit (the stiffest
		// direction oscillates at ω = 1) and γ is searched on the same
		// grid. BAOAB's stationary position variance on a Gaussian is
		// exact at every stable step, so the tolerance never binds and the
		// step is the cap ω_max·h = 1: half the stability limit ω·h < 2, so
		// an M̂ underestimated up to fourfold still leaves the chains
		// stable (the verdict's stability check watches the curvature seen
		// as the run goes on). On a non-Gaussian target the error is of
		// order h², which the bias and mixing checks watch.
		var why [2]string
		s, why = dampedSettings(baoabScheme, lo, hi, mText, "at the step below", tol, given)
		ceil := 1 / math.Sqrt(s.inverseMass*hi)
		stepWhy := "ω_max·h = 1 with ω_max = √(u·1.1M̂), half the splitting's stability limit ω·h < 2 (its stationary position variance on a Gaussian is exact at every stable step)"
		if s.step < ceil {
			stepWhy = "largest step with the " + tolText
		}
		out = append(out,
			Choice{"inverse_mass", s.inverseMass, why[0]},
			Choice{"friction", s.friction, why[1]},
			Choice{"step", s.step, stepWhy})
	case ruleMidpoint:
		// The friction is 2, so the inverse mass sets both the time unit
		// and the damping: u is the value on a grid from critical damping
		// of the stiffest direction (u = 1/(1.1·M̂)) to that of the slowest
		// (u = 1/m̂) with the smallest worst-case autocorrelation time at
		// its largest step (capped at ω_max·h = 1).
		s.friction = 2
		crit := 1 / lo
		family := func(u float64) func(h float64) scheme {
			return func(h float64) scheme { return midpointScheme(h, u) }
		}
		ceil := func(u float64) float64 { return 1 / math.Sqrt(u*hi) }
		uWhy := fmt.Sprintf("on a grid from 1/(1.1·M̂) to 1/m̂ = %.4g (with the kernel's friction 2, critical damping of the stiffest and of the slowest direction; %s), the value with the smallest worst-case autocorrelation time at its largest step meeting the tolerance", crit, mText)
		if given.inverseMass > 0 {
			s.inverseMass, uWhy = given.inverseMass, "given by the client"
			s.step = largestStep(family(s.inverseMass), lo, hi, ceil(s.inverseMass), tol)
		} else {
			s.inverseMass, s.step = bestFree(1/hi, crit, family, lo, hi, ceil, tol)
		}
		out = append(out,
			Choice{"inverse_mass", s.inverseMass, uWhy},
			Choice{"step", s.step, "largest step with the mean-square " + tolText})
	case ruleMALA:
		s.step = 1 / hi
		reason := "1/(1.1·M̂), inside the drift's stable range h·M < 2; the acceptance-rate adaptation goes on from it"
		if prev > 0 && prevM > 0 {
			s.step = prev * prevM / hi
			reason = fmt.Sprintf("the adapted step %.4g carried to the new metric at the same h·M̂ (%.4g); the acceptance-rate adaptation goes on from it", prev, prev*prevM)
		}
		out = append(out, Choice{"step", s.step, reason})
	}
	return s, out
}

// dampedSettings chooses the inverse mass, friction and step of a kinetic
// integrator whose step on a Gaussian direction is step(h, γ, u): u =
// 1/(1.1·M̂) unless given (the stiffest direction then oscillates at
// ω = 1), and γ on a grid from critical damping of the slowest direction,
// 2√(u·m̂), to that of the stiffest, 2√(u·1.1M̂), the value with the
// smallest worst-case autocorrelation time at its largest step meeting
// the tolerance, capped at ω_max·h = 1 (unless given). stepText says in
// the friction's reason which step it was scored at. It returns the
// settings and the reasons for u and γ.
func dampedSettings(step func(h, g, u float64) scheme, lo, hi float64, mText, stepText string, tol float64, given settings) (settings, [2]string) {
	var s settings
	var why [2]string
	s.inverseMass, why[0] = 1/hi, "1/(1.1·M̂): the stiffest direction oscillates at ω = 1"
	if given.inverseMass > 0 {
		s.inverseMass, why[0] = given.inverseMass, "given by the client"
	}
	u := s.inverseMass
	crit := 2 * math.Sqrt(u*lo)
	ceil := func(float64) float64 { return 1 / math.Sqrt(u*hi) }
	family := func(g float64) func(h float64) scheme {
		return func(h float64) scheme { return step(h, g, u) }
	}
	why[1] = fmt.Sprintf("the friction, on a grid from critical damping of the slowest direction 2√(u·m̂) = %.4g (%s) to that of the stiffest, 2√(u·1.1M̂), with the smallest worst-case autocorrelation time %s", crit, mText, stepText)
	if given.friction > 0 {
		s.friction, why[1] = given.friction, "given by the client"
		s.step = largestStep(family(s.friction), lo, hi, ceil(0), tol)
	} else {
		s.friction, s.step = bestFree(crit, 2*math.Sqrt(u*hi), family, lo, hi, ceil, tol)
	}
	return s, why
}

// Verdict says whether a step is unstable for the curvature seen.
type Verdict struct {
	Unstable bool
	// Reason gives the rule and its source in words.
	Reason string
}

// StepStability says whether kernel's step h (with friction and inverse
// mass u for the kinetic kernels; 0 for their defaults, γ = 2 and u = 1)
// is unstable on a target whose largest curvature in the metric's units
// is bigM. It uses the verdict's rule (stability.go): the mean-square
// growth of the step's recursion on a Gaussian direction of curvature
// bigM (for LMC 1 − hM, stable only below hM = 2; derived here). Kernels
// without a step, and MALA and the Ozaki kernels, are never unstable.
func StepStability(kernel string, h, friction, u, bigM float64) Verdict {
	if !(bigM > 0) || !(h > 0) {
		return Verdict{}
	}
	if friction == 0 {
		friction = 2
	}
	if u == 0 {
		u = 1
	}
	e, ok := lookupKernel(kernel)
	if kernel == "" {
		e, ok = lookupKernel(KernelNames()[0]) // the default kernel
	}
	if !ok {
		return Verdict{}
	}
	// The verdict's own rule (stability.go): one account of stability.
	r, ok := stabilityRuleFor(e.tuning, friction, u)
	if !ok {
		return Verdict{}
	}
	if rho := r.growth(h, bigM); rho >= 1 {
		return Verdict{true, fmt.Sprintf("at h·M = %.4g the step's mean-square growth is %.3g ≥ 1 (%s)", h*bigM, rho, r.source)}
	}
	return Verdict{false, fmt.Sprintf("stable at h·M = %.4g (%s)", h*bigM, r.source)}
}

// lanczosProbe is the curvature probe the automatic settings use: k
// steps of the Lanczos process (Lanczos 1950; with full
// reorthogonalisation, Golub and Van Loan, Matrix Computations, section
// 10.1) on A = Lᵀ∇²(−log π)(x₀)L, the Hessian in the metric's units at
// one chain's position x₀, whose extreme Ritz values estimate M̂ and m̂
// at once and converge much faster than power iteration at the small
// end. Each product A·q is a finite difference of gradients (one
// evaluation at x₀ + ε·L·q, with Lᵀ applied to the gradient), so the
// probe costs k + 1 gradients, asked one at a time of chain 0's row. It
// is a Phase; done receives the estimates when it completes (or stops
// early on a non-finite or vanishing direction, with what it has).
type lanczosProbe struct {
	dim, k   int
	x0       []float64
	metric   *kernels.Metric // nil: the identity
	eps      float64
	q        [][]float64 // the Lanczos vectors so far
	alpha    []float64
	beta     []float64
	s0, w, y []float64 // Lᵀ∇log π(x₀); scratch
	based    bool      // s0 is known
	req      kernels.Request
	evals    int
	done     func(m, bigM float64, evals int)
	finished bool
}

// newLanczosProbe probes at x0 in the units of metric (nil: the
// identity) with at most k Lanczos steps, starting from direction v0
// (normalised; it must be nonzero).
func newLanczosProbe(x0 []float64, metric *kernels.Metric, k int, v0 []float64, done func(m, bigM float64, evals int)) *lanczosProbe {
	p := len(x0)
	pr := &lanczosProbe{dim: p, k: max(1, min(k, p)), x0: append([]float64(nil), x0...), metric: metric, done: done,
		s0: make([]float64, p), w: make([]float64, p), y: make([]float64, p)}
	if metric != nil && metric.Kind() == kernels.IdentityMetric {
		pr.metric = nil
	}
	var n2 float64
	for _, v := range x0 {
		n2 += v * v
	}
	// A relative difference step (common practice for finite differences
	// in double precision): 1e-4 times the position's scale in the
	// metric's units, at least 1e-4.
	scale := math.Sqrt(n2 / float64(p))
	if pr.metric != nil {
		pr.metric.SolveFactor(pr.y, pr.x0)
		var s float64
		for _, v := range pr.y {
			s += v * v
		}
		scale = math.Sqrt(s / float64(p))
	}
	pr.eps = 1e-4 * math.Max(1, scale)
	q := append([]float64(nil), v0...)
	if normalise(q) == 0 {
		panic("session: Lanczos probe with a zero start direction")
	}
	pr.q = append(pr.q, q)
	pr.req = kernels.Request{Need: kernels.NeedGradient, Rows: 1, Chain: []int{0}, Points: make([]float64, p)}
	copy(pr.req.Points, pr.x0)
	return pr
}

// normalise scales v to unit length and returns its former length (0
// leaves v alone).
func normalise(v []float64) float64 {
	var s float64
	for _, x := range v {
		s += x * x
	}
	n := math.Sqrt(s)
	if n > 0 && !math.IsInf(n, 0) {
		for i := range v {
			v[i] /= n
		}
	}
	return n
}

// Next implements Phase: ∇log π at x₀, then at x₀ + ε·L·q_j.
func (pr *lanczosProbe) Next() *kernels.Request { return &pr.req }

// scoreInMetric sets dst = Lᵀ·g.
func (pr *lanczosProbe) scoreInMetric(dst, g []float64) {
	if pr.metric == nil {
		copy(dst, g)
		return
	}
	pr.metric.ApplyFactorT(dst, g)
}

// Tell implements Phase.
func (pr *lanczosProbe) Tell(a *kernels.Answer) bool {
	if pr.finished {
		return true
	}
	pr.evals++
	g := a.Grad[:pr.dim]
	if !pr.based {
		pr.scoreInMetric(pr.s0, g)
		pr.based = true
		pr.setPoint()
		return false
	}
	j := len(pr.alpha)
	q := pr.q[j]
	// w = A·q = −(Lᵀ∇log π(x₀ + εLq) − Lᵀ∇log π(x₀))/ε.
	pr.scoreInMetric(pr.w, g)
	w := pr.w
	var al float64
	for i := range w {
		w[i] = -(w[i] - pr.s0[i]) / pr.eps
		al += w[i] * q[i]
	}
	if math.IsNaN(al) || math.IsInf(al, 0) {
		return pr.finish()
	}
	pr.alpha = append(pr.alpha, al)
	// Full reorthogonalisation, twice (Golub and Van Loan 10.1.4).
	for range 2 {
		for _, qi := range pr.q {
			var d float64
			for i := range w {
				d += w[i] * qi[i]
			}
			for i := range w {
				w[i] -= d * qi[i]
			}
		}
	}
	if len(pr.alpha) >= pr.k {
		return pr.finish()
	}
	next := append([]float64(nil), w...)
	b := normalise(next)
	if !(b > 1e-12*math.Abs(al)) || math.IsInf(b, 0) {
		return pr.finish() // an invariant subspace: the Ritz values are exact
	}
	pr.beta = append(pr.beta, b)
	pr.q = append(pr.q, next)
	pr.setPoint()
	return false
}

func (pr *lanczosProbe) setPoint() {
	q := pr.q[len(pr.q)-1]
	if pr.metric == nil {
		copy(pr.y, q)
	} else {
		pr.metric.ApplyFactor(pr.y, q)
	}
	for i, x := range pr.x0 {
		pr.req.Points[i] = x + pr.eps*pr.y[i]
	}
}

func (pr *lanczosProbe) finish() bool {
	pr.finished = true
	m, bigM := math.NaN(), math.NaN()
	if len(pr.alpha) > 0 {
		m, bigM = tridiagonalExtremes(pr.alpha, pr.beta[:len(pr.alpha)-1])
	}
	if pr.done != nil {
		pr.done(m, bigM, pr.evals)
	}
	return true
}

// Report implements Phase: the tuner reports for its probes.
func (pr *lanczosProbe) Report(*Progress) {}

// tridiagonalExtremes returns the smallest and largest eigenvalues of the
// symmetric tridiagonal matrix with diagonal a and off-diagonal b, by
// bisection on Sturm sequence counts (Golub and Van Loan, section 8.4.1)
// within the Gershgorin interval.
func tridiagonalExtremes(a, b []float64) (lo, hi float64) {
	n := len(a)
	glo, ghi := math.Inf(1), math.Inf(-1)
	for i := range n {
		r := 0.0
		if i > 0 {
			r += math.Abs(b[i-1])
		}
		if i < n-1 {
			r += math.Abs(b[i])
		}
		glo, ghi = math.Min(glo, a[i]-r), math.Max(ghi, a[i]+r)
	}
	// below counts the eigenvalues < x.
	below := func(x float64) int {
		c, d := 0, 1.0
		for i := range n {
			bb := 0.0
			if i > 0 {
				bb = b[i-1] * b[i-1]
			}
			d = a[i] - x - bb/d
			if d == 0 {
				d = -1e-300
			}
			if d < 0 {
				c++
			}
		}
		return c
	}
	find := func(k int) float64 { // the (k+1)-th smallest eigenvalue
		l, h := glo, ghi
		for range 200 {
			m := (l + h) / 2
			if m == l || m == h {
				break
			}
			if below(m) > k {
				h = m
			} else {
				l = m
			}
		}
		return (l + h) / 2
	}
	return find(0), find(n - 1)
}
