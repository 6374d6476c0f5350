package bound

import (
	"fmt"
	"math"
)

// Metric is the distance to the target a plan or bound is about.
type Metric int

const (
	// TV is the total variation distance.
	TV Metric = iota + 1
	// W2 is the 2-Wasserstein distance.
	W2
)

// String returns "TV", "W2", or a placeholder for an unset or unknown
// metric.
func (m Metric) String() string {
	switch m {
	case TV:
		return "TV"
	case W2:
		return "W2"
	}
	return fmt.Sprintf("Metric(%d)", int(m))
}

// Source says where the curvature constants m and M came from, and so how
// far a plan or bound built on them can be trusted. The zero value is
// Estimated, so that nothing claims a guarantee by default.
type Source int

const (
	// Estimated: m and M were estimated from gradients (curvature
	// certificates and probes, docs/methods.md); the bound is an
	// estimate, not a guarantee.
	Estimated Source = iota
	// Declared: the client declared m and M; the bound holds under the
	// declared assumptions.
	Declared
)

// String returns the label shown beside a plan or bound.
func (s Source) String() string {
	switch s {
	case Estimated:
		return "estimated, not guaranteed"
	case Declared:
		return "guaranteed under the declared assumptions"
	}
	return fmt.Sprintf("Source(%d)", int(s))
}

// Setting is what is assumed about the target and the gradient oracle.
// Which fields are used depends on the metric. A field a bound cannot
// account for is an error when non-zero (gradient bias or noise, or a start
// distance, for TV), so that a caller never believes a bound covers
// something it does not.
type Setting struct {
	// Convexity is m ≥ 0, the strong-convexity constant of f. TV accepts
	// m = 0 (convex only) with SecondMoment; W2 needs m > 0.
	Convexity float64
	// Smoothness is M > 0, the Lipschitz constant of ∇f; M ≥ m.
	Smoothness float64
	// Dim is the dimension p ≥ 1.
	Dim int
	// SecondMoment is μ₂ ≥ E_π‖θ − θ̄‖² about the penalty centre θ̄. TV
	// with m = 0 only (the penalised target), where it is required.
	SecondMoment float64
	// StartDistance is W0 ≥ W2(ν₀, π), W2 only. Zero means √(p/m), the
	// bound for a point start at the minimiser θ* (E_π‖θ − θ*‖² ≤ p/m).
	StartDistance float64
	// Bias is δ ≥ 0 with E‖E[ζ_k | θ_k, past]‖² ≤ δ²·p for the gradient
	// error ζ_k, W2 only (Dalalyan and Karagulyan 2019).
	Bias float64
	// Noise is σ ≥ 0 with E‖ζ_k − E[ζ_k | θ_k, past]‖² ≤ σ²·p, W2 only
	// (Dalalyan and Karagulyan 2019). For unbiased minibatch gradients σ²·p is the
	// expected squared norm of the minibatch error.
	Noise float64
	// Source says whether m and M were declared or estimated.
	Source Source
}

// Schedule is a step, horizon and iteration count.
type Schedule struct {
	// Step is the step size h.
	Step float64
	// Horizon is the continuous time T the rule asks for; Iterations·Step
	// is at least T.
	Horizon float64
	// Iterations is K = ⌈T/h⌉, the number of LMC steps.
	Iterations int
	// Penalty is λ > 0 when the chain must run on the penalised target
	// π_λ ∝ π·exp(−λ‖θ−θ̄‖²/2) (TV with m = 0, derived here): the
	// engine adds λ(θ − θ̄) to ∇f. Zero otherwise.
	Penalty float64
}

// Bound is a bound on the distance between the law of the chains after
// Steps steps and the target, with each term kept apart so it can be shown.
type Bound struct {
	Metric Metric
	// Step and Steps are h and k.
	Step  float64
	Steps int
	// Start is the part left of the start: ½·exp{(p/4)log κ − m·k·h/2}
	// for TV, (contraction factor)^k·W0 for W2.
	Start float64
	// Discretisation is the error of the Euler step with exact gradients.
	Discretisation float64
	// Bias is the W2 term δ√p/m of biased gradients, or the TV term
	// λμ₂/2 of the penalty. Neither shrinks with h.
	Bias float64
	// Noise is the W2 term of zero-mean gradient noise.
	Noise float64
	// Total is the sum of the terms: the bound. A TV total above 1 says
	// nothing (TV ≤ 1 always); it is reported as the theorem gives it.
	Total float64
	// LargeStep is true when the W2 bound is the large-step branch of
	// Dalalyan and Karagulyan (2019), 2/(m+M) < h < 2/M.
	LargeStep bool
	// Recalled is true when the bound's constants are recalled from the
	// paper it cites rather than checked against its text (checked here
	// only on Gaussian targets). It is true for every bound here.
	Recalled bool
	// Source says whether m and M were declared or estimated.
	Source Source
}

// InputError reports an invalid input, named as the client would name it:
// "m", "M", "p", "eps", "mu2", "w0", "delta", "sigma", "lambda", "budget",
// "h", "k", "metric", "chains", "rate".
type InputError struct {
	Input  string
	Value  float64
	Reason string
}

func (e *InputError) Error() string {
	return fmt.Sprintf("bound: %s = %v: %s", e.Input, e.Value, e.Reason)
}

func inputErr(name string, v float64, format string, args ...any) error {
	return &InputError{Input: name, Value: v, Reason: fmt.Sprintf(format, args...)}
}

// maxIterations is the largest iteration or evaluation count a plan gives:
// counts up to 2^53 are exact in float64.
const maxIterations = 1 << 53

func finite(x float64) bool { return !math.IsNaN(x) && !math.IsInf(x, 0) }

// checkCurvature validates m, M and p; strong says whether m must be > 0.
func checkCurvature(s Setting, strong bool) error {
	m, M := s.Convexity, s.Smoothness
	switch {
	case !finite(M) || !(M > 0):
		return inputErr("M", M, "the smoothness must be finite and positive")
	case !finite(m) || m < 0:
		return inputErr("m", m, "the strong convexity must be finite and non-negative")
	case strong && m == 0:
		return inputErr("m", m, "this bound needs a strongly convex target, m > 0")
	case m > M:
		return inputErr("m", m, "the strong convexity must not exceed the smoothness M = %v", M)
	case s.Dim < 1:
		return inputErr("p", float64(s.Dim), "the dimension must be at least 1")
	}
	if s.Source != Estimated && s.Source != Declared {
		panic(fmt.Sprintf("bound: unknown source %d", int(s.Source)))
	}
	return nil
}

func checkNonNeg(name string, v float64, what string) error {
	if !finite(v) || v < 0 {
		return inputErr(name, v, "%s must be finite and non-negative", what)
	}
	return nil
}

func checkSteps(h float64, k int) error {
	if !finite(h) || !(h > 0) {
		return inputErr("h", h, "the step must be finite and positive")
	}
	if k < 0 {
		return inputErr("k", float64(k), "the step count must be non-negative")
	}
	return nil
}

// iterations returns ⌈T/h⌉ (0 for T ≤ 0), or an error naming eps when
// it is beyond maxIterations.
func iterations(T, h, eps float64) (int, error) {
	r := T / h
	if !(r <= maxIterations) {
		return 0, inputErr("eps", eps, "needs %.3g iterations, more than 2^53", r)
	}
	if r <= 0 {
		return 0, nil
	}
	return int(math.Ceil(r)), nil
}
