package bound

import (
	"fmt"
	"math"
)

// Spec is what a plan is asked for: the setting, the metric and target
// error, and optionally the number of chains and the evaluation rate.
type Spec struct {
	Setting
	// Metric is TV or W2; it must be set.
	Metric Metric
	// Eps is the target error ε: in (0, 1/2) for TV, positive for W2.
	Eps float64
	// Chains is the number of chains; zero means 1.
	Chains int
	// Rate is the gradient evaluations per second over all chains
	// together; zero means unknown (no wall time).
	Rate float64
}

// Plan is the step, horizon and cost of reaching a target error, and what
// that promise rests on.
type Plan struct {
	Metric Metric
	Eps    float64
	// Schedule holds the step h, horizon T, iterations K and, for a
	// convex TV target, the penalty λ.
	Schedule
	// Chains is the number of chains the cost is for.
	Chains int
	// EvaluationsPerChain is K: LMC asks one gradient per chain per step
	// per step. The search for θ* (the start of a TV plan, the
	// default W0 of a W2 plan) is not counted.
	EvaluationsPerChain int
	// Evaluations is EvaluationsPerChain·Chains.
	Evaluations int
	// Seconds is Evaluations/Rate, the wall time at the given rate; zero
	// when the rate is unknown.
	Seconds float64
	// Final is the bound after Iterations steps; its Total is at most Eps
	// (to rounding: see TVRule and W2Rule).
	Final Bound
	// Assumptions lists, in words, everything the plan relies on,
	// including the published source of each bound and whether its
	// constants are recalled or derived here.
	Assumptions []string
	// Recalled is true when the bound's constants are recalled from the
	// paper it cites rather than checked against its text (checked here
	// only on Gaussian targets). Every plan here is.
	Recalled bool
	// Source says whether m and M were declared or estimated.
	Source Source

	setting Setting
}

// NewPlan returns the plan for spec: the rule of TVRule or W2Rule, its
// cost, and the bound it reaches. Every invalid input gives an
// *InputError naming it.
func NewPlan(spec Spec) (Plan, error) {
	s := spec.Setting
	chains := spec.Chains
	if chains == 0 {
		chains = 1
	}
	if chains < 0 {
		return Plan{}, inputErr("chains", float64(spec.Chains), "the number of chains must be positive")
	}
	if !finite(spec.Rate) || spec.Rate < 0 {
		return Plan{}, inputErr("rate", spec.Rate, "the evaluation rate must be finite and non-negative")
	}
	var (
		sc  Schedule
		err error
	)
	switch spec.Metric {
	case TV:
		sc, err = TVRule(s, spec.Eps)
	case W2:
		sc, err = W2Rule(s, spec.Eps)
	default:
		return Plan{}, inputErr("metric", float64(spec.Metric), "the metric must be TV or W2")
	}
	if err != nil {
		return Plan{}, err
	}
	if float64(sc.Iterations)*float64(chains) > maxIterations {
		return Plan{}, inputErr("eps", spec.Eps, "needs %.3g evaluations over %d chains, more than 2^53",
			float64(sc.Iterations)*float64(chains), chains)
	}
	p := Plan{
		Metric:              spec.Metric,
		Eps:                 spec.Eps,
		Schedule:            sc,
		Chains:              chains,
		EvaluationsPerChain: sc.Iterations,
		Evaluations:         sc.Iterations * chains,
		Assumptions:         assumptions(spec.Metric, s),
		Recalled:            true,
		Source:              s.Source,
		setting:             s,
	}
	if spec.Rate > 0 {
		p.Seconds = float64(p.Evaluations) / spec.Rate
	}
	p.Final = p.Bound(sc.Iterations)
	return p, nil
}

