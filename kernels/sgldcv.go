package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// SGLDCV is SGLD with a control variate at a fixed point θ̂ (Baker,
// Fearnhead, Fox & Nemeth, Statistics and Computing 2019)
// over a batch of chains, with a constant step h. It runs in two phases.
//
// Search. Starting from the mean of the chains' start points, gradient
// ascent on log π with exact full-data gradients finds θ̂ ≈ argmax π. Each
// request is one point (Need = NeedGradient|NeedFullData, Rows = 1,
// attributed to chain 0); Tell returns false and the chains stay put. With
// g_k = ∇log π(θ_k) the iteration is
//
//	θ_{k+1} = θ_k + α_k·g_k
//	α_0 = h,   α_k = ‖s‖²/⟨s, y⟩  (BB1; s = θ_k − θ_{k−1}, y = ∇f(θ_k) − ∇f(θ_{k−1}) = g_{k−1} − g_k)
//
// (Barzilai & Borwein 1988; derived here: 1/α_k is the Rayleigh quotient
// r_in of the averaged Hessian of f along s, so α_k is a curvature-matched
// step). The first step is the sampling step h: the chains are only stable
// if h < 2/M with M the largest curvature of f, and for such h a gradient
// step does not increase f on an M-smooth target, so h is a safe step from
// what the caller already knows, and BB takes over after it. Where
// ⟨s, y⟩ ≤ 0 (no curvature information, or non-convexity) the step falls
// back to h. The search stops when ‖g_k‖ ≤ Tol·‖g_0‖ or after MaxIter
// steps; θ̂ is then the visited point with the smallest ‖g_k‖ (the last one
// when the tolerance was met) and g(θ̂) its exact full-data gradient. It
// costs Iterations()+1 full-data evaluations of one point each. Any θ̂
// leaves the estimator below unbiased; a poor θ̂ only raises its variance,
// which grows like ‖θ − θ̂‖².
//
// Sampling. Each step asks for 2·chains rows, minibatch gradients (Need =
// NeedGradient) laid out as every chain's position θ_c (rows 0..chains−1),
// then θ̂ once per chain (rows chains..2·chains−1); row c and row chains+c
// carry Group = c, so both are evaluated on the same minibatch S_c. With
// ĝ_S the client's minibatch score estimate (see SGLD), every chain moves by
//
//	ĝ_CV(θ_c) = g(θ̂) + ĝ_S(θ_c) − ĝ_S(θ̂)
//	θ_c ← θ_c + h·ĝ_CV(θ_c) + √(2h)·ξ_c,   ξ_c ~ N(0, I_p)
//
// and Tell returns true. The noise is drawn chain by chain, coordinate by
// coordinate, from the injected stream, only in sampling steps.
type SGLDCV struct {
	dim, chains int
	h           float64
	tol         float64
	maxIter     int
	steps       int
	sampling    bool
	converged   bool
	iter        int // search steps taken
	// pts holds the sampling request's points: the chains' positions
	// (the first chains×dim values, which Positions returns), then θ̂ once
	// per chain.
	pts []float64
	x   []float64 // pts[:chains×dim]
	// Search state: the iterate to evaluate next, the last evaluated one
	// and its full gradient, ‖g_0‖, the best point so far and the
	// gradient there. After the search, best and bestG are θ̂ and g(θ̂).
	theta, prev, prevG   []float64
	best, bestG          []float64
	g0Norm, bestNorm     float64
	reqSearch, reqSample Request
	noise                sgldNoise
	pc                   precond
}

var (
	_ Kernel     = (*SGLDCV)(nil)
	_ Preparer   = (*SGLDCV)(nil)
	_ MetricUser = (*SGLDCV)(nil)
)

// SetMetric implements MetricUser: from the next sampling step every
// chain moves by θ ← θ + h·C·ĝ_CV(θ) + √(2h)·L·ξ. The fixed-point search
// is not preconditioned.
func (k *SGLDCV) SetMetric(m *Metric) { k.pc.set("SGLDCV", m, k.dim, 3*k.dim) }

