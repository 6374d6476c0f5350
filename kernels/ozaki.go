package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas64"
	"gonum.org/v1/gonum/floats"
	"gonum.org/v1/gonum/lapack"
	"gonum.org/v1/gonum/lapack/lapack64"
)

// Ozaki is Langevin Monte Carlo with the Ozaki (local linear)
// discretisation over a batch of chains (Ozaki 1992; Dalalyan,
// JRSS B 79 (2017), the LMCO scheme). At θ_k it freezes
// the linearisation of the drift, with g_k = ∇f(θ_k) = −∇log π(θ_k) and
// H_k = ∇²f(θ_k) = −∇²log π(θ_k), and moves by the exact transition of the
// resulting Ornstein–Uhlenbeck process over time h:
//
//	θ_{k+1} = θ_k − V diag(φ₁(λ)) Vᵀ g_k + V diag(√φ₂(λ)) ξ_{k+1},   ξ ~ N(0, I_p)
//	H_k = V diag(λ) Vᵀ,   φ₁(λ) = (1 − e^{−hλ})/λ,   φ₂(λ) = (1 − e^{−2hλ})/λ
//
// so the step is Gaussian with mean θ_k − H_k⁻¹(I − e^{−hH_k})g_k and
// covariance Σ_k = H_k⁻¹(I − e^{−2hH_k}) = V diag(φ₂) Vᵀ. The noise uses
// the symmetric square root V diag(√φ₂) (the eigenvectors are already at
// hand), not a Cholesky factor; both give the same Gaussian law. For a
// Gaussian target the step is exact for every h (derived here: the
// linearised SDE is then the SDE itself). φ₁ and φ₂
// stay positive for λ ≤ 0, so indefinite Hessians are allowed (the step
// then expands along those directions).
//
// Each step asks for the gradient and the Hessian at every chain's current
// position, all chains in one request (Need = NeedGradient|NeedHessian);
// the answer needs room for both (Answer.Reserve). The Hessian is
// symmetrised as ½(H + Hᵀ) before its eigendecomposition. The noise is
// drawn chain by chain, after that chain's eigendecomposition, p normals
// per chain from the injected stream.
//
// The eigendecomposition is LAPACK's dsyev as implemented by gonum
// (lapack64.Syev, the routine behind mat.EigenSym) called on one
// preallocated workspace that all chains share in turn;
// mat.EigenSym.Factorize itself allocates five times a call. Its cost is
// O(p³) per chain per step. A warmed-up step allocates nothing up to at
// least p = 100; for large p gonum's blocked dsyev multiplies matrices on
// several goroutines, which allocates (measured at p = 1000: about 6,000
// allocations, 630 kB, per chain per step, against seconds of arithmetic).
// For large p see OzakiKrylov.
type Ozaki struct {
	dim, chains int
	h           float64
	steps       int
	x           []float64 // chains×dim current positions
	req         Request
	src         *rand.PCG
	rng         *rand.Rand
	ws          ozakiWork
}

// ozakiWork is the scratch space of one chain's transition, reused by
// every chain in turn.
type ozakiWork struct {
	v     []float64 // dim×dim: the upper triangle of H, then its eigenvectors (columns)
	lam   []float64 // eigenvalues of H, ascending
	work  []float64 // dsyev workspace
	phi1  []float64 // φ₁(λ_j)
	sphi2 []float64 // √φ₂(λ_j)
	t     []float64 // Vᵀ∇log π, then the step in eigen-coordinates
	xi    []float64 // the chain's normals
}

func newOzakiWork(p int) ozakiWork {
	w := ozakiWork{
		v: make([]float64, p*p), lam: make([]float64, p), phi1: make([]float64, p),
		sphi2: make([]float64, p), t: make([]float64, p), xi: make([]float64, p),
	}
	q := []float64{0}
	lapack64.Syev(lapack.EVCompute, w.sym(p), w.lam, q, -1)
	w.work = make([]float64, int(q[0]))
	return w
}

func (w *ozakiWork) sym(p int) blas64.Symmetric {
	return blas64.Symmetric{N: p, Stride: p, Data: w.v, Uplo: blas.Upper}
}

