package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// SVRG is SVRG-LD, Langevin dynamics with stochastic variance-reduced
// gradients (Dubey, Reddi, Póczos, Smola, Xing & Williamson, NeurIPS 2016), over a batch of chains with a constant step h.
//
// Every τ steps (before steps 0, τ, 2τ, ...) each chain sets its anchor
// θ̃_c = θ_c and the kernel asks for the exact full-data gradient there:
// one request of chains rows, Need = NeedGradient|NeedFullData, and Tell
// returns false. Each step then asks for 2·chains rows of minibatch
// gradients (Need = NeedGradient) laid out as every chain's position θ_c
// (rows 0..chains−1), then every chain's anchor θ̃_c (rows
// chains..2·chains−1); row c and row chains+c carry Group = c, so both are
// evaluated on the same minibatch S_c. With ĝ_S the client's minibatch
// score estimate (see SGLD) and g̃_c = ∇log π(θ̃_c), every chain moves by
//
//	ĝ(θ_c) = g̃_c + ĝ_S(θ_c) − ĝ_S(θ̃_c)
//	θ_c ← θ_c + h·ĝ(θ_c) + √(2h)·ξ_c,   ξ_c ~ N(0, I_p)
//
// and Tell returns true. The estimator is unbiased for any anchor; its
// variance grows like ‖θ_c − θ̃_c‖², which the anchor refresh keeps
// bounded. Over T steps the kernel asks 2·chains·T minibatch rows and
// chains·⌈T/τ⌉ full-data rows. The noise is drawn chain by chain,
// coordinate by coordinate, from the injected stream, only in sampling
// steps.
type SVRG struct {
	dim, chains int
	h           float64
	every       int // τ
	steps       int
	since       int // sampling steps since the last anchor; every means an anchor is due
	// pts holds the sampling request's points: positions (the first
	// chains×dim values, which Positions and the anchor request use),
	// then the anchors.
	pts                  []float64
	x, anchor            []float64
	anchorG              []float64 // chains×dim full-data gradients at the anchors
	reqAnchor, reqSample Request
	noise                sgldNoise
	pc                   precond
}

var (
	_ Kernel     = (*SVRG)(nil)
	_ Preparer   = (*SVRG)(nil)
	_ MetricUser = (*SVRG)(nil)
)

// SetMetric implements MetricUser: from the next sampling step every
// chain moves by θ ← θ + h·C·ĝ(θ) + √(2h)·L·ξ.
func (k *SVRG) SetMetric(m *Metric) { k.pc.set("SVRG", m, k.dim, 3*k.dim) }

// Metric implements MetricUser.
func (k *SVRG) Metric() *Metric { return orIdentity(k.pc.metric, k.dim) }

// NewSVRG returns an SVRG kernel for chains chains in dimension dim with
// constant step h, refreshing the anchors every every steps (τ ≥ 1),
// started at start (chains×dim values, or dim values shared by every
// chain), drawing its noise from src. Its first request is the anchor
// request at the start. It panics on a non-positive or non-finite h, τ < 1
// or a start of the wrong length.
func NewSVRG(dim, chains int, h float64, every int, start []float64, src *rand.PCG) *SVRG {
	if dim < 1 || chains < 1 {
		panic(fmt.Sprintf("kernels: SVRG with dim %d, chains %d", dim, chains))
	}
	if !positive(h) || every < 1 {
		panic(fmt.Sprintf("kernels: SVRG step %v, anchor every %d steps", h, every))
	}
	k := &SVRG{dim: dim, chains: chains, h: h, every: every, since: every}
	k.alloc()
	copy(k.x, broadcastStart(start, dim, chains))
	k.noise.init(src, len(k.x))
	return k
}

// alloc makes the arrays and requests for the kernel's dim and chains.
func (k *SVRG) alloc() {
	n := k.dim * k.chains
	k.pts = make([]float64, 2*n)
	k.x, k.anchor = k.pts[:n], k.pts[n:]
	k.anchorG = make([]float64, n)
	idx := make([]int, 2*k.chains)
	for c := range k.chains {
		idx[c], idx[k.chains+c] = c, c
	}
	k.reqAnchor = Request{Need: NeedGradient | NeedFullData, Rows: k.chains, Points: k.x, Chain: idx[:k.chains]}
	k.reqSample = Request{Need: NeedGradient, Rows: 2 * k.chains, Points: k.pts, Chain: idx, Group: idx}
}

// Dim implements Kernel.
func (k *SVRG) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *SVRG) Chains() int { return k.chains }

// Steps implements Kernel.
func (k *SVRG) Steps() int { return k.steps }

// Step returns the step size h.
func (k *SVRG) Step() float64 { return k.h }

