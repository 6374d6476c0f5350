package bound

import "math"

// TVRule returns the step, horizon and iterations that make the total
// variation bound of Dalalyan (2017) at most eps, for eps ∈ (0, 1/2).
//
// Assumptions: f is m-strongly convex and M-smooth; the gradients are
// exact; every chain starts from N(θ*, M⁻¹I), θ* the minimiser of f. The
// theorem and the rule are those of Dalalyan (2017), "Theoretical
// guarantees for approximate sampling from smooth and log-concave
// densities", JRSS B 79(3), recalled from memory. With m > 0,
//
//	T = (4·log(1/ε) + p·log(M/m)) / (2m),   h = min{ε²/(M²·p·T), 1/M},   K = ⌈T/h⌉,
//
// and at horizon T each term of the bound is ε/2. The cap h ≤ 1/M (the
// theorem's condition) never binds for ε < 1/2: ε²/(M²pT) ≤ 1/M means
// ε² ≤ M·p·T, and M·p·T ≥ 2·log(1/ε) > 2·log 2 > 1/4 > ε².
//
// The chain runs K·h = T + Δ, 0 ≤ Δ < h, a little longer than T. The
// bound there is still ≤ ε [derived here]: it is (ε/2)·(e^{−mΔ/2} +
// (1 + Δ/T)^{1/2}), and e^{−x} ≤ 1 − x + x²/2, √(1+y) ≤ 1 + y/2 give a
// sum ≤ 2 + Δ·(−m/2 + m²Δ/8 + 1/(2T)) < 2, since Δ < h ≤ 1/m and
// T ≥ 2·log 2/m, so the bracket is < m·(−1/2 + 1/8 + 1/(4·log 2)) < 0.
//
// With m = 0 (convex, not strongly convex) it is a composed rule derived
// here (docs/methods.md), on top of the recalled one: λ = ε/μ₂ (so the penalty bias
// λμ₂/2 is ε/2), then the rule above on π_λ with (m, M, ε) → (λ, M+λ, ε/2);
// Schedule.Penalty is λ, the chain must run on π_λ (gradient ∇f + λ(θ−θ̄))
// from N(θ*_λ, (M+λ)⁻¹I), θ*_λ the minimiser of f + λ‖θ−θ̄‖²/2, and it
// needs SecondMoment μ₂ ≥ E_π‖θ − θ̄‖².
//
// Each iteration asks one gradient per chain: K
// evaluations per chain, not counting the search for θ*.
func TVRule(s Setting, eps float64) (Schedule, error) {
	if err := checkTV(s); err != nil {
		return Schedule{}, err
	}
	if !finite(eps) || !(eps > 0 && eps < 0.5) {
		return Schedule{}, inputErr("eps", eps, "the TV rule needs eps in (0, 1/2)")
	}
	m, M, p := s.Convexity, s.Smoothness, float64(s.Dim)
	if m > 0 {
		return tvRule(m, M, p, eps, eps)
	}
	lambda := PenaltyWeight(eps, s.SecondMoment)
	sc, err := tvRule(lambda, M+lambda, p, eps/2, eps)
	sc.Penalty = lambda
	return sc, err
}

// tvRule is Dalalyan's (2017) rule for m > 0 and target error eps;
// errors name the user's epsilon userEps.
func tvRule(m, M, p, eps, userEps float64) (Schedule, error) {
	T := (4*math.Log(1/eps) + p*math.Log(M/m)) / (2 * m)
	h := math.Min(eps*eps/(M*M*p*T), 1/M)
	k, err := iterations(T, h, userEps)
	if err != nil {
		return Schedule{}, err
	}
	return Schedule{Step: h, Horizon: T, Iterations: k}, nil
}

// PenaltyWeight returns λ = ε/μ₂, the penalty weight whose bias bound
// λμ₂/2 is ε/2 (see PenaltyBias). It panics unless eps and mu2 are
// finite and positive (callers validate data first).
func PenaltyWeight(eps, mu2 float64) float64 {
	if !finite(eps) || !finite(mu2) || !(eps > 0) || !(mu2 > 0) {
		panic("bound: PenaltyWeight needs finite positive eps and mu2")
	}
	return eps / mu2
}