// factor diagonalises H = −∇²log π from hess (one row-major dim×dim block
// of Answer.Hessian) and fills φ₁ and √φ₂ for step h.
func (w *ozakiWork) factor(hess []float64, p int, h float64) {
	for i := range p {
		for j := i; j < p; j++ {
			w.v[i*p+j] = -0.5 * (hess[i*p+j] + hess[j*p+i])
		}
	}
	if !lapack64.Syev(lapack.EVCompute, w.sym(p), w.lam, w.work, len(w.work)) {
		panic("kernels: Ozaki: eigendecomposition of the Hessian did not converge")
	}
	for j, l := range w.lam {
		w.phi1[j] = ozakiPhi1(h, l)
		w.sphi2[j] = math.Sqrt(ozakiPhi2(h, l))
	}
}

// move applies one factored transition to x in place given the score
// s = ∇log π(x) and the normals xi: x += V(φ₁ ∘ Vᵀs + √φ₂ ∘ xi), which is
// x − V diag(φ₁)Vᵀg + V diag(√φ₂)ξ with g = −s.
func (w *ozakiWork) move(x, s, xi []float64, p int) {
	v := blas64.General{Rows: p, Cols: p, Stride: p, Data: w.v}
	blas64.Gemv(blas.Trans, 1, v, ozakiVec(s), 0, ozakiVec(w.t))
	for j := range w.t {
		w.t[j] = w.phi1[j]*w.t[j] + w.sphi2[j]*xi[j]
	}
	blas64.Gemv(blas.NoTrans, 1, v, ozakiVec(w.t), 1, ozakiVec(x))
}

func ozakiVec(s []float64) blas64.Vector { return blas64.Vector{N: len(s), Inc: 1, Data: s} }

// ozakiSeries is the bound on |hλ| below which φ₁ and φ₂ use their Taylor
// series (derived here).
const ozakiSeries = 1e-6

// ozakiPhi1 is φ₁(λ) = (1 − e^{−hλ})/λ, computed as −expm1(−hλ)/λ, with the
// series h(1 − hλ/2 + (hλ)²/6) for |hλ| < 1e-6; φ₁(0) = h.
func ozakiPhi1(h, l float64) float64 {
	x := h * l
	if math.Abs(x) < ozakiSeries {
		return h * (1 - x/2 + x*x/6)
	}
	return -math.Expm1(-x) / l
}

// ozakiPhi2 is φ₂(λ) = (1 − e^{−2hλ})/λ, computed as −expm1(−2hλ)/λ, with
// the series 2h(1 − hλ + (2hλ)²/6) for |hλ| < 1e-6; φ₂(0) = 2h.
func ozakiPhi2(h, l float64) float64 {
	x := h * l
	if math.Abs(x) < ozakiSeries {
		return 2 * h * (1 - x + 4*x*x/6)
	}
	return -math.Expm1(-2*x) / l
}

// ozakiSqrtPhi2 is √φ₂(λ).
func ozakiSqrtPhi2(h, l float64) float64 { return math.Sqrt(ozakiPhi2(h, l)) }

// NewOzaki returns an Ozaki kernel for chains chains in dimension dim with
// step h, started at start (chains×dim values, or dim values shared by
// every chain), drawing its noise from src. It panics on a non-positive or
// non-finite step or a start of the wrong length.
func NewOzaki(dim, chains int, h float64, start []float64, src *rand.PCG) *Ozaki {
	checkOzakiArgs("Ozaki", dim, chains, h)
	k := &Ozaki{dim: dim, chains: chains, h: h, src: src, rng: rand.New(src)}
	k.x = broadcastStart(start, dim, chains)
	k.init()
	return k
}

func (k *Ozaki) init() {
	k.req = Request{Need: NeedGradient | NeedHessian, Rows: k.chains, Points: k.x, Chain: chainIndex(k.chains)}
	k.ws = newOzakiWork(k.dim)
}

func checkOzakiArgs(name string, dim, chains int, h float64) {
	if dim < 1 || chains < 1 {
		panic(fmt.Sprintf("kernels: %s with dim %d, chains %d", name, dim, chains))
	}
	if !(h > 0) || math.IsInf(h, 0) {
		panic(fmt.Sprintf("kernels: %s step %v", name, h))
	}
}

// Dim implements Kernel.
func (k *Ozaki) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *Ozaki) Chains() int { return k.chains }

// Steps implements Kernel.
func (k *Ozaki) Steps() int { return k.steps }

// Step returns the step size h.
func (k *Ozaki) Step() float64 { return k.h }

