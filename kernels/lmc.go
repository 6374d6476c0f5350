package kernels

import (
	"encoding/binary"
	"errors"
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
}

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

const lmcMagic = "sluice.lmc.v1"

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// step, completed steps, positions and the random stream's state.
func (k *LMC) MarshalBinary() ([]byte, error) {
	src := k.src
	if k.prepared {
		src = &k.snap // the noise drawn ahead is drawn again on resume
	}
	rs, err := src.MarshalBinary()
	if err != nil {
		return nil, err
	}
	b := make([]byte, 0, len(lmcMagic)+4*8+8*len(k.x)+len(rs))
	b = append(b, lmcMagic...)
	b = binary.LittleEndian.AppendUint64(b, uint64(k.dim))
	b = binary.LittleEndian.AppendUint64(b, uint64(k.chains))
	b = binary.LittleEndian.AppendUint64(b, math.Float64bits(k.h))
	b = binary.LittleEndian.AppendUint64(b, uint64(k.steps))
	for _, v := range k.x {
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
	}
	return append(b, rs...), nil
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension and number of chains.
func (k *LMC) UnmarshalBinary(b []byte) error {
	r := stateReader{b: b}
	if !r.magic(lmcMagic) {
		return errors.New("kernels: not an LMC state")
	}
	dim, chains := int(r.u64()), int(r.u64())
	h := math.Float64frombits(r.u64())
	steps := int(r.u64())
	if r.err != nil || !stateFits(dim, chains, 1, len(b)) || !(h > 0) {
		return errors.New("kernels: corrupt LMC state")
	}
	x := r.floats(dim * chains)
	src := &rand.PCG{}
	if r.err != nil {
		return errors.New("kernels: corrupt LMC state")
	}
	if err := src.UnmarshalBinary(r.rest()); err != nil {
		return fmt.Errorf("kernels: LMC random state: %w", err)
	}
	*k = LMC{dim: dim, chains: chains, h: h, scale: math.Sqrt(2 * h), steps: steps, x: x, src: src, rng: rand.New(src)}
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

// stateReader reads the little-endian state layout written by the
// kernels' MarshalBinary methods, remembering the first error.
type stateReader struct {
	b   []byte
	err error
}

func (r *stateReader) magic(m string) bool {
	if len(r.b) < len(m) || string(r.b[:len(m)]) != m {
		return false
	}
	r.b = r.b[len(m):]
	return true
}

func (r *stateReader) u64() uint64 {
	if r.err != nil || len(r.b) < 8 {
		r.err = errors.New("short state")
		return 0
	}
	v := binary.LittleEndian.Uint64(r.b)
	r.b = r.b[8:]
	return v
}

func (r *stateReader) floats(n int) []float64 {
	if r.err != nil || len(r.b) < 8*n {
		r.err = errors.New("short state")
		return nil
	}
	out := make([]float64, n)
	for i := range out {
		out[i] = math.Float64frombits(binary.LittleEndian.Uint64(r.b[8*i:]))
	}
	r.b = r.b[8*n:]
	return out
}

func (r *stateReader) rest() []byte { return r.b }

// fill reads len(dst) floats into each dst in turn.
func (r *stateReader) fill(dsts ...[]float64) {
	for _, dst := range dsts {
		if v := r.floats(len(dst)); r.err == nil {
			copy(dst, v)
		}
	}
}

// stream restores the random stream from the rest of the state; kind
// names the kernel in the error.
func (r *stateReader) stream(kind string) (*rand.PCG, error) {
	src := &rand.PCG{}
	if err := src.UnmarshalBinary(r.rest()); err != nil {
		return nil, fmt.Errorf("kernels: %s random state: %w", kind, err)
	}
	return src, nil
}