// Metric implements MetricUser.
func (k *SGLDCV) Metric() *Metric { return orIdentity(k.pc.metric, k.dim) }

// SGLDCVOptions are the settings of the fixed-point search. The zero value
// gives the defaults.
type SGLDCVOptions struct {
	// Tol is the relative gradient tolerance: the search stops once
	// ‖∇log π(θ_k)‖ ≤ Tol·‖∇log π(θ_0)‖. Zero means 1e-6. On an
	// m-strongly log-concave, M-smooth target this puts θ̂ within
	// Tol·(M/m)·‖θ_0 − θ*‖ of the mode θ*, far inside the posterior's
	// spread for any start in its bulk.
	Tol float64
	// MaxIter is the most search steps, each one more full-data
	// gradient. Zero means 100.
	MaxIter int
}

const (
	sgldcvDefaultTol     = 1e-6
	sgldcvDefaultMaxIter = 100
)

// NewSGLDCV returns an SGLDCV kernel for chains chains in dimension dim
// with constant step h, search options opt, started at start (chains×dim
// values, or dim values shared by every chain), drawing its noise from
// src. It panics on a non-positive or non-finite h, a negative or
// non-finite Tol, a negative MaxIter, or a start of the wrong length.
func NewSGLDCV(dim, chains int, h float64, opt SGLDCVOptions, start []float64, src *rand.PCG) *SGLDCV {
	if dim < 1 || chains < 1 {
		panic(fmt.Sprintf("kernels: SGLDCV with dim %d, chains %d", dim, chains))
	}
	if opt.Tol == 0 {
		opt.Tol = sgldcvDefaultTol
	}
	if opt.MaxIter == 0 {
		opt.MaxIter = sgldcvDefaultMaxIter
	}
	if !positive(h) || !positive(opt.Tol) || opt.MaxIter < 0 {
		panic(fmt.Sprintf("kernels: SGLDCV step %v, options %+v", h, opt))
	}
	k := &SGLDCV{dim: dim, chains: chains, h: h, tol: opt.Tol, maxIter: opt.MaxIter}
	k.alloc()
	copy(k.x, broadcastStart(start, dim, chains))
	for c := range chains {
		for j, v := range k.x[c*dim : (c+1)*dim] {
			k.theta[j] += v
		}
	}
	for j := range k.theta {
		k.theta[j] /= float64(chains)
	}
	k.noise.init(src, len(k.x))
	k.requests()
	return k
}

// alloc makes the kernel's arrays for its dim and chains.
func (k *SGLDCV) alloc() {
	n, p := k.dim*k.chains, k.dim
	k.pts = make([]float64, 2*n)
	k.x = k.pts[:n]
	k.theta, k.prev, k.prevG = make([]float64, p), make([]float64, p), make([]float64, p)
	k.best, k.bestG = make([]float64, p), make([]float64, p)
}

// requests builds the two requests over the kernel's arrays.
func (k *SGLDCV) requests() {
	k.reqSearch = Request{Need: NeedGradient | NeedFullData, Rows: 1, Points: k.theta, Chain: []int{0}}
	idx := make([]int, 2*k.chains)
	for c := range k.chains {
		idx[c], idx[k.chains+c] = c, c
	}
	k.reqSample = Request{Need: NeedGradient, Rows: 2 * k.chains, Points: k.pts, Chain: idx, Group: idx}
}

// Dim implements Kernel.
func (k *SGLDCV) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *SGLDCV) Chains() int { return k.chains }

// Steps implements Kernel: completed sampling steps.
func (k *SGLDCV) Steps() int { return k.steps }

// Step returns the step size h.
func (k *SGLDCV) Step() float64 { return k.h }

// SetStep changes the step size from the next Tell (and the first trial
// step of a fixed-point search not yet begun). It panics on a non-positive
// or non-finite h.
func (k *SGLDCV) SetStep(h float64) {
	if !positive(h) {
		panic(fmt.Sprintf("kernels: SGLDCV step %v", h))
	}
	k.h = h
}