// EvaluationsPerStep implements Kernel: one point per chain, where both
// the gradient and the Hessian are evaluated.
func (k *Ozaki) EvaluationsPerStep() int { return k.chains }

// Positions implements Kernel.
func (k *Ozaki) Positions() []float64 { return k.x }

// Next implements Kernel: the gradient and the Hessian at every chain's
// current position.
func (k *Ozaki) Next() *Request { return &k.req }

// Tell implements Kernel. Every call completes a step. It panics if the
// answer lacks gradients or Hessians, or if an eigendecomposition fails to
// converge (which needs non-finite values, which callers reject).
func (k *Ozaki) Tell(a *Answer) bool {
	p, n := k.dim, len(k.x)
	if len(a.Grad) < n || len(a.Hessian) < n*p {
		panic(fmt.Sprintf("kernels: Ozaki answer has %d gradient and %d Hessian values, want %d and %d",
			len(a.Grad), len(a.Hessian), n, n*p))
	}
	for c := range k.chains {
		k.ws.factor(a.Hessian[c*p*p:(c+1)*p*p], p, k.h)
		for j := range k.ws.xi {
			k.ws.xi[j] = k.rng.NormFloat64()
		}
		k.ws.move(k.x[c*p:(c+1)*p], a.Grad[c*p:(c+1)*p], k.ws.xi, p)
	}
	k.steps++
	return true
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// step, completed steps, positions and the random stream's state.
func (k *Ozaki) MarshalBinary() ([]byte, error) {
	w := newStateWriter("Ozaki")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("h", k.h)
	w.ints("steps", k.steps)
	w.floats("x", k.x...)
	w.stream("rng", k.src)
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension and number of chains.
func (k *Ozaki) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "Ozaki")
	if err != nil {
		return err
	}
	dim, chains := r.shape()
	h, steps := r.float("h"), r.integer("steps")
	x := r.floats("x", dim*chains)
	src := r.stream("rng")
	if err := r.check(positive(h) && steps >= 0, "step or step count"); err != nil {
		return err
	}
	*k = Ozaki{dim: dim, chains: chains, h: h, steps: steps, x: x, src: src, rng: rand.New(src)}
	k.init()
	return nil
}

// OzakiKrylov takes the step of Ozaki (Ozaki 1992) for large p, built
// from Hessian-vector products instead of whole Hessians. Per chain
// it needs two matrix functions of H = −∇²log π applied to one vector each,
//
//	u₁ = φ₁(H)·∇log π(θ)      (the mean is θ + u₁)
//	u₂ = √φ₂(H)·ξ,  ξ ~ N(0, I_p)   (the noise; Cov u₂ = φ₂(H))
//	θ' = θ + u₁ + u₂
//
// and approximates each by the Lanczos method with full
// reorthogonalisation: with b the vector, the Krylov basis V_m and the
// tridiagonal T_m = V_mᵀHV_m,
//
//	f(H)·b ≈ y_m = ‖b‖·V_m·f(T_m)·e₁   (T_m diagonalised by dsyev).
//
// Accuracy. After iteration m ≥ 3 the error of y_m relative to ‖y_m‖ is
// estimated from the successive differences d_m = ‖y_m − y_{m−1}‖ as the
// tail of a geometric series, est_m = d_m / (1 − ρ_m) with
// ρ_m = d_m/d_{m−1} (est_m = +∞ while ρ_m ≥ 1), which bounds the error of
// y_{m−1} when the error falls geometrically and so overstates that of the
// y_m returned. Iteration stops when est_m < tol, when the Krylov space is
// invariant (β_m ≤ 1e-12·‖T_m‖, or m = p: then y_m is exact up to
// rounding and its estimate is recorded as 0), or at maxIter iterations
// (the step is then taken with est_m ≥ tol; LastStep counts such
// vectors). The estimate is a heuristic, not a bound.
//
// Requests. A step first asks, for every chain, the gradient at θ and the
// Hessian-vector product with ξ/‖ξ‖ (one request, Rows = chains,
// Need = NeedGradient|NeedHessianVector); then it asks one Hessian-vector
// product per unfinished Lanczos process (up to two rows per chain, each
// row at its chain's θ, Need = NeedHessianVector) until every process has
// stopped. A step therefore takes at most 1 + maxIter requests and
// 2·chains·maxIter rows; answers need room for 2·chains rows
// (Answer.Reserve). Each row counts as one evaluation. The normals ξ for a step are drawn when the previous
// step completes (or at construction), chain by chain.
type OzakiKrylov struct {
	dim, chains int
	h, tol      float64
	maxIter     int
	steps       int
	first       bool      // the pending request is a step's first
	x           []float64 // chains×dim current positions
	xi          []float64 // chains×dim normals of the current step
	procs       []ozakiLanczos
	rowProc     []int // the process each row of the pending request feeds
	req         Request
	src         *rand.PCG
	rng         *rand.Rand
	last        KrylovStats
	rows        int // rows requested so far in the current step
	// scratch for the functions of T_m
	tv, tlam, twork, ty []float64
	tcap                int // T_m fits tv for m ≤ tcap
}

