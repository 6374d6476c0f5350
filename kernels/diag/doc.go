// Package diag owns the measured accuracy of a set of chains: effective
// sample size and Monte Carlo standard errors computed from the draws
// themselves (THEORY.md §9; Vehtari et al., Bayesian Analysis 16(2), 2021;
// Geyer, Statistical Science 7(4), 1992).
//
// Inputs are M chains of N draws of one scalar quantity, chains[m][n].
// Nothing here knows how the draws were made.
//
// Effective sample size (THEORY.md §9 step 5): with per-chain
// autocovariances γ̂_{t,m} (divisor N), within-chain variance W and
// var⁺ = ((N−1)/N)·W + B/N,
//
//	ρ̂_t = 1 − (W − mean_m γ̂_{t,m}) / var⁺
//	P̂_k = ρ̂_{2k} + ρ̂_{2k+1}, summed while positive, made monotone
//	τ̂ = −1 + 2·Σ_k P̂_k,  ESS = N·M / τ̂
package diag