// Options returns the search settings in use (defaults filled in).
func (k *SGLDCV) Options() SGLDCVOptions { return SGLDCVOptions{Tol: k.tol, MaxIter: k.maxIter} }

// Sampling reports the phase: false while the fixed point is searched
// for, true once the chains sample.
func (k *SGLDCV) Sampling() bool { return k.sampling }

// Iterations returns the search steps taken so far; the search has cost
// Iterations()+1 full-data evaluations once it is over.
func (k *SGLDCV) Iterations() int { return k.iter }

// Converged reports whether the search met its tolerance (false while it
// runs, or when it stopped at MaxIter).
func (k *SGLDCV) Converged() bool { return k.converged }

// FixedPoint returns θ̂ and the exact gradient of log π there once the
// search is over (nil, nil before). The slices belong to the kernel.
func (k *SGLDCV) FixedPoint() (theta, grad []float64) {
	if !k.sampling {
		return nil, nil
	}
	return k.best, k.bestG
}

// EvaluationsPerStep implements Kernel: two minibatch gradients per chain
// per sampling step (the search's Iterations()+1 full-data points come
// once, before the first step).
func (k *SGLDCV) EvaluationsPerStep() int { return 2 * k.chains }

// Positions implements Kernel. During the search the chains are at their
// start.
func (k *SGLDCV) Positions() []float64 { return k.x }

// Next implements Kernel: one search point with a full-data gradient, or
// the sampling rows (positions, then θ̂ per chain, grouped by chain).
func (k *SGLDCV) Next() *Request {
	if k.sampling {
		return &k.reqSample
	}
	return &k.reqSearch
}

// Prepare implements Preparer: in the sampling phase it draws the next
// step's noise; during the search it does nothing.
func (k *SGLDCV) Prepare() {
	if k.sampling {
		k.noise.prepare()
	}
}

// Tell implements Kernel. During the search it takes one search step and
// returns false; in the sampling phase it completes a step and returns
// true.
func (k *SGLDCV) Tell(a *Answer) bool {
	if !k.sampling {
		if len(a.Grad) < k.dim {
			panic(fmt.Sprintf("kernels: SGLDCV search answer has %d gradient values, want %d", len(a.Grad), k.dim))
		}
		k.search(a.Grad[:k.dim])
		return false
	}
	n := len(k.x)
	if len(a.Grad) < 2*n {
		panic(fmt.Sprintf("kernels: SGLDCV answer has %d gradient values, want %d", len(a.Grad), 2*n))
	}
	h := k.h
	s := math.Sqrt(2 * h)
	g, gHat, z := a.Grad[:n], a.Grad[n:2*n], k.noise.draw()
	for c := range k.chains {
		lo, hi := c*k.dim, (c+1)*k.dim
		x, gc, gh, zc := k.x[lo:hi], g[lo:hi], gHat[lo:hi], z[lo:hi]
		if m := k.pc.metric; m != nil {
			est := k.pc.tmp[2*k.dim : 3*k.dim]
			for j := range est {
				est[j] = sgldcvEstimate(k.bestG[j], gc[j], gh[j])
			}
			m.move(x, est, zc, h, s, k.pc.tmp)
			continue
		}
		for j := range x {
			x[j] += h*sgldcvEstimate(k.bestG[j], gc[j], gh[j]) + s*zc[j]
		}
	}
	k.steps++
	return true
}

// sgldcvEstimate is one coordinate of the control-variate score estimate
// ĝ_CV(θ) = g(θ̂) + ĝ_S(θ) − ĝ_S(θ̂) (Baker et al. 2019, written for ∇log π)
// from the exact gradient at the fixed point and the two minibatch
// estimates on the same minibatch. SVRG uses it with its anchors.
func sgldcvEstimate(full, atTheta, atFixed float64) float64 {
	return full + (atTheta - atFixed)
}

