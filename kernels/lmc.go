package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// LMC is unadjusted Langevin Monte Carlo (ULA) with a constant step h over
// a batch of chains:
//
//	θ_{k+1} = θ_k + h·∇log π(θ_k) + √(2h)·ξ_{k+1},   ξ_{k+1} ~ N(0, I_p)
//
// Each step asks for one gradient per chain, all chains in one request.
// The noise is drawn chain by chain, coordinate by coordinate, from the
// injected stream, so the draws depend only on the seed and the answers.
type LMC struct {
	dim, chains int
	h, scale    float64 // scale = √(2h)
	steps       int
	x           []float64 // chains×dim current positions
	req         Request
	src         *rand.PCG
	rng         *rand.Rand
	// noise holds the next step's normals once Prepare has drawn them;
	// snap is the stream's state before they were drawn.
	noise    []float64
	prepared bool
	snap     rand.PCG
	metric   *Metric   // nil: the identity
	tmp      []float64 // 2·dim scratch for a metric
}

var (
	_ Kernel     = (*LMC)(nil)
	_ Preparer   = (*LMC)(nil)
	_ MetricUser = (*LMC)(nil)
)

// SetMetric implements MetricUser: from the next Tell every chain moves
// by x ← x + h·C·∇log π(x) + √(2h)·L·ξ with C = L·Lᵀ (noise already drawn
// by Prepare is standard normal and stays valid).
func (k *LMC) SetMetric(m *Metric) {
	k.metric = checkMetric("LMC", m, k.dim)
	if k.metric != nil && k.tmp == nil {
		k.tmp = make([]float64, 2*k.dim)
	}
}

// Metric implements MetricUser.
func (k *LMC) Metric() *Metric { return orIdentity(k.metric, k.dim) }

// NewLMC returns an LMC kernel for chains chains in dimension dim with step
// h, started at start (chains×dim values, or dim values shared by every
// chain), drawing its noise from src. It panics on a non-positive or
// non-finite step or a start of the wrong length: callers validate data
// from clients before building a kernel.
func NewLMC(dim, chains int, h float64, start []float64, src *rand.PCG) *LMC {
	if dim < 1 || chains < 1 {
		panic(fmt.Sprintf("kernels: LMC with dim %d, chains %d", dim, chains))
	}
	if !(h > 0) || math.IsInf(h, 0) {
		panic(fmt.Sprintf("kernels: LMC step %v", h))
	}
	k := &LMC{dim: dim, chains: chains, h: h, scale: math.Sqrt(2 * h), src: src, rng: rand.New(src)}
	k.x = broadcastStart(start, dim, chains)
	k.req = Request{Need: NeedGradient, Rows: chains, Points: k.x, Chain: chainIndex(chains)}
	return k
}

// Dim implements Kernel.
func (k *LMC) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *LMC) Chains() int { return k.chains }

// Steps implements Kernel.
func (k *LMC) Steps() int { return k.steps }

// Step returns the step size h.
func (k *LMC) Step() float64 { return k.h }

// SetStep changes the step size for the steps to come (a driver re-plans
// it, for example once the gradient noise is measured). Noise already
// drawn by Prepare is standard normal and stays valid. It panics on a
// non-positive or non-finite step.
func (k *LMC) SetStep(h float64) {
	if !(h > 0) || math.IsInf(h, 0) {
		panic(fmt.Sprintf("kernels: LMC step %v", h))
	}
	k.h, k.scale = h, math.Sqrt(2*h)
}

// EvaluationsPerStep implements Kernel: one gradient per chain.
func (k *LMC) EvaluationsPerStep() int { return k.chains }

// Positions implements Kernel.
func (k *LMC) Positions() []float64 { return k.x }

// Next implements Kernel: the gradient at every chain's current position.
func (k *LMC) Next() *Request { return &k.req }

// Prepare implements Preparer: it draws the next step's noise, in the
// order Tell would.
func (k *LMC) Prepare() {
	if k.prepared {
		return
	}
	if k.noise == nil {
		k.noise = make([]float64, len(k.x))
	}
	k.snap = *k.src
	for i := range k.noise {
		k.noise[i] = k.rng.NormFloat64()
	}
	k.prepared = true
}

// Tell implements Kernel. Every call completes a step.
func (k *LMC) Tell(a *Answer) bool {
	if len(a.Grad) < len(k.x) {
		panic(fmt.Sprintf("kernels: LMC answer has %d gradient values, want %d", len(a.Grad), len(k.x)))
	}
	g := a.Grad[:len(k.x)]
	h, s := k.h, k.scale
	if k.metric != nil {
		k.Prepare()
		p := k.dim
		for c := range k.chains {
			lo, hi := c*p, (c+1)*p
			k.metric.move(k.x[lo:hi], g[lo:hi], k.noise[lo:hi], h, s, k.tmp)
		}
		k.prepared = false
		k.steps++
		return true
	}
	if k.prepared {
		for i, z := range k.noise {
			k.x[i] += h*g[i] + s*z
		}
		k.prepared = false
	} else {
		for i := range k.x {
			k.x[i] += h*g[i] + s*k.rng.NormFloat64()
		}
	}
	k.steps++
	return true
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// step, completed steps, positions and the random stream's state.
func (k *LMC) MarshalBinary() ([]byte, error) {
	src := k.src
	if k.prepared {
		src = &k.snap // the noise drawn ahead is drawn again on resume
	}
	w := newStateWriter("LMC")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("h", k.h)
	w.ints("steps", k.steps)
	w.floats("x", k.x...)
	writeMetric(w, "metric", k.metric)
	w.stream("rng", src)
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension and number of chains.
func (k *LMC) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "LMC")
	if err != nil {
		return err
	}
	dim, chains := r.shape()
	h, steps := r.float("h"), r.integer("steps")
	x := r.floats("x", dim*chains)
	metric := readMetric(r, "metric", dim)
	src := r.stream("rng")
	if err := r.check(positive(h) && steps >= 0, "step or step count"); err != nil {
		return err
	}
	*k = LMC{dim: dim, chains: chains, h: h, scale: math.Sqrt(2 * h), steps: steps, x: x, src: src, rng: rand.New(src)}
	k.SetMetric(metric)
	k.req = Request{Need: NeedGradient, Rows: chains, Points: k.x, Chain: chainIndex(chains)}
	return nil
}

// broadcastStart copies start into a new chains×dim slice, repeating a
// single dim-length row for every chain.
func broadcastStart(start []float64, dim, chains int) []float64 {
	x := make([]float64, dim*chains)
	switch len(start) {
	case dim * chains:
		copy(x, start)
	case dim:
		for c := range chains {
			copy(x[c*dim:(c+1)*dim], start)
		}
	default:
		panic(fmt.Sprintf("kernels: start has %d values, want %d or %d", len(start), dim, dim*chains))
	}
	return x
}

func chainIndex(chains int) []int {
	c := make([]int, chains)
	for i := range c {
		c[i] = i
	}
	return c
}