// Bound returns the running bound of the plan after k of its steps. It
// panics for k < 0, or on a Plan not made by NewPlan.
func (p Plan) Bound(k int) Bound {
	var (
		b   Bound
		err error
	)
	switch p.Metric {
	case TV:
		b, err = TVBound(p.setting, p.Penalty, p.Step, k)
	case W2:
		b, err = W2Bound(p.setting, p.Step, k)
	default:
		panic("bound: Bound of a Plan not made by NewPlan")
	}
	if err != nil {
		panic(fmt.Sprintf("bound: Plan.Bound(%d): %v", k, err))
	}
	return b
}

// assumptions describes in words what a valid plan relies on.
func assumptions(metric Metric, s Setting) []string {
	m, M := s.Convexity, s.Smoothness
	src := "estimated"
	if s.Source == Declared {
		src = "declared"
	}
	var a []string
	if metric == TV && m == 0 {
		a = append(a,
			fmt.Sprintf("f is convex and M-smooth, M = %v (%s)", M, src),
			fmt.Sprintf("E_π‖θ − θ̄‖² ≤ μ₂ = %v about the penalty centre θ̄", s.SecondMoment),
			"the chains run on π_λ ∝ π·exp(−λ‖θ − θ̄‖²/2): λ(θ − θ̄) is added to every gradient of f",
			"every chain starts from N(θ*_λ, I/(M+λ)), θ*_λ the minimiser of f + λ‖θ − θ̄‖²/2",
			"exact gradients",
			"step h ≤ 1/(M+λ)",
			"penalty bias TV(π, π_λ) ≤ λμ₂/2: "+derivedPenalty,
			"TV bound and rule on π_λ: "+tvSource,
		)
	} else {
		a = append(a, fmt.Sprintf("f is m-strongly convex and M-smooth, m = %v, M = %v (%s)", m, M, src))
		if metric == TV {
			a = append(a,
				"every chain starts from N(θ*, I/M), θ* the minimiser of f",
				"exact gradients",
				"step h ≤ 1/M",
				"TV bound and rule: "+tvSource,
			)
		} else {
			if s.StartDistance > 0 {
				a = append(a, fmt.Sprintf("W2(ν₀, π) ≤ W0 = %v", s.StartDistance))
			} else {
				a = append(a, fmt.Sprintf("every chain starts at θ*, the minimiser of f: W2(δ_θ*, π) ≤ √(p/m) = %v (E_π‖θ − θ*‖² ≤ p/m for m-strongly convex f)",
					math.Sqrt(float64(s.Dim)/m)))
			}
			if s.Bias == 0 && s.Noise == 0 {
				a = append(a, "exact gradients")
			} else {
				a = append(a, fmt.Sprintf("gradient error ζ with E‖E[ζ | past]‖² ≤ δ²p, δ = %v, and E‖ζ − E[ζ | past]‖² ≤ σ²p, σ = %v", s.Bias, s.Noise))
			}
			a = append(a,
				"step h ≤ 2/(m+M)",
				"W2 bound: "+w2Source,
				"step and iteration rule: "+derivedW2Rule,
			)
		}
	}
	return append(a, "one gradient per chain per step (LMC)")
}

// The sources the assumptions name, in the words a user reads.
const (
	tvSource = "Dalalyan (2017), JRSS B 79(3), the total-variation theorem for LMC from a Gaussian start and its corollary; " +
		"constants recalled from the paper, checked by sluice only on Gaussian targets"
	w2Source = "Dalalyan and Karagulyan (2019), Stoch. Proc. Appl. 129(12), constant-step theorems with exact and inaccurate gradients; " +
		"the constant 1.65 and the δ, σ terms recalled from the paper, checked by sluice only on Gaussian targets"
	derivedPenalty = "derived for sluice, E_π[1 − exp(−λ‖θ − θ̄‖²/2)] ≤ λμ₂/2 (docs/methods.md, section 2.2)"
	derivedW2Rule  = "derived for sluice from that bound: the start term and the rest each within ε/2 (docs/methods.md, section 2.3)"
)