// search takes the told full gradient g at the current iterate and either
// ends the search or moves to the next iterate.
func (k *SGLDCV) search(g []float64) {
	norm := sgldNorm(g)
	if k.iter == 0 {
		k.g0Norm = norm
	}
	if k.iter == 0 || norm < k.bestNorm {
		copy(k.best, k.theta)
		copy(k.bestG, g)
		k.bestNorm = norm
	}
	switch {
	case norm <= k.tol*k.g0Norm:
		k.converged = true
		k.startSampling()
		return
	case k.iter >= k.maxIter:
		k.startSampling()
		return
	}
	alpha := k.h
	if k.iter > 0 {
		var ss, sy float64
		for j := range k.theta {
			sj := k.theta[j] - k.prev[j]
			ss += sj * sj
			sy += sj * (k.prevG[j] - g[j]) // y = ∇f(θ_k) − ∇f(θ_{k−1})
		}
		if sy > 0 && ss > 0 {
			alpha = ss / sy
		}
	}
	copy(k.prev, k.theta)
	copy(k.prevG, g)
	for j := range k.theta {
		k.theta[j] += alpha * g[j]
	}
	k.iter++
}

// startSampling fixes θ̂ and fills the sampling request's θ̂ rows.
func (k *SGLDCV) startSampling() {
	n := len(k.x)
	for c := range k.chains {
		copy(k.pts[n+c*k.dim:n+(c+1)*k.dim], k.best)
	}
	k.sampling = true
}

func sgldNorm(v []float64) float64 {
	var s float64
	for _, x := range v {
		s += x * x
	}
	return math.Sqrt(s)
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// step, search options, completed steps, phase, search steps taken,
// whether the search converged, ‖g_0‖ and the best gradient norm, the
// positions, the search's next iterate, its last evaluated iterate and
// gradient, the best point and its gradient (θ̂ and g(θ̂) once sampling),
// and the random stream's state (before any noise drawn ahead by Prepare).
func (k *SGLDCV) MarshalBinary() ([]byte, error) {
	w := newStateWriter("SGLDCV")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("h", k.h)
	w.floats("tol", k.tol)
	w.ints("maxiter", k.maxIter)
	w.ints("steps", k.steps)
	w.flag("sampling", k.sampling)
	w.flag("converged", k.converged)
	w.ints("iter", k.iter)
	w.floats("norms", k.g0Norm, k.bestNorm)
	w.floats("x", k.x...)
	w.floats("theta", k.theta...)
	w.floats("prev", k.prev...)
	w.floats("prevgrad", k.prevG...)
	w.floats("best", k.best...)
	w.floats("bestgrad", k.bestG...)
	writeMetric(w, "metric", k.pc.metric)
	w.stream("rng", k.noise.saved())
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension, number of chains and phase.
func (k *SGLDCV) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "SGLDCV")
	if err != nil {
		return err
	}
	dim, chains := r.shape()
	m := SGLDCV{dim: dim, chains: chains, h: r.float("h"), tol: r.float("tol"), maxIter: r.integer("maxiter"),
		steps: r.integer("steps"), sampling: r.flag("sampling"), converged: r.flag("converged"), iter: r.integer("iter")}
	if v := r.floats("norms", 2); v != nil {
		m.g0Norm, m.bestNorm = v[0], v[1]
	}
	if err := r.check(positive(m.h) && positive(m.tol) && m.maxIter >= 0 && m.steps >= 0 &&
		m.iter >= 0 && m.iter <= m.maxIter && (m.sampling || m.steps == 0), "step, options, counts or phase"); err != nil {
		return err
	}
	m.alloc()
	r.fill("x", m.x)
	r.fill("theta", m.theta)
	r.fill("prev", m.prev)
	r.fill("prevgrad", m.prevG)
	r.fill("best", m.best)
	r.fill("bestgrad", m.bestG)
	metric := readMetric(r, "metric", dim)
	src := r.stream("rng")
	if r.err != nil {
		return r.err
	}
	m.noise.init(src, len(m.x))
	m.SetMetric(metric)
	m.requests()
	if m.sampling {
		m.startSampling()
	}
	*k = m
	return nil
}
