// Package bound owns the theoretical guarantees and planning: step size,
// horizon and evaluations for a target error, and the running bound.
//
// Everything here is for unadjusted Langevin (LMC, the kernels package's
// lmc) on π(θ) ∝ exp(−f(θ)) on R^p, with m·I ⪯ ∇²f ⪯ M·I (m the strong
// convexity, M the smoothness, κ = M/m). Nothing here runs
// a chain: the functions turn declared (or estimated) constants into a
// schedule, and a step h and a step count k into the bound the theory gives.
//
// Status of the formulas. Every bound below with a numeric constant in it
// is recalled from the paper it cites, not checked against the paper's
// text. Plans and bounds built on them say so (Plan.Recalled), and the
// tests pair each one with an exact check on a Gaussian target, where the
// true distance is computable and the bound must dominate it.
// docs/methods.md states each result with its source and derivations.
//
// Total variation, Gaussian start (Dalalyan (2017), JRSS B 79(3), the TV
// theorem for LMC and its corollary; from memory):
// for h ≤ 1/M, ν₀ = N(θ*, M⁻¹I), T = K·h,
//
//	TV(ν_K, π) ≤ ½·exp{(p/4)·log(M/m) − m·T/2} + (p·M²·h·T/4)^{1/2}
//
// and for ε ∈ (0, 1/2) the rule
//
//	T = (4·log(1/ε) + p·log(M/m)) / (2m),   h = ε²/(M²·p·T),   K = ⌈T/h⌉
//
// makes each term ε/2 at horizon T (and the sum stays ≤ ε at K·h ≥ T,
// see TVRule).
//
// The TV start (derived here, docs/methods.md, section 2.5; start.go):
// chains started from N(θ̂, M⁻¹I) with ‖θ̂ − θ*‖ ≤ r add ShiftTV(r, M) =
// erf(r√M/(2√2)) to the bound above; the engine finds θ̂ by gradient
// steps of size ModeSearchStep (Nesterov 2004, Theorem 2.1.15, from
// memory), certifies r = ‖∇f(θ̂)‖/m, and gives the shift TVShiftShare of
// the target.
//
// Convex, not strongly convex (derived here, docs/methods.md): with the penalised
// target π_λ ∝ π·exp(−λ‖θ−θ̄‖²/2) and μ₂ ≥ E_π‖θ−θ̄‖²,
//
//	TV(π, π_λ) ≤ λ·μ₂/2,   λ = ε/μ₂,
//
// then the TV rule above on π_λ with (m, M, ε) → (λ, M+λ, ε/2).
//
// Wasserstein-2 (Dalalyan and Karagulyan (2019), Stoch. Proc. Appl.
// 129(12), the constant-step theorems with exact and inaccurate gradients;
// the constant 1.65 and the δ, σ terms from memory): for
// any start with W2(ν₀, π) ≤ W0 and gradients Y = ∇f + ζ with bias
// E‖E[ζ|past]‖² ≤ δ²p and noise E‖ζ − E[ζ|past]‖² ≤ σ²p, if h ≤ 2/(m+M)
//
//	W2(ν_K, π) ≤ (1 − m·h)^K·W0 + 1.65·κ·(h·p)^{1/2} + δ·√p/m + σ²·(h·p)^{1/2}/(1.65·M + σ·√m)
//
// and, exact gradients only, if 2/(m+M) ≤ h < 2/M
//
//	W2(ν_K, π) ≤ (M·h − 1)^K·W0 + 1.65·(M·h/(2 − M·h))·(h·p)^{1/2}.
//
// The W2 rule (derived here from the first branch, with δ and σ) takes the
// largest h ≤ 2/(m+M) with the h-dependent terms and the bias within ε/2,
// and K = ⌈log(2·W0/ε)/(m·h)⌉ so the start term is within ε/2; W0 defaults
// to √(p/m), the distance from a point start at θ* (E_π‖θ − θ*‖² ≤ p/m).
//
// Cost: LMC asks one gradient per chain per step, so a plan
// of K iterations costs K evaluations per chain.
//
// Source. A plan or bound computed from m and M declared by the client is
// guaranteed under the declared assumptions; one computed from estimated
// m and M is an estimate, not a guarantee (Source). The engine sets it.
//
// Invalid inputs to the rules, the bounds and NewPlan (they come from
// clients) give an *InputError naming the input, never a panic; the small
// helpers PenaltyWeight, PenaltyBias and Plan.Bound panic, as on a
// programmer error, since their inputs have been validated by then.
package bound
