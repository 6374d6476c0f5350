package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// RejectionMaxDim is the largest dimension Rejection accepts: the
// acceptance rate of a fixed Gaussian envelope falls geometrically with the
// dimension (1.5^−p for N(0, I) under N(0, 1.5²I) with the tight bound), so
// beyond a few dimensions the sampler is useless.
const RejectionMaxDim = 4

// Rejection is a rejection sampler with a Gaussian envelope over a batch of
// chains: each completed step gives every chain a new independent exact
// draw from π. The envelope is the normalised density
//
//	q(y) = N(y; μ, s²I) = (2πs²)^{−p/2}·exp(−‖y − μ‖²/(2s²))
//
// and the caller declares log M, a bound with
//
//	π̃(y) ≤ M·q(y)   for every y,
//
// where π̃ = exp(log π) is the density exactly as the client answers it,
// with whatever additive constant its log π carries (the bound depends on
// that constant). A proposal y ~ q is accepted with probability
//
//	α(y) = π̃(y) / (M·q(y)),   tested as log u < log π̃(y) − log M − log q(y),  u ~ U[0, 1),
//
// so accepted draws are i.i.d. from π, and each proposal is accepted with
// probability Z̃/M, Z̃ = ∫π̃ (the rejection method of von Neumann, 1951;
// reference from memory). For a Gaussian
// target N(0, I) and q = N(0, s²I), s > 1, the tight bound is
// M = s^p·Z̃ (the ratio π/q peaks at 0), giving acceptance s^−p.
//
// Violations. A ratio α(y) above 1 (beyond a relative 10⁻¹², for
// rounding) proves the declared bound wrong, and the draws are then no
// longer exact. The kernel records the first such proposal and keeps
// going; Violation reports it, and the caller should stop.
//
// Requests. Each request asks for log densities (NeedLogDensity) at one
// proposal per chain still waiting for its draw in this step, in chain
// order (Chain names them; Rows = the number of waiting chains). Chains
// whose proposal was accepted wait for the others without rows; Tell
// reports a completed step once every chain has accepted, and Positions
// changes only then (before the first step it holds μ for every chain).
//
// Evaluations. Each chain's step costs a geometric number of points with
// mean M/Z̃. EvaluationsPerStep is the ceiling of MeanEvaluationsPerStep,
// the running average over completed steps and all chains (Chains, the
// least possible, before the first step completes).
//
// Randomness. Each round draws the waiting chains' proposals chain by
// chain (p normals each), then, in Tell, one uniform per proposal in row
// order. The first proposals are drawn by the constructor.
type Rejection struct {
	dim, chains     int
	mean            []float64
	scale, logBound float64
	logNorm         float64 // log of q's normaliser, −(p/2)·log(2πs²)
	steps           int
	proposed        int // all proposals told
	accepted        int
	stepProposed    int       // proposals in completed steps
	waiting         []bool    // per chain: no accepted proposal in this step yet
	left            int       // chains waiting
	x, xn           []float64 // draws of the last step; accepted draws of this one
	y               []float64 // proposals, one row per request row
	rowChain        []int
	viol            *BoundViolation
	req             Request
	src             *rand.PCG
	rng             *rand.Rand
}

// BoundViolation is a proposal at which the client's density exceeded the
// declared envelope: π̃(y) > M·q(y).
type BoundViolation struct {
	// LogRatio is log π̃(y) − log M − log q(y) (> 0).
	LogRatio float64
	// LogBound is the declared log M.
	LogBound float64
	// Chain is the chain that proposed y; Point is y.
	Chain int
	Point []float64
}

func (v *BoundViolation) Error() string {
	return fmt.Sprintf("kernels: rejection envelope bound violated: π̃(y)/(M·q(y)) = %.6g > 1 at chain %d, point %v; "+
		"the declared log bound %v is too small by at least %.6g", math.Exp(v.LogRatio), v.Chain, v.Point, v.LogBound, v.LogRatio)
}

// rejectionSlack is the log of 1 + 10⁻¹², the rounding allowance on α ≤ 1.
var rejectionSlack = math.Log1p(1e-12)