// SetStep changes the step size from the next Tell. It panics on a
// non-positive or non-finite h.
func (k *SVRG) SetStep(h float64) {
	if !positive(h) {
		panic(fmt.Sprintf("kernels: SVRG step %v", h))
	}
	k.h = h
}

// AnchorEvery returns τ, the steps between anchor refreshes.
func (k *SVRG) AnchorEvery() int { return k.every }

// Anchoring reports the phase: true when the next request is the
// full-data request at new anchors.
func (k *SVRG) Anchoring() bool { return k.since >= k.every }

// Anchors returns the anchors θ̃_c of every chain, Chains×Dim values
// (zeros until the first anchor request is answered). The slice belongs
// to the kernel.
func (k *SVRG) Anchors() []float64 { return k.anchor }

// EvaluationsPerStep implements Kernel: two minibatch gradients per chain
// per step; on top of these, every τ steps, one full-data gradient per
// chain (chains·⌈T/τ⌉ full-data rows over T steps).
func (k *SVRG) EvaluationsPerStep() int { return 2 * k.chains }

// Positions implements Kernel.
func (k *SVRG) Positions() []float64 { return k.x }

// Next implements Kernel: the full-data gradients at every chain's
// position when an anchor is due, else the sampling rows (positions, then
// anchors, grouped by chain).
func (k *SVRG) Next() *Request {
	if k.Anchoring() {
		return &k.reqAnchor
	}
	return &k.reqSample
}

// Prepare implements Preparer: before a sampling step it draws the step's
// noise; before an anchor request it does nothing.
func (k *SVRG) Prepare() {
	if !k.Anchoring() {
		k.noise.prepare()
	}
}

// Tell implements Kernel. An anchor answer sets the anchors and returns
// false; a sampling answer completes a step and returns true.
func (k *SVRG) Tell(a *Answer) bool {
	n := len(k.x)
	if k.Anchoring() {
		if len(a.Grad) < n {
			panic(fmt.Sprintf("kernels: SVRG anchor answer has %d gradient values, want %d", len(a.Grad), n))
		}
		copy(k.anchor, k.x)
		copy(k.anchorG, a.Grad[:n])
		k.since = 0
		return false
	}
	if len(a.Grad) < 2*n {
		panic(fmt.Sprintf("kernels: SVRG answer has %d gradient values, want %d", len(a.Grad), 2*n))
	}
	h := k.h
	s := math.Sqrt(2 * h)
	g, ga, z := a.Grad[:n], a.Grad[n:2*n], k.noise.draw()
	if m := k.pc.metric; m != nil {
		p := k.dim
		est := k.pc.tmp[2*p : 3*p]
		for c := range k.chains {
			lo, hi := c*p, (c+1)*p
			for j := range est {
				est[j] = sgldcvEstimate(k.anchorG[lo+j], g[lo+j], ga[lo+j])
			}
			m.move(k.x[lo:hi], est, z[lo:hi], h, s, k.pc.tmp)
		}
		k.since++
		k.steps++
		return true
	}
	for i := range k.x {
		k.x[i] += h*sgldcvEstimate(k.anchorG[i], g[i], ga[i]) + s*z[i]
	}
	k.since++
	k.steps++
	return true
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// step, τ, completed steps, steps since the last anchor, positions,
// anchors, the full-data gradients at the anchors and the random stream's
// state (before any noise drawn ahead by Prepare).
func (k *SVRG) MarshalBinary() ([]byte, error) {
	w := newStateWriter("SVRG")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("h", k.h)
	w.ints("every", k.every)
	w.ints("steps", k.steps)
	w.ints("since", k.since)
	w.floats("x", k.x...)
	w.floats("anchor", k.anchor...)
	w.floats("anchorgrad", k.anchorG...)
	writeMetric(w, "metric", k.pc.metric)
	w.stream("rng", k.noise.saved())
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension, number of chains and phase.
func (k *SVRG) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "SVRG")
	if err != nil {
		return err
	}
	dim, chains := r.shape()
	m := SVRG{dim: dim, chains: chains, h: r.float("h"), every: r.integer("every"), steps: r.integer("steps"), since: r.integer("since")}
	if err := r.check(positive(m.h) && m.every >= 1 && m.steps >= 0 && m.since >= 0 && m.since <= m.every,
		"step, anchor interval or counts"); err != nil {
		return err
	}
	m.alloc()
	r.fill("x", m.x)
	r.fill("anchor", m.anchor)
	r.fill("anchorgrad", m.anchorG)
	metric := readMetric(r, "metric", dim)
	src := r.stream("rng")
	if r.err != nil {
		return r.err
	}
	m.noise.init(src, len(m.x))
	m.SetMetric(metric)
	*k = m
	return nil
}
