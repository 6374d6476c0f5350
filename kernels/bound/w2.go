package bound

import "math"

// dk19 is the constant 1.65 of the Wasserstein bounds of Dalalyan and
// Karagulyan (2019), "User-friendly guarantees for the Langevin Monte
// Carlo with inaccurate gradient", Stoch. Proc. Appl. 129(12): recalled
// from memory, checked here only on Gaussian targets.
const dk19 = 1.65

// W2Rule returns the step, horizon and iterations that make the W2 bound
// of Dalalyan and Karagulyan (2019) at most eps.
//
// Assumptions: f is m-strongly convex (m > 0) and M-smooth; W2(ν₀, π) ≤ W0
// (StartDistance; zero means √(p/m), a point start at θ*, since
// E_π‖θ − θ*‖² ≤ p/m); gradient error with bias δ and noise σ as in
// Setting (both zero: exact gradients). The bound is recalled from memory
// (the constant 1.65 and the δ, σ terms); the rule is derived here from
// its first branch, h ≤ 2/(m+M).
//
// Derivation. With h ≤ 2/(m+M), the bound is S + D(h) + B + N(h) with
// S = (1−mh)^K·W0, B = δ√p/m and
//
//	D(h) + N(h) = (h·p)^{1/2}·c,   c = 1.65·κ + σ²/(1.65·M + σ·√m),
//
// both increasing in h. The rule gives S at most ε/2 and the rest ε/2:
// the bias does not shrink with h, so it needs B < ε/2 (an error naming
// "delta" otherwise), and the largest h with D + N ≤ ε/2 − B solves the
// inequality exactly,
//
//	h = min{ ((ε/2 − B)/c)²/p, 2/(m+M) },
//
// which for δ = σ = 0 is h = min{ε²/(4·1.65²·κ²·p),
// 2/(m+M)}. Then (1−mh)^K ≤ e^{−mhK} ≤ ε/(2W0) for
//
//	K = ⌈T/h⌉,   T = log(2·W0/ε)/m   (K = 0 when W0 ≤ ε/2).
//
// The noise thus takes the share N/(D+N) = (c − 1.65κ)/c of the ε/2 − B
// left by the bias; Bound reports each term.
//
// Each iteration asks one gradient per chain: K
// evaluations per chain.
func W2Rule(s Setting, eps float64) (Schedule, error) {
	if err := checkW2(s); err != nil {
		return Schedule{}, err
	}
	if !finite(eps) || !(eps > 0) {
		return Schedule{}, inputErr("eps", eps, "the W2 target must be finite and positive")
	}
	m, M, p := s.Convexity, s.Smoothness, float64(s.Dim)
	bias := s.Bias * math.Sqrt(p) / m
	if !(bias < eps/2) {
		return Schedule{}, inputErr("delta", s.Bias,
			"the gradient bias term δ√p/m = %.6g does not shrink with the step and must be below eps/2 = %.6g", bias, eps/2)
	}
	c := dk19*M/m + noiseFactor(s)
	h := math.Min(math.Pow((eps/2-bias)/c, 2)/p, 2/(m+M))
	T := math.Max(0, math.Log(2*startDistance(s)/eps)/m)
	k, err := iterations(T, h, eps)
	if err != nil {
		return Schedule{}, err
	}
	return Schedule{Step: h, Horizon: T, Iterations: k}, nil
}

// NoiseStep returns the largest step h ≤ 2/(m+M) for which the noise term
// of Dalalyan and Karagulyan (2019) (from memory),
// σ²(h·p)^{1/2}/(1.65·M + σ·√m), is at most
// budget (for instance a share of the target error): solving the
// inequality exactly,
//
//	h = min{ (budget·(1.65·M + σ·√m)/σ²)²/p, 2/(m+M) }.
//
// With σ = 0 the noise term vanishes and the answer is 2/(m+M).
// Assumptions as in W2Rule.
func NoiseStep(s Setting, budget float64) (float64, error) {
	if err := checkW2(s); err != nil {
		return 0, err
	}
	if !finite(budget) || !(budget > 0) {
		return 0, inputErr("budget", budget, "the noise budget must be finite and positive")
	}
	m, M, p := s.Convexity, s.Smoothness, float64(s.Dim)
	hmax := 2 / (m + M)
	if s.Noise == 0 {
		return hmax, nil
	}
	return math.Min(math.Pow(budget/noiseFactor(s), 2)/p, hmax), nil
}