// NewRejection returns a rejection sampler for chains chains in dimension
// dim (1 … RejectionMaxDim) with envelope N(mean, scale²I) and declared
// bound logBound = log M, drawing its randomness from src. It panics on a
// dimension out of range, a mean of the wrong length or not finite, a
// non-positive or non-finite scale or a non-finite bound: callers
// validate data from clients before building a kernel.
func NewRejection(dim, chains int, mean []float64, scale, logBound float64, src *rand.PCG) *Rejection {
	if dim < 1 || dim > RejectionMaxDim || chains < 1 {
		panic(fmt.Sprintf("kernels: rejection with dim %d (1 to %d), chains %d", dim, RejectionMaxDim, chains))
	}
	if len(mean) != dim {
		panic(fmt.Sprintf("kernels: rejection envelope mean has %d values, want %d", len(mean), dim))
	}
	for _, v := range mean {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			panic(fmt.Sprintf("kernels: rejection envelope mean %v", mean))
		}
	}
	if !(scale > 0) || math.IsInf(scale, 0) {
		panic(fmt.Sprintf("kernels: rejection envelope scale %v", scale))
	}
	if math.IsNaN(logBound) || math.IsInf(logBound, 0) {
		panic(fmt.Sprintf("kernels: rejection log bound %v", logBound))
	}
	k := &Rejection{dim: dim, chains: chains, mean: append([]float64(nil), mean...), scale: scale, logBound: logBound,
		src: src, rng: rand.New(src)}
	k.init()
	k.x = broadcastStart(mean, dim, chains)
	for c := range k.waiting {
		k.waiting[c] = true
	}
	k.left = chains
	k.propose()
	return k
}

func (k *Rejection) init() {
	n := k.dim * k.chains
	k.logNorm = -0.5 * float64(k.dim) * math.Log(2*math.Pi*k.scale*k.scale)
	k.waiting = make([]bool, k.chains)
	k.xn, k.y, k.rowChain = make([]float64, n), make([]float64, n), make([]int, k.chains)
}

// propose draws a proposal for every waiting chain, in chain order, and
// lays out the request.
func (k *Rejection) propose() {
	p, n := k.dim, 0
	for c, w := range k.waiting {
		if !w {
			continue
		}
		y := k.y[n*p : (n+1)*p]
		for i := range y {
			y[i] = k.mean[i] + k.scale*k.rng.NormFloat64()
		}
		k.rowChain[n] = c
		n++
	}
	k.buildRequest(n)
}

func (k *Rejection) buildRequest(rows int) {
	k.req = Request{Need: NeedLogDensity, Rows: rows, Points: k.y[:rows*k.dim], Chain: k.rowChain[:rows]}
}

// Dim implements Kernel.
func (k *Rejection) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *Rejection) Chains() int { return k.chains }

// Steps implements Kernel: completed rounds of one exact draw per chain.
func (k *Rejection) Steps() int { return k.steps }

// Positions implements Kernel: the draws of the last completed step (μ
// for every chain before the first).
func (k *Rejection) Positions() []float64 { return k.x }

// Next implements Kernel: log densities at the waiting chains' proposals.
func (k *Rejection) Next() *Request { return &k.req }

// AcceptanceRate returns accepted / proposed over all chains and all
// proposals told so far (NaN before the first). With a valid bound its
// expectation is Z̃/M.
func (k *Rejection) AcceptanceRate() float64 { return float64(k.accepted) / float64(k.proposed) }

// Evaluations returns the number of points evaluated so far (proposals
// told), over all chains.
func (k *Rejection) Evaluations() int { return k.proposed }

// MeanEvaluationsPerStep returns the points evaluated per completed step
// over all chains, averaged over the completed steps (NaN before the
// first).
func (k *Rejection) MeanEvaluationsPerStep() float64 {
	return float64(k.stepProposed) / float64(k.steps)
}

// EvaluationsPerStep implements Kernel. The count is random: this is the
// ceiling of MeanEvaluationsPerStep, or Chains before the first step
// completes.
func (k *Rejection) EvaluationsPerStep() int {
	if k.steps == 0 {
		return k.chains
	}
	return (k.stepProposed + k.steps - 1) / k.steps
}

// Violation returns nil, or a *BoundViolation for the first proposal seen
// with π̃(y) > M·q(y) (beyond a relative 10⁻¹²). Once it is non-nil the
// draws are not exact and the session should fail with it.
func (k *Rejection) Violation() error {
	if k.viol == nil {
		return nil
	}
	return k.viol
}

