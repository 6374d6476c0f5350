package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// MALA is the Metropolis-adjusted Langevin algorithm over a batch of chains
// (Roberts & Tweedie, Bernoulli 2 (1996)). From x it proposes the LMC move
//
//	y = x + h·∇log π(x) + √(2h)·ξ,   ξ ~ N(0, I_p),   q(y | x) = N(y; x + h∇log π(x), 2h·I)
//	log q(y | x) = −‖y − x − h∇log π(x)‖² / (4h)   (+ const)
//
// and accepts it with probability min{1, e^A},
//
//	A = [log π(y) + log q(x | y)] − [log π(x) + log q(y | x)],
//
// tested in log space (accept when log u < A, u ~ U[0, 1)), so the chains
// leave π exactly invariant. A log density of −∞ or NaN at the proposal
// rejects it.
//
// Requests. The first request asks for the log density and the gradient
// at every chain's start (Need = NeedGradient|NeedLogDensity, Rows =
// chains) and completes no step; every later request asks for them at
// every chain's proposal and completes one step. So a run of n steps
// evaluates chains·(n + 1) points: one per chain per step
// (EvaluationsPerStep) plus the start. The value and gradient at the
// current point are kept, never asked for again.
//
// Step adaptation. One step size h is shared by all chains (they target the
// same π). During the first burnIn steps it is adapted toward the
// acceptance rate 0.574 (the optimal rate for MALA, Roberts & Rosenthal
// 1998) by a Robbins–Monro update on log h after every step
// t = 1, 2, …:
//
//	log h ← log h + t^{−0.6}·(ᾱ_t − 0.574)
//
// where ᾱ_t is the mean over chains of the step's acceptance probabilities
// min{1, e^A} (common practice). After burnIn steps h is frozen, so the
// draws after burn-in come from a fixed π-invariant kernel; callers should
// discard the first burnIn steps.
//
// Randomness. Each step draws first one uniform per chain for the
// acceptance tests, in chain order, then the next proposals' normals chain
// by chain (p per chain, with the adapted h); the first proposals' normals
// are drawn when the start's answer arrives.
type MALA struct {
	dim, chains int
	h           float64
	burnIn      int
	steps       int
	ready       bool      // the start has been evaluated
	x           []float64 // chains×dim current positions
	lpx         []float64 // log π at x
	gx          []float64 // ∇log π at x, chains×dim
	y           []float64 // chains×dim proposals
	accepted    []int     // acceptances per chain in the current phase
	proposed    int       // steps in the current phase
	req         Request
	src         *rand.PCG
	rng         *rand.Rand
	metric      *Metric // of the pending proposals; nil: the identity
	pending     *Metric // set by SetMetric, used from the next proposal
	pendingSet  bool
	tmp         []float64 // 2·dim scratch for a metric
	pendingH    float64   // set by SetStep once proposals are out; 0: none
}

var (
	_ Kernel     = (*MALA)(nil)
	_ Scorer     = (*MALA)(nil)
	_ MetricUser = (*MALA)(nil)
)

// SetMetric implements MetricUser. With C = L·Lᵀ the proposal becomes
//
//	y = x + h·C·∇log π(x) + √(2h)·L·ξ,   q(y | x) = N(y; x + hC∇log π(x), 2h·C),
//	log q(y | x) = −‖L⁻¹(y − x − hC∇log π(x))‖² / (4h)   (+ a constant free of x, y),
//
// and the acceptance uses that ratio, so the chains leave π exactly
// invariant for any fixed C (Roberts and Stramer, Methodology and
// Computing in Applied Probability 4 (2002)). The proposals already drawn
// for the pending request keep the old metric, and so does the density
// ratio that accepts or rejects them; the new metric applies from the
// next proposal. Set it only while h is frozen if the chains' law after
// burn-in must be exact: a metric changed during burn-in is like a step
// size adapted then.
func (k *MALA) SetMetric(m *Metric) {
	k.pending = checkMetric("MALA", m, k.dim)
	k.pendingSet = true
	if k.pending != nil && k.tmp == nil {
		k.tmp = make([]float64, 2*k.dim)
	}
	if !k.ready {
		k.metric, k.pendingSet = k.pending, false
	}
}

