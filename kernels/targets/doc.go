// Package targets owns the analytic targets of sluice: densities with exact
// gradients and known curvature, used by tests, the demo and benchmarks.
//
// Conventions. A target is a density on R^p,
//
//	π(θ) ∝ exp(−f(θ)),
//
// and everything a Target reports is of log π, never of the potential f:
// LogDensity is log π (up to an additive constant) and GradLogDensity is the
// score ∇log π = −∇f. Curvature reports the curvature of f: m is the
// strong-convexity constant and M the smoothness (Lipschitz constant of ∇f),
// so that for twice-differentiable f
//
//	m·I ⪯ ∇²f(θ) ⪯ M·I   for all θ
//
// (docs/methods.md, section 1). Points are []float64 of length Dim; batches are flat
// row-major, one row per point (EvalBatch).
//
// Targets here:
//
//	Gaussian  N(μ, Q⁻¹) given the precision Q (symmetric positive definite):
//	          log π(x) = −½(x−μ)ᵀQ(x−μ) − (p/2)·log 2π + ½·log det Q
//	          ∇log π(x) = −Q(x−μ)
//	          m = λ_min(Q), M = λ_max(Q)
//
//	Logistic  Bayesian logistic regression, y_i ∈ {0,1}, P(y_i=1|θ) = σ(x_iᵀθ),
//	          prior θ ~ N(0, α⁻¹I):
//	          log π(θ) = Σ_i [y_i·x_iᵀθ − log(1+exp(x_iᵀθ))] − (α/2)‖θ‖²  (+ const)
//	          ∇log π(θ) = Xᵀ(y − σ(Xθ)) − αθ
//	          ∇²log π(θ) = −XᵀWX − αI,  W = diag(σ(x_iᵀθ)(1−σ(x_iᵀθ)))
//	          m = α, M = α + ¼·λ_max(XᵀX)   (since 0 < σ(1−σ) ≤ ¼)
//
// log(1+exp(z)) is evaluated as a stable softplus (z + log1p(exp(−z)) for
// z > 0, log1p(exp(z)) otherwise) and σ without overflow.
//
// Concurrency and memory. Targets are immutable once constructed and are safe
// for concurrent use by multiple goroutines. LogDensity and GradLogDensity
// allocate nothing: they loop over data copied in by the constructor and
// keep no scratch space.
//
// Errors and panics. Constructors return errors for bad data (non-finite
// values, a precision that is not positive definite, labels outside {0,1},
// mismatched lengths). Wrong slice lengths passed by our own code to the
// evaluation methods are programmer errors and panic with a message prefixed
// "targets: ".
package targets