// KrylovStats describes the Lanczos approximations of one Ozaki step.
type KrylovStats struct {
	// MaxIterations is the most Lanczos iterations any vector needed.
	MaxIterations int
	// MaxEstimate is the largest relative error estimate at which a
	// vector's iteration stopped.
	MaxEstimate float64
	// Unconverged is the number of vectors that stopped at the iteration
	// limit with an estimate at or above the tolerance.
	Unconverged int
	// Rows is the number of points evaluated in the step.
	Rows int
}

// ozakiLanczos is one Lanczos process: f(H)·b for one chain and one b.
type ozakiLanczos struct {
	sqrtPhi2 bool // f = √φ₂ (noise) rather than φ₁ (mean)
	m        int  // completed iterations
	done     bool
	norm     float64   // ‖b‖
	est      float64   // last relative error estimate
	d        float64   // last successive difference (relative)
	basis    []float64 // v_1 … v_{m+1}, dim values each, grown on demand
	alpha    []float64 // maxIter
	beta     []float64 // maxIter
	y        []float64 // f(T_m)e₁, maxIter
}

// NewOzakiKrylov returns an Ozaki kernel that uses Hessian-vector products,
// for chains chains in dimension dim with step h, started at start
// (chains×dim values, or dim values shared by every chain), stopping each
// Lanczos process when its relative error estimate falls below tol or
// after maxIter iterations (at most dim are ever used), drawing its noise
// from src. It panics on a non-positive or non-finite step, a tolerance
// outside (0, 1), maxIter < 1, or a start of the wrong length. Its memory
// is about 2·chains·(maxIter+1)·dim values.
func NewOzakiKrylov(dim, chains int, h float64, start []float64, tol float64, maxIter int, src *rand.PCG) *OzakiKrylov {
	checkOzakiArgs("OzakiKrylov", dim, chains, h)
	if !(tol > 0 && tol < 1) {
		panic(fmt.Sprintf("kernels: OzakiKrylov tolerance %v", tol))
	}
	if maxIter < 1 {
		panic(fmt.Sprintf("kernels: OzakiKrylov iteration limit %d", maxIter))
	}
	k := &OzakiKrylov{dim: dim, chains: chains, h: h, tol: tol, maxIter: min(maxIter, dim), src: src, rng: rand.New(src)}
	k.x = broadcastStart(start, dim, chains)
	k.alloc()
	k.drawNoise()
	k.buildRequest()
	return k
}

func (k *OzakiKrylov) alloc() {
	p, m := k.dim, k.maxIter
	k.xi = make([]float64, k.chains*p)
	k.procs = make([]ozakiLanczos, 2*k.chains)
	for i := range k.procs {
		k.procs[i] = ozakiLanczos{
			sqrtPhi2: i%2 == 1, basis: make([]float64, p),
			alpha: make([]float64, m), beta: make([]float64, m), y: make([]float64, m),
		}
	}
	k.rowProc = make([]int, 2*k.chains)
	k.req = Request{Points: make([]float64, 2*k.chains*p), Chain: make([]int, 2*k.chains),
		Vectors: make([]float64, 2*k.chains*p)}
	k.tlam, k.ty = make([]float64, m), make([]float64, m)
}

// growT makes room for the eigendecomposition of an m×m Lanczos matrix.
// The room only grows, so a warmed-up kernel allocates nothing here.
func (k *OzakiKrylov) growT(m int) {
	if m <= k.tcap {
		return
	}
	n := min(max(m, 2*k.tcap), k.maxIter)
	k.tv = make([]float64, n*n)
	q := []float64{0}
	lapack64.Syev(lapack.EVCompute, blas64.Symmetric{N: n, Stride: n, Data: k.tv, Uplo: blas.Upper}, k.tlam[:n], q, -1)
	k.twork = make([]float64, int(q[0]))
	k.tcap = n
}

