// Package diag owns the measured accuracy of a set of chains: R̂,
// effective sample sizes and Monte Carlo standard errors computed from the
// draws themselves, univariate (THEORY.md §9; Vehtari, Gelman, Simpson,
// Carpenter, Bürkner, Bayesian Analysis 16(2), 2021; Geyer, Statistical
// Science 7(4), 1992) and multivariate (THEORY.md §10; Vats, Flegal, Jones,
// Biometrika 106(2), 2019), and a bounded-memory record of a long run on
// which they are computed.
//
// Inputs are M chains of S draws of one scalar quantity, chains[m][n], or a
// flat chains × draws × dim array for Summarize. Nothing here knows how
// the draws were made. The §9 algorithm is the project's own specification
// of the published method (THEORY.md labels its details "from memory").
//
// Split chains and R̂ (§9 steps 1–4). Every chain is cut into its first and
// last ⌊S/2⌋ draws (the middle one dropped when S is odd): M' = 2M chains
// of N draws, S_tot = N·M'. With chain means θ̄_m and variances s_m²,
//
//	W = mean_m s_m²,  B = N·var_m(θ̄_m),  var⁺ = ((N−1)/N)·W + B/N,  R̂ = √(var⁺/W)
//	rank normalisation: z = Φ⁻¹((r − 3/8)/(S_tot + 1/4)), r the pooled average rank
//	bulk R̂ = R̂(z),  folded R̂ = R̂(z of |θ − median θ|),  reported R̂ = max(bulk, folded)
//
// Effective sample size (§9 step 5), with per-chain autocovariances γ̂_{t,m}
// (divisor N):
//
//	ρ̂_t = 1 − (W − mean_m γ̂_{t,m}) / var⁺
//	P̂_k = ρ̂_{2k} + ρ̂_{2k+1}, summed while positive, made monotone
//	τ̂ = −1 + 2·Σ_k P̂_k,  ESS = N·M' / τ̂
//
// Autocovariances are summed directly for the first lags and by FFT
// (gonum dsp/fourier) once Geyer's sequence runs long.
//
// Figures built on it (§9 steps 6–8): bulk-ESS = ESS(z); tail-ESS =
// min{ESS(1[θ ≤ q̂₀.₀₅]), ESS(1[θ ≤ q̂₀.₉₅])}, q̂ the type-7 quantiles;
// MCSE(mean) = sd/√ESS(θ); and the MCSE of a quantile from the Beta
// interval of its indicator's ESS (see QuantileMCSE).
//
// Multivariate ESS (§10), for one chain Y_1..Y_n ∈ R^p:
//
//	mESS = n·(det Λ̂ / det Σ̂_BM)^{1/p},  Σ̂_BM = (b/(a−1))·Σ_k (Ȳ_k − Ȳ)(Ȳ_k − Ȳ)ᵀ,  b = ⌊√n⌋
//	minESS(p, α, ε) = [2^{2/p} π / (p Γ(p/2))^{2/p}] · χ²_{1−α, p} / ε²
//
// Long runs: History keeps, in memory independent of the run length, an
// evenly thinned subsequence of every chain (the §9 figures are computed
// on it) and batch sums with b ≈ √n (the ESS and MCSE of the whole run's
// mean); its comment says what the thinned ESS does and does not estimate.
//
// Kernel Stein discrepancy (THEORY.md §8; Liu, Lee and Jordan, ICML 2016;
// Gorham and Mackey, ICML 2017) measures how far draws x_i are from π using
// only their scores s_i = ∇log π(x_i), the gradients the session already
// has. With the IMQ base kernel k = (c² + ‖x−y‖²)^β (default c = 1, β = −½),
// r = x − y, S = c² + ‖r‖²:
//
//	k₀(x,y) = s(x)ᵀs(y)S^β + 2βS^{β−1}rᵀ(s(y) − s(x)) − 2βd·S^{β−1} − 4β(β−1)‖r‖²S^{β−2}
//	KSD²_V = (1/n²)Σ_{i,j} k₀(x_i,x_j),   KSD²_U = (1/(n(n−1)))Σ_{i≠j} k₀(x_i,x_j)
//
// StreamKSD keeps an evenly thinned, bounded subsample of a long run
// (stride doubling) and computes the U-statistic on it when asked.
//
// Curvature from gradient pairs (THEORY.md §12): with f = −log π,
// s = x − y, y_g = ∇f(x) − ∇f(y),
//
//	r_in = ⟨y_g,s⟩/‖s‖²  ≤  r_norm = ‖y_g‖/‖s‖  ≤  r_coc = ‖y_g‖²/⟨y_g,s⟩,  all in [m, M]
//
// so pairs certify M ≥ max r_coc and m ≤ min r_in (r_in < 0: not convex).
// CurvatureProbe estimates M (and m, via σI − ∇²f) by power iteration with
// Hessian-vector products (∇f(θ+εv) − ∇f(θ))/ε, as an ask/tell machine
// costing one extra gradient per iteration.
//
// Shapes that do not fit (ragged chains, too few draws, bad levels) are
// programmer errors and panic; figures that the data leave undefined
// (a constant quantity, a NaN draw, a singular covariance) are NaN.
package diag