// Tell implements Kernel: one accept/reject test per proposal. It reports
// a completed step once every chain has an accepted draw. A NaN or −∞ log
// density rejects the proposal. It panics if the answer has fewer log
// densities than the request has rows.
func (k *Rejection) Tell(a *Answer) bool {
	rows, p := k.req.Rows, k.dim
	if len(a.LogDensity) < rows {
		panic(fmt.Sprintf("kernels: rejection answer has %d log-density values, want %d", len(a.LogDensity), rows))
	}
	inv := 1 / (2 * k.scale * k.scale)
	for r, lp := range a.LogDensity[:rows] {
		c, y := k.rowChain[r], k.y[r*p:(r+1)*p]
		var s float64
		for i, v := range y {
			d := v - k.mean[i]
			s += d * d
		}
		lr := lp - k.logBound - (k.logNorm - s*inv)
		if lr > rejectionSlack && k.viol == nil {
			k.viol = &BoundViolation{LogRatio: lr, LogBound: k.logBound, Chain: c, Point: append([]float64(nil), y...)}
		}
		if math.Log(k.rng.Float64()) < lr {
			copy(k.xn[c*p:(c+1)*p], y)
			k.waiting[c] = false
			k.left--
			k.accepted++
		}
	}
	k.proposed += rows
	done := k.left == 0
	if done {
		copy(k.x, k.xn)
		k.steps++
		k.stepProposed = k.proposed
		for c := range k.waiting {
			k.waiting[c] = true
		}
		k.left = k.chains
	}
	k.propose()
	return done
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// envelope and bound, counts, the first violation if any, which chains
// wait, the draws, the accepted draws and pending proposals, and the
// random stream's state. A state taken in the middle of a step resumes it
// exactly.
func (k *Rejection) MarshalBinary() ([]byte, error) {
	w := newStateWriter("Rejection")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("scale", k.scale)
	w.floats("logbound", k.logBound)
	w.ints("counts", k.steps, k.proposed, k.accepted, k.stepProposed)
	if v := k.viol; v != nil {
		w.ints("violchain", v.Chain)
		w.floats("violratio", v.LogRatio)
		w.floats("violpoint", v.Point...)
	}
	waiting := make([]int, k.chains)
	for c, b := range k.waiting {
		if b {
			waiting[c] = 1
		}
	}
	w.ints("waiting", waiting...)
	w.floats("mean", k.mean...)
	w.floats("x", k.x...)
	w.floats("xnext", k.xn...)
	w.floats("y", k.y...)
	w.stream("rng", k.src)
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension and number of chains.
func (k *Rejection) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "Rejection")
	if err != nil {
		return err
	}
	n := &Rejection{}
	n.dim, n.chains = r.shape()
	n.scale, n.logBound = r.float("scale"), r.float("logbound")
	if c := r.ints("counts", 4); c != nil {
		n.steps, n.proposed, n.accepted, n.stepProposed = c[0], c[1], c[2], c[3]
	}
	if err := r.check(n.dim <= RejectionMaxDim && positive(n.scale) && !math.IsNaN(n.logBound) && !math.IsInf(n.logBound, 0) &&
		n.steps >= 0 && n.proposed >= 0 && n.accepted >= 0 && n.accepted <= n.proposed &&
		n.stepProposed >= 0 && n.stepProposed <= n.proposed && n.steps <= n.accepted/n.chains,
		"envelope, bound or counts"); err != nil {
		return err
	}
	if r.has("violchain") {
		c, lr, pt := r.integer("violchain"), r.float("violratio"), r.floats("violpoint", n.dim)
		if r.check(c >= 0 && c < n.chains, "violation chain") == nil {
			n.viol = &BoundViolation{LogRatio: lr, LogBound: n.logBound, Chain: c, Point: pt}
		}
	}
	n.init()
	for c, w := range r.ints("waiting", n.chains) {
		if w != 0 && w != 1 {
			r.fail("waiting flag %d", w)
			break
		}
		n.waiting[c] = w == 1
		if n.waiting[c] {
			n.left++
		}
	}
	if err := r.check(n.left > 0 && n.accepted == n.steps*n.chains+n.chains-n.left, "waiting chains or counts"); err != nil {
		return err
	}
	n.mean = r.floats("mean", n.dim)
	n.x = r.floats("x", n.dim*n.chains)
	r.fill("xnext", n.xn)
	r.fill("y", n.y)
	n.src = r.stream("rng")
	if r.err != nil {
		return r.err
	}
	n.rng = rand.New(n.src)
	rows := 0
	for c, w := range n.waiting {
		if w {
			n.rowChain[rows] = c
			rows++
		}
	}
	n.buildRequest(rows)
	*k = *n
	return nil
}