// growBasis makes room for n basis vectors, keeping those stored. The
// bases grow with the iterations actually used and never shrink.
func (l *ozakiLanczos) growBasis(n, p int) {
	if cap(l.basis) < n*p {
		nb := make([]float64, n*p, 2*n*p)
		copy(nb, l.basis)
		l.basis = nb
	}
	l.basis = l.basis[:n*p]
}

// drawNoise draws the next step's normals and starts every process: the
// noise processes at ξ/‖ξ‖, the mean processes waiting for the gradient.
func (k *OzakiKrylov) drawNoise() {
	p := k.dim
	for i := range k.xi {
		k.xi[i] = k.rng.NormFloat64()
	}
	for c := range k.chains {
		k.procs[2*c].reset()
		k.procs[2*c+1].start(k.xi[c*p : (c+1)*p])
	}
	k.first = true
	k.rows = 0
}

func (l *ozakiLanczos) reset() {
	l.m, l.done, l.norm, l.est, l.d = 0, false, 0, math.Inf(1), math.Inf(1)
}

// start sets v_1 = b/‖b‖; a zero b needs no iteration (f(H)·0 = 0).
func (l *ozakiLanczos) start(b []float64) {
	l.reset()
	l.growBasis(1, len(b))
	l.norm = floats.Norm(b, 2)
	if l.norm == 0 {
		l.done, l.est = true, 0
		floats.ScaleTo(l.basis, 0, b)
		return
	}
	floats.ScaleTo(l.basis, 1/l.norm, b)
}

// buildRequest lays out the pending request: every chain's gradient and
// first noise product for a step's first request, then one row per
// running process.
func (k *OzakiKrylov) buildRequest() {
	p := k.dim
	if k.first {
		k.req.Need, k.req.Rows = NeedGradient|NeedHessianVector, k.chains
		for c := range k.chains {
			copy(k.req.Points[c*p:(c+1)*p], k.x[c*p:(c+1)*p])
			k.req.Chain[c] = c
			copy(k.req.Vectors[c*p:(c+1)*p], k.procs[2*c+1].basis[:p])
			k.rowProc[c] = 2*c + 1
		}
		return
	}
	rows := 0
	for i := range k.procs {
		l := &k.procs[i]
		if l.done {
			continue
		}
		c := i / 2
		copy(k.req.Points[rows*p:(rows+1)*p], k.x[c*p:(c+1)*p])
		k.req.Chain[rows] = c
		copy(k.req.Vectors[rows*p:(rows+1)*p], l.basis[l.m*p:(l.m+1)*p])
		k.rowProc[rows] = i
		rows++
	}
	k.req.Need, k.req.Rows = NeedHessianVector, rows
}

// Dim implements Kernel.
func (k *OzakiKrylov) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *OzakiKrylov) Chains() int { return k.chains }

// Steps implements Kernel.
func (k *OzakiKrylov) Steps() int { return k.steps }

// Step returns the step size h.
func (k *OzakiKrylov) Step() float64 { return k.h }

// Tolerance returns the relative error tolerance of the Lanczos processes.
func (k *OzakiKrylov) Tolerance() float64 { return k.tol }

// MaxIterations returns the Lanczos iteration limit, at most Dim.
func (k *OzakiKrylov) MaxIterations() int { return k.maxIter }

// LastStep describes the Lanczos approximations of the last completed
// step (the zero value before the first).
func (k *OzakiKrylov) LastStep() KrylovStats { return k.last }

// EvaluationsPerStep implements Kernel. The number of points a step
// evaluates varies with the Lanczos iterations it needs: this is the
// count of the last completed step, or the upper bound 2·chains·maxIter
// before the first.
func (k *OzakiKrylov) EvaluationsPerStep() int {
	if k.steps == 0 {
		return 2 * k.chains * k.maxIter
	}
	return k.last.Rows
}

// Positions implements Kernel.
func (k *OzakiKrylov) Positions() []float64 { return k.x }

// Next implements Kernel.
func (k *OzakiKrylov) Next() *Request { return &k.req }