// Metric implements MetricUser: the metric of the next proposal.
func (k *MALA) Metric() *Metric {
	if k.pendingSet {
		return orIdentity(k.pending, k.dim)
	}
	return orIdentity(k.metric, k.dim)
}

// malaTarget is the acceptance rate the step adaptation aims at
// (Roberts & Rosenthal 1998).
const malaTarget = 0.574

// NewMALA returns a MALA kernel for chains chains in dimension dim with
// initial step h, adapted during the first burnIn steps and frozen after
// (burnIn = 0: never adapted), started at start (chains×dim values, or dim
// values shared by every chain), drawing its randomness from src. It
// panics on a non-positive or non-finite step, a negative burnIn or a
// start of the wrong length.
func NewMALA(dim, chains int, h float64, burnIn int, start []float64, src *rand.PCG) *MALA {
	if dim < 1 || chains < 1 {
		panic(fmt.Sprintf("kernels: MALA with dim %d, chains %d", dim, chains))
	}
	if !(h > 0) || math.IsInf(h, 0) {
		panic(fmt.Sprintf("kernels: MALA step %v", h))
	}
	if burnIn < 0 {
		panic(fmt.Sprintf("kernels: MALA burn-in %d", burnIn))
	}
	k := &MALA{dim: dim, chains: chains, h: h, burnIn: burnIn, src: src, rng: rand.New(src)}
	k.x = broadcastStart(start, dim, chains)
	k.alloc()
	k.buildRequest()
	return k
}

func (k *MALA) alloc() {
	n := k.dim * k.chains
	k.lpx, k.gx, k.y = make([]float64, k.chains), make([]float64, n), make([]float64, n)
	k.accepted = make([]int, k.chains)
}

func (k *MALA) buildRequest() {
	pts := k.y
	if !k.ready {
		pts = k.x
	}
	k.req = Request{Need: NeedGradient | NeedLogDensity, Rows: k.chains, Points: pts, Chain: chainIndex(k.chains)}
}

// Dim implements Kernel.
func (k *MALA) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *MALA) Chains() int { return k.chains }

// Steps implements Kernel: completed accept/reject steps per chain.
func (k *MALA) Steps() int { return k.steps }

// Step returns the current step size h (frozen once Adapting is false).
func (k *MALA) Step() float64 {
	if k.pendingH > 0 {
		return k.pendingH
	}
	return k.h
}

// SetStep sets the step size of the next proposal. Before the start is
// evaluated it applies at once; after, the proposals already out keep
// the old step (and so does the density ratio that accepts them), and
// the new one replaces whatever the acceptance-rate adaptation makes of
// it at the next proposal, from which the adaptation goes on. It panics
// on a non-positive or non-finite h.
func (k *MALA) SetStep(h float64) {
	if !positive(h) {
		panic(fmt.Sprintf("kernels: MALA step %v", h))
	}
	if !k.ready {
		k.h = h
		return
	}
	k.pendingH = h
}

// Scores implements Scorer: ∇log π at the current positions, kept from
// the accepted points.
func (k *MALA) Scores() []float64 { return k.gx }

// BurnIn returns the number of steps during which h is adapted.
func (k *MALA) BurnIn() int { return k.burnIn }

// Adapting reports whether the step size is still being adapted, that is
// whether fewer than BurnIn steps have been completed.
func (k *MALA) Adapting() bool { return k.steps < k.burnIn }

// AcceptanceRates returns, per chain, the fraction of accepted proposals
// in the current phase: the burn-in steps so far while Adapting, the steps
// since burn-in after. It is NaN for a phase with no step yet.
func (k *MALA) AcceptanceRates() []float64 {
	out := make([]float64, k.chains)
	for c, a := range k.accepted {
		out[c] = float64(a) / float64(k.proposed)
	}
	return out
}

