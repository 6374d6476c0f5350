// Package diag owns the measured accuracy of a set of chains: R̂,
// effective sample sizes and Monte Carlo standard errors computed from the
// draws themselves, univariate (Vehtari, Gelman, Simpson, Carpenter and
// Bürkner, Bayesian Analysis 16(2), 2021; Geyer, Statistical Science 7(4),
// 1992) and multivariate (Vats, Flegal and Jones, Biometrika 106(2),
// 2019); the kernel Stein discrepancy of the draws with its uncertainty;
// curvature certificates from gradient pairs; and a bounded-memory record
// of a long run on which they are computed.
//
// Inputs are M chains of S draws of one scalar quantity, chains[m][n], or a
// flat chains × draws × dim array for Summarize. Nothing here knows how
// the draws were made. The univariate algorithm below is the project's
// own statement of the published method (details recalled from memory
// are marked so where they are used).
//
// Split chains and R̂. Every chain is cut into its first and last ⌊S/2⌋
// draws (the middle one dropped when S is odd): M' = 2M chains of N draws,
// S_tot = N·M'. With chain means θ̄_m and variances s_m²,
//
//	W = mean_m s_m²,  B = N·var_m(θ̄_m),  var⁺ = ((N−1)/N)·W + B/N,  R̂ = √(var⁺/W)
//	rank normalisation: z = Φ⁻¹((r − 3/8)/(S_tot + 1/4)), r the pooled average rank
//	bulk R̂ = R̂(z),  folded R̂ = R̂(z of |θ − median θ|),  reported R̂ = max(bulk, folded)
//
// Effective sample size (Geyer 1992's initial positive and monotone
// sequence on the multi-chain autocorrelation of Vehtari et al. 2021),
// with per-chain autocovariances γ̂_{t,m} (divisor N):
//
//	ρ̂_t = 1 − (W − mean_m γ̂_{t,m}) / var⁺
//	P̂_k = ρ̂_{2k} + ρ̂_{2k+1}, summed while positive, made monotone
//	τ̂ = max(−1 + 2·Σ_k P̂_k, 1/log₁₀ S_tot),  ESS = S_tot / τ̂
//
// The floor on τ̂ (Vehtari et al. 2021) makes every ESS positive and at
// most S_tot·log₁₀ S_tot: antithetic chains may exceed S_tot, never by
// more, and a run whose τ̂ would be negative or near zero (a diverged run)
// cannot report a negative or impossible ESS. The multivariate ESS and the
// batch-means ESS of History obey the same cap. Draws too large for their
// squares to be finite are rescaled first (the ESS is scale-free).
// Autocovariances are summed directly for the first lags and by FFT
// (gonum dsp/fourier) once Geyer's sequence runs long.
//
// Figures built on it: bulk-ESS = ESS(z); tail-ESS =
// min{ESS(1[θ ≤ q̂₀.₀₅]), ESS(1[θ ≤ q̂₀.₉₅])}, q̂ the type-7 quantiles;
// MCSE(mean) = sd/√ESS(θ); and the MCSE of a quantile from the Beta
// interval of its indicator's ESS (see QuantileMCSE).
//
// Multivariate ESS (Vats, Flegal and Jones 2019), for one chain
// Y_1..Y_n ∈ R^p:
//
//	mESS = min(n·(det Λ̂ / det Σ̂_BM)^{1/p}, n·log₁₀ n),  Σ̂_BM = (b/(a−1))·Σ_k (Ȳ_k − Ȳ)(Ȳ_k − Ȳ)ᵀ,  b = ⌊√n⌋
//	minESS(p, α, ε) = [2^{2/p} π / (p Γ(p/2))^{2/p}] · χ²_{1−α, p} / ε²
//
// Long runs: History keeps, in memory independent of the run length, an
// evenly thinned subsequence of every chain (the univariate figures are
// computed on it) and batch sums with b ≈ √n (the ESS and MCSE of the
// whole run's mean); its comment says what the thinned ESS does and does
// not estimate. NewDrawHistory keeps the thinned subsequence alone, for a
// caller that never asks for the whole run's mean.
//
// Kernel Stein discrepancy (Liu, Lee and Jordan, ICML 2016; Gorham and
// Mackey, ICML 2017) measures how far draws x_i are from π using only
// their scores s_i = ∇log π(x_i), the gradients the session already has.
// With the IMQ base kernel k = (c² + ‖x−y‖²)^β (default c = 1, β = −½),
// r = x − y, S = c² + ‖r‖² (closed form derived here from the definition
// of the Langevin Stein kernel):
//
//	k₀(x,y) = s(x)ᵀs(y)S^β + 2βS^{β−1}rᵀ(s(y) − s(x)) − 2βd·S^{β−1} − 4β(β−1)‖r‖²S^{β−2}
//	KSD²_V = (1/n²)Σ_{i,j} k₀(x_i,x_j),   KSD²_U = (1/(n(n−1)))Σ_{i≠j} k₀(x_i,x_j)
//
// The figure to show a user is AssessStein's (or StreamKSD.Assess's):
// coordinates standardised by the draws' standard deviations (z = x/σ,
// scores σ·s, so c = 1 suits every problem's units), the U-statistic with
// its standard error (Hoeffding 1948's projection, with the effect of the
// estimated scale; for chains inflated by an autocorrelation time), an
// upper 95 % bound and a wild bootstrap test of KSD = 0 (Chwialkowski,
// Strathmann and Gretton 2016; a Markov sign multiplier for chains):
//
//	KSD = √max(U, 0),   upper bound = √(max(U, 0) + 1.645·SE)
//	U*_b = (1/(n(n−1)))Σ_{i≠j} W_i W_j k₀(z_i, z_j),   p = (1 + #{U*_b ≥ U})/(B + 1)
//
// with a state in plain words (undefined, not distinguishable from 0 at
// this sample size, distinguishable from 0) and SteinResult.Below, the
// rule for a target: met only when the upper bound is below it. The older
// KSD.U clamps a negative estimate to a bare 0 and is deprecated.
//
// StreamKSD keeps an evenly thinned, bounded subsample of a long run
// (stride doubling) and computes the statistics on it when asked.
//
// Curvature from gradient pairs (standard convex analysis, derived here):
// with f = −log π, s = x − y, y_g = ∇f(x) − ∇f(y) = H̄s, H̄ the mean
// Hessian on the segment,
//
//	r_in = ⟨y_g,s⟩/‖s‖²  ≤  r_norm = ‖y_g‖/‖s‖  ≤  r_coc = ‖y_g‖²/⟨y_g,s⟩
//
// r_norm is at most the gradient's Lipschitz constant M for any f; r_in
// is at least m; r_coc ≤ M only where H̄ ⪰ 0. So pairs certify M ≥ max
// r_coc while no pair contradicts convexity, M ≥ max r_norm once one has
// (r_in < 0: not convex, reported by NonConvex), and m ≤ min r_in.
// CurvatureProbe estimates M (and m, via σI − ∇²f) by power iteration with
// Hessian-vector products (∇f(θ+εv) − ∇f(θ))/ε, as an ask/tell machine
// costing one extra gradient per iteration.
//
// Shapes that do not fit (ragged chains, too few draws, bad levels) are
// programmer errors and panic; figures that the data leave undefined
// (a constant quantity, a NaN draw, a singular covariance) are NaN.
package diag