// Tell implements Kernel. It reports true when the answer completed the
// Lanczos processes of every chain and so a step. It panics if the answer
// lacks the gradients or products asked for.
func (k *OzakiKrylov) Tell(a *Answer) bool {
	p, rows := k.dim, k.req.Rows
	if len(a.HessVec) < rows*p || (k.first && len(a.Grad) < rows*p) {
		panic(fmt.Sprintf("kernels: OzakiKrylov answer has %d gradient and %d product values for %d rows of dim %d",
			len(a.Grad), len(a.HessVec), rows, p))
	}
	if k.first {
		for c := range k.chains {
			k.procs[2*c].start(a.Grad[c*p : (c+1)*p])
		}
	}
	for r := range rows {
		if l := &k.procs[k.rowProc[r]]; !l.done {
			k.iterate(l, a.HessVec[r*p:(r+1)*p])
		}
	}
	k.rows += rows
	k.first = false
	for i := range k.procs {
		if !k.procs[i].done {
			k.buildRequest()
			return false
		}
	}
	k.finish()
	return true
}

// iterate takes one Lanczos iteration of l given hv = ∇²log π·v_{m+1}.
func (k *OzakiKrylov) iterate(l *ozakiLanczos, hv []float64) {
	p := k.dim
	j := l.m // 0-based index of the vector just multiplied
	l.growBasis(j+2, p)
	v := l.basis[j*p : (j+1)*p]
	w := l.basis[(j+1)*p : (j+2)*p] // becomes v_{j+2}
	floats.ScaleTo(w, -1, hv)       // w = H·v with H = −∇²log π
	a := floats.Dot(v, w)
	floats.AddScaled(w, -a, v)
	if j > 0 {
		floats.AddScaled(w, -l.beta[j-1], l.basis[(j-1)*p:j*p])
	}
	for i := 0; i <= j; i++ { // full reorthogonalisation
		u := l.basis[i*p : (i+1)*p]
		floats.AddScaled(w, -floats.Dot(u, w), u)
	}
	b := floats.Norm(w, 2)
	l.alpha[j], l.beta[j] = a, b
	l.m = j + 1
	m := l.m

	prev := l.d
	d := k.applyT(l) // updates l.y, returns ‖y_m − y_{m−1}‖/‖y_m‖
	l.d = d
	var tnorm float64
	for i := range m {
		tnorm = math.Max(tnorm, math.Abs(l.alpha[i])+l.beta[i])
	}
	switch {
	case b <= 1e-12*tnorm || m == p:
		l.done, l.est = true, 0
		return
	case m >= 3 && d < prev:
		l.est = d / (1 - d/prev)
	default:
		l.est = math.Inf(1)
	}
	if l.est < k.tol || m == k.maxIter {
		l.done = true
		return
	}
	floats.Scale(1/b, w)
}

// applyT sets l.y = f(T_m)e₁ and returns the relative change from the
// previous y (padded with a zero); +∞ for m = 1.
func (k *OzakiKrylov) applyT(l *ozakiLanczos) float64 {
	m := l.m
	k.growT(m)
	tv := k.tv[:m*m]
	for i := range tv {
		tv[i] = 0
	}
	for i := range m {
		tv[i*m+i] = l.alpha[i]
		if i+1 < m {
			tv[i*m+i+1] = l.beta[i]
		}
	}
	if !lapack64.Syev(lapack.EVCompute, blas64.Symmetric{N: m, Stride: m, Data: tv, Uplo: blas.Upper},
		k.tlam[:m], k.twork, len(k.twork)) {
		panic("kernels: OzakiKrylov: eigendecomposition of the Lanczos matrix did not converge")
	}
	y := k.ty[:m]
	for i := range y {
		y[i] = 0
	}
	for q := range m {
		var f float64
		if l.sqrtPhi2 {
			f = ozakiSqrtPhi2(k.h, k.tlam[q])
		} else {
			f = ozakiPhi1(k.h, k.tlam[q])
		}
		c := f * tv[q] // f(μ_q)·Q[0][q]
		for i := range m {
			y[i] += tv[i*m+q] * c
		}
	}
	var diff, norm float64
	for i := range m {
		old := 0.0
		if i < m-1 {
			old = l.y[i]
		}
		diff += (y[i] - old) * (y[i] - old)
		norm += y[i] * y[i]
		l.y[i] = y[i]
	}
	if m == 1 {
		return math.Inf(1)
	}
	return math.Sqrt(diff / norm)
}