// W2Bound returns the W2 bound of Dalalyan and Karagulyan (2019)
// (recalled from memory) after k steps of size h, term by term. For h ≤ 2/(m+M)
// (branch (a)),
//
//	Start          = (1 − m·h)^k·W0
//	Discretisation = 1.65·κ·(h·p)^{1/2}
//	Bias           = δ·√p/m
//	Noise          = σ²·(h·p)^{1/2}/(1.65·M + σ·√m);
//
// for 2/(m+M) < h < 2/M (branch (b), exact gradients only),
//
//	Start          = (M·h − 1)^k·W0
//	Discretisation = 1.65·(M·h/(2 − M·h))·(h·p)^{1/2}.
//
// The two branches agree at h = 2/(m+M). Assumptions as in W2Rule; a step
// h ≥ 2/M, or beyond 2/(m+M) with δ or σ non-zero, is outside the theorem
// and an error.
func W2Bound(s Setting, h float64, k int) (Bound, error) {
	if err := checkW2(s); err != nil {
		return Bound{}, err
	}
	if err := checkSteps(h, k); err != nil {
		return Bound{}, err
	}
	m, M, p := s.Convexity, s.Smoothness, float64(s.Dim)
	if !(h < 2/M) {
		return Bound{}, inputErr("h", h, "the W2 bound needs h < 2/M = %v", 2/M)
	}
	small := h <= 2/(m+M)
	if !small && (s.Bias != 0 || s.Noise != 0) {
		return Bound{}, inputErr("h", h, "with inexact gradients the W2 bound (Dalalyan and Karagulyan 2019) needs h ≤ 2/(m+M) = %v", 2/(m+M))
	}
	sq := math.Sqrt(h * p)
	b := Bound{Metric: W2, Step: h, Steps: k, Recalled: true, Source: s.Source, LargeStep: !small}
	if small {
		b.Start = contraction(m*h, k) * startDistance(s)
		b.Discretisation = dk19 * M / m * sq
		b.Bias = s.Bias * math.Sqrt(p) / m
		b.Noise = noiseFactor(s) * sq
	} else {
		b.Start = math.Pow(M*h-1, float64(k)) * startDistance(s)
		b.Discretisation = dk19 * (M * h / (2 - M*h)) * sq
	}
	b.Total = b.Start + b.Discretisation + b.Bias + b.Noise
	return b, nil
}

// contraction returns (1 − x)^k for 0 < x ≤ 1 as exp(k·log1p(−x)): 1 − x
// rounded would lose the digits of a small x, which k of the order of 1/x
// steps magnify into a relative error of k·2⁻⁵³ (a plan with x = 2e-9 and
// k = 4e9 would be off by 5e-7).
func contraction(x float64, k int) float64 {
	if k == 0 {
		return 1
	}
	return math.Exp(float64(k) * math.Log1p(-x))
}

// noiseFactor is σ²/(1.65·M + σ·√m): the noise term over (h·p)^{1/2}.
func noiseFactor(s Setting) float64 {
	sg := s.Noise
	return sg * sg / (dk19*s.Smoothness + sg*math.Sqrt(s.Convexity))
}

// startDistance is W0, defaulting to √(p/m).
func startDistance(s Setting) float64 {
	if s.StartDistance > 0 {
		return s.StartDistance
	}
	return math.Sqrt(float64(s.Dim) / s.Convexity)
}

// checkW2 validates a setting for the W2 bounds.
func checkW2(s Setting) error {
	if err := checkCurvature(s, true); err != nil {
		return err
	}
	if err := checkNonNeg("w0", s.StartDistance, "the start distance"); err != nil {
		return err
	}
	if err := checkNonNeg("delta", s.Bias, "the gradient bias"); err != nil {
		return err
	}
	if err := checkNonNeg("sigma", s.Noise, "the gradient noise"); err != nil {
		return err
	}
	return checkNonNeg("mu2", s.SecondMoment, "the second moment")
}