// EvaluationsPerStep implements Kernel: one point (log density and
// gradient) per chain; the start costs one more point per chain, once.
func (k *MALA) EvaluationsPerStep() int { return k.chains }

// Positions implements Kernel.
func (k *MALA) Positions() []float64 { return k.x }

// Next implements Kernel: the log density and gradient at every chain's
// start, then at every chain's proposal.
func (k *MALA) Next() *Request { return &k.req }

// Tell implements Kernel. The first call takes the values at the start and
// completes no step; every later call completes one. It panics if the
// answer lacks gradients or log densities.
func (k *MALA) Tell(a *Answer) bool {
	n := len(k.x)
	if len(a.Grad) < n || len(a.LogDensity) < k.chains {
		panic(fmt.Sprintf("kernels: MALA answer has %d gradient and %d log-density values, want %d and %d",
			len(a.Grad), len(a.LogDensity), n, k.chains))
	}
	if !k.ready {
		copy(k.gx, a.Grad[:n])
		copy(k.lpx, a.LogDensity[:k.chains])
		k.ready = true
		k.propose()
		k.buildRequest()
		return false
	}
	p := k.dim
	var sumAlpha float64
	for c := range k.chains {
		lo, hi := c*p, (c+1)*p
		var la float64
		if k.metric == nil {
			la = malaLogAccept(k.x[lo:hi], k.y[lo:hi], k.lpx[c], a.LogDensity[c], k.gx[lo:hi], a.Grad[lo:hi], k.h)
		} else {
			la = malaLogAcceptMetric(k.x[lo:hi], k.y[lo:hi], k.lpx[c], a.LogDensity[c], k.gx[lo:hi], a.Grad[lo:hi], k.h, k.metric, k.tmp)
		}
		if la >= 0 {
			sumAlpha++
		} else if la > math.Inf(-1) { // NaN and −∞ count as 0
			sumAlpha += math.Exp(la)
		}
		if u := k.rng.Float64(); math.Log(u) < la {
			copy(k.x[lo:hi], k.y[lo:hi])
			copy(k.gx[lo:hi], a.Grad[lo:hi])
			k.lpx[c] = a.LogDensity[c]
			k.accepted[c]++
		}
	}
	k.steps++
	k.proposed++
	if k.steps <= k.burnIn {
		k.h *= math.Exp(math.Pow(float64(k.steps), -0.6) * (sumAlpha/float64(k.chains) - malaTarget))
		if k.steps == k.burnIn {
			k.proposed = 0
			for c := range k.accepted {
				k.accepted[c] = 0
			}
		}
	}
	k.propose()
	return true
}

// propose draws y = x + h·∇log π(x) + √(2h)·ξ for every chain (with a
// metric, y = x + h·C·∇log π(x) + √(2h)·L·ξ), taking up a metric set since
// the last proposal.
func (k *MALA) propose() {
	if k.pendingSet {
		k.metric, k.pending, k.pendingSet = k.pending, nil, false
	}
	if k.pendingH > 0 {
		k.h, k.pendingH = k.pendingH, 0
	}
	s := math.Sqrt(2 * k.h)
	if k.metric == nil {
		for i := range k.y {
			k.y[i] = k.x[i] + k.h*k.gx[i] + s*k.rng.NormFloat64()
		}
		return
	}
	p := k.dim
	xi, lz := k.tmp[:p], k.tmp[p:2*p]
	for c := range k.chains {
		lo, hi := c*p, (c+1)*p
		for i := range xi {
			xi[i] = k.rng.NormFloat64()
		}
		k.metric.ApplyFactor(lz, xi)
		k.metric.Apply(xi, k.gx[lo:hi])
		y, x := k.y[lo:hi], k.x[lo:hi]
		for i := range y {
			y[i] = x[i] + k.h*xi[i] + s*lz[i]
		}
	}
}