// finish moves every chain by the two approximations and starts the next
// step.
func (k *OzakiKrylov) finish() {
	p := k.dim
	st := KrylovStats{Rows: k.rows}
	for i := range k.procs {
		l := &k.procs[i]
		x := k.x[(i/2)*p : (i/2+1)*p]
		for q := range l.m {
			floats.AddScaled(x, l.norm*l.y[q], l.basis[q*p:(q+1)*p])
		}
		st.MaxIterations = max(st.MaxIterations, l.m)
		st.MaxEstimate = math.Max(st.MaxEstimate, l.est)
		if l.est >= k.tol {
			st.Unconverged++
		}
	}
	k.last = st
	k.steps++
	k.drawNoise()
	k.buildRequest()
}

// MarshalBinary implements encoding.BinaryMarshaler: the settings, the
// positions, the current step's normals and Lanczos processes (so a state
// taken between two requests of a step resumes it), the last step's
// statistics and the random stream's state.
func (k *OzakiKrylov) MarshalBinary() ([]byte, error) {
	w := newStateWriter("OzakiKrylov")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("h", k.h)
	w.floats("tol", k.tol)
	w.ints("maxiter", k.maxIter)
	w.ints("steps", k.steps)
	w.flag("first", k.first)
	w.ints("rows", k.rows)
	w.ints("laststats", k.last.MaxIterations, k.last.Unconverged, k.last.Rows)
	w.floats("lastestimate", k.last.MaxEstimate)
	w.floats("x", k.x...)
	w.floats("xi", k.xi...)
	for i := range k.procs {
		l := &k.procs[i]
		p := fmt.Sprintf("proc%d.", i)
		w.ints(p+"m", l.m)
		w.flag(p+"done", l.done)
		w.floats(p+"scalars", l.norm, l.est, l.d)
		w.floats(p+"alpha", l.alpha[:l.m]...)
		w.floats(p+"beta", l.beta[:l.m]...)
		w.floats(p+"y", l.y[:l.m]...)
		w.floats(p+"basis", l.basis[:max(l.stored(), 1)*k.dim]...)
	}
	w.stream("rng", k.src)
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including a step in progress.
func (k *OzakiKrylov) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "OzakiKrylov")
	if err != nil {
		return err
	}
	n := &OzakiKrylov{}
	n.dim, n.chains = r.shape()
	n.h, n.tol = r.float("h"), r.float("tol")
	n.maxIter, n.steps = r.integer("maxiter"), r.integer("steps")
	n.first = r.flag("first")
	n.rows = r.integer("rows")
	if s := r.ints("laststats", 3); s != nil {
		n.last = KrylovStats{MaxIterations: s[0], Unconverged: s[1], Rows: s[2], MaxEstimate: r.float("lastestimate")}
	}
	if err := r.check(n.maxIter >= 1 && n.maxIter <= n.dim && positive(n.h) && n.tol > 0 && n.tol < 1 && n.steps >= 0,
		"step, tolerance, iteration limit or step count"); err != nil {
		return err
	}
	n.alloc()
	n.x = r.floats("x", n.dim*n.chains)
	r.fill("xi", n.xi)
	for i := range n.procs {
		l := &n.procs[i]
		p := fmt.Sprintf("proc%d.", i)
		l.m = r.integer(p + "m")
		l.done = r.flag(p + "done")
		if v := r.floats(p+"scalars", 3); v != nil {
			l.norm, l.est, l.d = v[0], v[1], v[2]
		}
		if r.check(l.m >= 0 && l.m <= n.maxIter && (l.done || l.m < n.maxIter), "Lanczos process") != nil {
			break
		}
		l.growBasis(max(l.stored(), 1), n.dim)
		r.fill(p+"alpha", l.alpha[:l.m])
		r.fill(p+"beta", l.beta[:l.m])
		r.fill(p+"y", l.y[:l.m])
		r.fill(p+"basis", l.basis)
	}
	n.src = r.stream("rng")
	if r.err != nil {
		return r.err
	}
	n.rng = rand.New(n.src)
	n.buildRequest()
	*k = *n
	return nil
}

// stored is the number of basis vectors in use: v_1 … v_{m+1} while the
// process runs, v_1 … v_m once done.
func (l *ozakiLanczos) stored() int {
	if l.done {
		return l.m
	}
	return l.m + 1
}
