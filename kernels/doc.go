// Package kernels owns one step of each Langevin-type sampling method over a
// batch of chains, written as an ask/tell state machine.
//
// A Kernel never calls the target. Next says which points it needs
// evaluated and what to evaluate there (a Request); the caller evaluates
// them however it likes (in-process, over gRPC, on a cluster) and hands the
// results back with Tell (an Answer). When a Tell completes a step of every
// chain, Positions holds the new state of all chains. There is no I/O, no
// clock and no global randomness here: every kernel takes its random stream
// (math/rand/v2) from the caller, and its whole state, including that
// stream, round-trips through MarshalBinary and UnmarshalBinary, so a run
// can be checkpointed and resumed bit for bit. Blocks (blocks.go) runs a
// batch as one kernel per chain, each on its own stream (ChainSource), so
// that any range of chains can be stepped apart with the same draws.
//
// Conventions. The target is pi(theta) ∝ exp(-f(theta)) on R^p. Answers
// carry the gradient of log pi (the score, -∇f), never of the potential f.
// Points and gradients are flat row-major []float64, one row per point.
//
// Kernels here:
//
//	lmc       unadjusted Langevin (Euler–Maruyama of dθ = ∇log π(θ)dt + √2 dW):
//	          θ_{k+1} = θ_k + h·∇log π(θ_k) + √(2h)·ξ_{k+1},  ξ ~ N(0, I_p)
//	          one gradient per chain per step.
//	kinetic   underdamped Langevin with the exact integration of the
//	          frozen-gradient step (Cheng, Chatterji, Bartlett & Jordan,
//	          COLT 2018); friction γ, inverse mass u; velocities kept in
//	          state; one gradient per chain per step.
//	baoab     underdamped Langevin by the BAOAB splitting (Leimkuhler &
//	          Matthews 2013): half kick, half drift, exact friction and
//	          noise, half drift, half kick; exact position law on Gaussian
//	          targets at every stable step; one gradient per chain per step.
//	midpoint  randomised midpoint for underdamped Langevin, γ = 2 (Shen &
//	          Lee, NeurIPS 2019); two gradients per chain per step
//	          (position, then midpoint).
//	midpoint-overdamped
//	          randomised midpoint for overdamped Langevin (Shen & Lee 2019);
//	          two gradients per chain per step.
//	mala      Metropolis-adjusted Langevin (Roberts & Tweedie 1996): proposal
//	          y = x + h∇log π(x) + √(2h)ξ, accepted with the exact
//	          Metropolis–Hastings ratio; log density and gradient at one
//	          proposal per chain per step, plus the start once; h adapted
//	          toward 0.574 acceptance during burn-in only.
//	ozaki     local linear (Ozaki) discretisation (Ozaki 1992; Dalalyan 2017):
//	          θ' = θ − H⁻¹(I − e^{−hH})g + Σ^{1/2}ξ, Σ = H⁻¹(I − e^{−2hH}),
//	          H = −∇²log π; gradient and dense Hessian per chain per step.
//	ozaki-krylov
//	          the same with φ-functions applied by Lanczos from
//	          Hessian-vector products, accuracy controlled and reported.
//	sgld      stochastic-gradient Langevin (Welling & Teh, ICML 2011):
//	          θ ← θ + h_t·ĝ_S + √(2h_t)ξ, h_t constant or ε_t/2 with
//	          ε_t = a(b+t)^(−γ); one gradient per chain per step.
//	sgld-cv   SGLD with a control variate (Baker et al. 2019): a
//	          Barzilai–Borwein search for θ̂ with full-data
//	          gradients, then ĝ = g(θ̂) + ĝ_S(θ) − ĝ_S(θ̂); two rows per
//	          chain per step on one minibatch.
//	svrg      SVRG Langevin (Dubey et al. 2016): full-data
//	          anchors every τ steps, ĝ = g̃ + ĝ_S(θ) − ĝ_S(θ̃); two rows per
//	          chain per step plus one full-data row per chain every τ steps.
//	hit-and-run
//	          density-only reference sampler: a uniform direction, then a
//	          slice-sampling update on the line (stepping-out and
//	          shrinkage, Neal 2003), which leaves the line's conditional
//	          law invariant exactly; log densities only, a random number of
//	          points per step, batched across chains.
//	rejection exact i.i.d. draws by rejection from a Gaussian envelope with
//	          a declared bound, dim ≤ 4; a bound violated by an observed
//	          ratio is recorded (Violation) and fails the session.
//
// References: Dalalyan, JRSS B 79 (2017) 651–676; Durmus & Moulines,
// Ann. Appl. Probab. 27 (2017).
//
// Preconditioning: lmc, kinetic, baoab, midpoint, midpoint-overdamped, mala, sgld,
// sgld-cv and svrg take an optional Metric C (MetricUser), with which they
// sample the same π (Roberts & Stramer 2002 for MALA; a change of variables
// y = L⁻¹x, C = LLᵀ, for the others). Every kernel's state goes through one
// codec (a versioned record of named fields).
package kernels