// PenaltyBias returns λμ₂/2, the bound on TV(π, π_λ) for the penalised
// target π_λ ∝ π·exp(−λ‖θ−θ̄‖²/2) when μ₂ ≥ E_π‖θ − θ̄‖² (derived
// here: π_λ/π = e^{−λr²/2}/c with c ≤ 1, so TV ≤ E_π[1 − e^{−λr²/2}] ≤
// λμ₂/2). It holds for any convex f; it panics on negative or non-finite
// inputs.
func PenaltyBias(lambda, mu2 float64) float64 {
	if !finite(lambda) || !finite(mu2) || lambda < 0 || mu2 < 0 {
		panic("bound: PenaltyBias needs finite non-negative lambda and mu2")
	}
	return lambda * mu2 / 2
}

// TVBound returns the total variation bound of Dalalyan (2017) after k
// steps of size h (the theorem's right-hand side, recalled from memory),
// with T = k·h:
//
//	Start          = ½·exp{(p/4)·log(M/m) − m·T/2}
//	Discretisation = (p·M²·h·T/4)^{1/2}
//
// Assumptions as in TVRule: f m-strongly convex and M-smooth, exact
// gradients, start N(θ*, M⁻¹I), and h ≤ 1/M (an error otherwise).
//
// With lambda > 0 the chain is taken to run on the penalised target π_λ
// (see TVRule): the terms above use (m+λ, M+λ) and Bias is the penalty
// bias λμ₂/2, which needs SecondMoment μ₂. With m = 0, lambda must be > 0.
func TVBound(s Setting, lambda, h float64, k int) (Bound, error) {
	if err := checkTV(s); err != nil {
		return Bound{}, err
	}
	if err := checkNonNeg("lambda", lambda, "the penalty weight"); err != nil {
		return Bound{}, err
	}
	if s.Convexity == 0 && lambda == 0 {
		return Bound{}, inputErr("m", 0, "a convex target (m = 0) needs a penalty lambda > 0")
	}
	if lambda > 0 && s.SecondMoment == 0 {
		return Bound{}, inputErr("mu2", 0, "a penalty needs a positive bound on E‖θ − θ̄‖²")
	}
	if err := checkSteps(h, k); err != nil {
		return Bound{}, err
	}
	m, M, p := s.Convexity+lambda, s.Smoothness+lambda, float64(s.Dim)
	if h > 1/M {
		return Bound{}, inputErr("h", h, "the TV bound needs h ≤ 1/M = %v", 1/M)
	}
	T := float64(k) * h
	b := Bound{
		Metric:         TV,
		Step:           h,
		Steps:          k,
		Start:          0.5 * math.Exp(p/4*math.Log(M/m)-m*T/2),
		Discretisation: math.Sqrt(p * M * M * h * T / 4),
		Recalled:       true,
		Source:         s.Source,
	}
	if lambda > 0 {
		b.Bias = PenaltyBias(lambda, s.SecondMoment)
	}
	b.Total = b.Start + b.Discretisation + b.Bias
	return b, nil
}

// checkTV validates a setting for the TV bounds.
func checkTV(s Setting) error {
	if err := checkCurvature(s, false); err != nil {
		return err
	}
	switch {
	case s.Bias != 0:
		return inputErr("delta", s.Bias, "the TV bound (Dalalyan 2017) assumes exact gradients; use W2 for biased gradients")
	case s.Noise != 0:
		return inputErr("sigma", s.Noise, "the TV bound (Dalalyan 2017) assumes exact gradients; use W2 for noisy gradients")
	case s.StartDistance != 0:
		return inputErr("w0", s.StartDistance, "the TV bound assumes the start N(θ*, I/M); a start distance is for W2")
	case !finite(s.SecondMoment) || s.SecondMoment < 0:
		return inputErr("mu2", s.SecondMoment, "the second moment must be finite and non-negative")
	case s.Convexity == 0 && s.SecondMoment == 0:
		return inputErr("mu2", s.SecondMoment, "a convex target (m = 0) needs a positive bound on E‖θ − θ̄‖²")
	}
	return nil
}