// malaLogAcceptMetric is malaLogAccept for the proposal N(x + hC∇log π(x),
// 2hC): the squared norms are ‖L⁻¹r‖² of the residuals r, with tmp (2p
// values) as scratch.
func malaLogAcceptMetric(x, y []float64, lpx, lpy float64, gx, gy []float64, h float64, m *Metric, tmp []float64) float64 {
	p := len(x)
	cg, r := tmp[:p], tmp[p:2*p]
	sq := func(from, to, g []float64) float64 {
		m.Apply(cg, g)
		for i := range r {
			r[i] = to[i] - from[i] - h*cg[i]
		}
		m.SolveFactor(r, r)
		var s float64
		for _, v := range r {
			s += v * v
		}
		return s
	}
	fwd := sq(x, y, gx) // ‖L⁻¹(y − x − hC gx)‖²
	bwd := sq(y, x, gy) // ‖L⁻¹(x − y − hC gy)‖²
	return (lpy - bwd/(4*h)) - (lpx - fwd/(4*h))
}

// malaLogAccept returns the log acceptance ratio A above for a
// move from x to y given log π and ∇log π at both.
func malaLogAccept(x, y []float64, lpx, lpy float64, gx, gy []float64, h float64) float64 {
	var fwd, bwd float64 // ‖y − x − h gx‖², ‖x − y − h gy‖²
	for i := range x {
		f := y[i] - x[i] - h*gx[i]
		b := x[i] - y[i] - h*gy[i]
		fwd += f * f
		bwd += b * b
	}
	return (lpy - bwd/(4*h)) - (lpx - fwd/(4*h))
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// burn-in, completed steps, step size, the phase's acceptance counts, the
// positions with their log densities and gradients, the pending proposals
// and the random stream's state.
func (k *MALA) MarshalBinary() ([]byte, error) {
	w := newStateWriter("MALA")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.ints("burnin", k.burnIn)
	w.ints("steps", k.steps)
	w.floats("h", k.h)
	w.flag("ready", k.ready)
	w.ints("proposed", k.proposed)
	w.ints("accepted", k.accepted...)
	w.floats("x", k.x...)
	w.floats("logpi", k.lpx...)
	w.floats("grad", k.gx...)
	w.floats("y", k.y...)
	writeMetric(w, "metric", k.metric)
	w.flag("pending", k.pendingSet)
	writeMetric(w, "pendingmetric", k.pending)
	if k.pendingH > 0 {
		w.floats("pendingh", k.pendingH)
	}
	w.stream("rng", k.src)
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension and number of chains.
func (k *MALA) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "MALA")
	if err != nil {
		return err
	}
	n := &MALA{}
	n.dim, n.chains = r.shape()
	n.burnIn, n.steps = r.integer("burnin"), r.integer("steps")
	n.h = r.float("h")
	n.ready = r.flag("ready")
	n.proposed = r.integer("proposed")
	if err := r.check(n.burnIn >= 0 && n.steps >= 0 && n.proposed >= 0 && n.proposed <= n.steps && positive(n.h),
		"burn-in, step counts or step size"); err != nil {
		return err
	}
	n.alloc()
	acc := r.ints("accepted", n.chains)
	for c := range acc {
		n.accepted[c] = acc[c]
		if acc[c] < 0 || acc[c] > n.proposed {
			r.fail("acceptance count %d of %d", acc[c], n.proposed)
		}
	}
	n.x = r.floats("x", n.dim*n.chains)
	r.fill("logpi", n.lpx)
	r.fill("grad", n.gx)
	r.fill("y", n.y)
	n.metric = readMetric(r, "metric", n.dim)
	n.pendingSet = r.flag("pending")
	n.pending = readMetric(r, "pendingmetric", n.dim)
	if r.has("pendingh") {
		n.pendingH = r.float("pendingh")
		if !positive(n.pendingH) {
			r.fail("pending step %v", n.pendingH)
		}
	}
	if n.metric != nil || n.pending != nil {
		n.tmp = make([]float64, 2*n.dim)
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
