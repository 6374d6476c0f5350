package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// SGLD is stochastic-gradient Langevin dynamics (Welling & Teh, ICML 2011) over a batch of chains. The client answers each request
// with a minibatch estimate of the score,
//
//	ĝ_S(θ) = −[∇f₀(θ) + (N/n) Σ_{i∈S} ∇f_i(θ)]   (f₀ = −log prior, f_i = −log-likelihood of datum i)
//
// and every chain moves by
//
//	θ_{t+1} = θ_t + h_t·ĝ_S(θ_t) + √(2h_t)·ξ_{t+1},   ξ ~ N(0, I_p)
//
// with a constant step h_t = h or the decreasing schedule of SGLDSchedule,
// h_t = ε_t/2, ε_t = A·(B + t)^(−Γ), t = 0, 1, ... the completed steps.
// Each step asks for one gradient per chain, all chains in one request
// (no minibatch groups: every chain may get its own minibatch). The noise
// is drawn chain by chain, coordinate by coordinate, from the injected
// stream. With exact gradients and a constant step this is LMC.
type SGLD struct {
	dim, chains int
	h           float64 // constant step; 0 with a schedule
	sched       SGLDSchedule
	steps       int
	x           []float64 // chains×dim current positions
	req         Request
	noise       sgldNoise
	pc          precond
}

var (
	_ Kernel     = (*SGLD)(nil)
	_ Preparer   = (*SGLD)(nil)
	_ MetricUser = (*SGLD)(nil)
)

// SetMetric implements MetricUser: from the next Tell every chain moves by
// θ ← θ + h_t·C·ĝ_S(θ) + √(2h_t)·L·ξ (noise already drawn by Prepare is
// standard normal and stays valid).
func (k *SGLD) SetMetric(m *Metric) { k.pc.set("SGLD", m, k.dim, 2*k.dim) }

// Metric implements MetricUser.
func (k *SGLD) Metric() *Metric { return orIdentity(k.pc.metric, k.dim) }

// SGLDSchedule is the decreasing step of Welling & Teh (2011):
//
//	ε_t = A·(B + t)^(−Gamma),   h_t = ε_t/2,   t = 0, 1, 2, ...
//
// with A > 0, B > 0 and Gamma ∈ (0.5, 1], so that Σε_t = ∞ and
// Σε_t² < ∞. The zero value means no schedule (a constant step).
type SGLDSchedule struct {
	A, B, Gamma float64
}

// IsZero reports whether s is the zero value (no schedule).
func (s SGLDSchedule) IsZero() bool { return s == SGLDSchedule{} }

// valid reports whether s is a usable schedule.
func (s SGLDSchedule) valid() bool {
	return positive(s.A) && positive(s.B) && s.Gamma > 0.5 && s.Gamma <= 1
}

// NewSGLD returns an SGLD kernel for chains chains in dimension dim,
// started at start (chains×dim values, or dim values shared by every
// chain), drawing its noise from src. With a zero sched the step is the
// constant h; with a schedule h must be 0 and the step follows sched. It
// panics on a non-positive or non-finite constant step, an invalid
// schedule, both or neither given, or a start of the wrong length.
func NewSGLD(dim, chains int, h float64, sched SGLDSchedule, start []float64, src *rand.PCG) *SGLD {
	if dim < 1 || chains < 1 {
		panic(fmt.Sprintf("kernels: SGLD with dim %d, chains %d", dim, chains))
	}
	switch {
	case sched.IsZero() && !positive(h):
		panic(fmt.Sprintf("kernels: SGLD step %v", h))
	case !sched.IsZero() && (h != 0 || !sched.valid()):
		panic(fmt.Sprintf("kernels: SGLD schedule %+v with constant step %v (want a valid schedule and step 0)", sched, h))
	}
	k := &SGLD{dim: dim, chains: chains, h: h, sched: sched, x: broadcastStart(start, dim, chains)}
	k.noise.init(src, len(k.x))
	k.req = Request{Need: NeedGradient, Rows: chains, Points: k.x, Chain: chainIndex(chains)}
	return k
}

// Dim implements Kernel.
func (k *SGLD) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *SGLD) Chains() int { return k.chains }

// Steps implements Kernel.
func (k *SGLD) Steps() int { return k.steps }

// Step returns the step h_t the next Tell will use: the constant step, or
// ε_t/2 of the schedule at t = Steps().
func (k *SGLD) Step() float64 { return sgldStepAt(k.h, k.sched, k.steps) }

// SetStep changes the constant step size from the next Tell (noise drawn
// ahead by Prepare is standard normal and stays valid). It panics on a
// non-positive or non-finite h, or on a kernel whose step follows a
// schedule.
func (k *SGLD) SetStep(h float64) {
	if !positive(h) || !k.sched.IsZero() {
		panic(fmt.Sprintf("kernels: SGLD step %v (schedule %+v)", h, k.sched))
	}
	k.h = h
}

// Schedule returns the step schedule (the zero value for a constant step).
func (k *SGLD) Schedule() SGLDSchedule { return k.sched }

// EvaluationsPerStep implements Kernel: one minibatch gradient per chain.
func (k *SGLD) EvaluationsPerStep() int { return k.chains }

// Positions implements Kernel.
func (k *SGLD) Positions() []float64 { return k.x }

// Next implements Kernel: a minibatch gradient at every chain's position.
func (k *SGLD) Next() *Request { return &k.req }

// Prepare implements Preparer: it draws the next step's noise.
func (k *SGLD) Prepare() { k.noise.prepare() }

// Tell implements Kernel. Every call completes a step.
func (k *SGLD) Tell(a *Answer) bool {
	n := len(k.x)
	if len(a.Grad) < n {
		panic(fmt.Sprintf("kernels: SGLD answer has %d gradient values, want %d", len(a.Grad), n))
	}
	h := k.Step()
	s := math.Sqrt(2 * h)
	g, z := a.Grad[:n], k.noise.draw()
	if m := k.pc.metric; m != nil {
		for c := range k.chains {
			lo, hi := c*k.dim, (c+1)*k.dim
			m.move(k.x[lo:hi], g[lo:hi], z[lo:hi], h, s, k.pc.tmp)
		}
		k.steps++
		return true
	}
	for i := range k.x {
		k.x[i] += h*g[i] + s*z[i]
	}
	k.steps++
	return true
}

// sgldStepAt returns the step of a step-t move: h with a zero schedule,
// ε_t/2 otherwise.
func sgldStepAt(h float64, s SGLDSchedule, t int) float64 {
	if s.IsZero() {
		return h
	}
	return s.A * math.Pow(s.B+float64(t), -s.Gamma) / 2
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// constant step, schedule, completed steps, positions and the random
// stream's state (before any noise drawn ahead by Prepare).
func (k *SGLD) MarshalBinary() ([]byte, error) {
	w := newStateWriter("SGLD")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("h", k.h)
	w.floats("schedule", k.sched.A, k.sched.B, k.sched.Gamma)
	w.ints("steps", k.steps)
	w.floats("x", k.x...)
	writeMetric(w, "metric", k.pc.metric)
	w.stream("rng", k.noise.saved())
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension, number of chains and schedule.
func (k *SGLD) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "SGLD")
	if err != nil {
		return err
	}
	dim, chains := r.shape()
	h := r.float("h")
	var sched SGLDSchedule
	if v := r.floats("schedule", 3); v != nil {
		sched = SGLDSchedule{v[0], v[1], v[2]}
	}
	steps := r.integer("steps")
	x := r.floats("x", dim*chains)
	metric := readMetric(r, "metric", dim)
	src := r.stream("rng")
	okStep := (sched.IsZero() && positive(h)) || (h == 0 && sched.valid())
	if err := r.check(steps >= 0 && okStep, "step, schedule or step count"); err != nil {
		return err
	}
	*k = SGLD{dim: dim, chains: chains, h: h, sched: sched, steps: steps, x: x}
	k.SetMetric(metric)
	k.noise.init(src, len(x))
	k.req = Request{Need: NeedGradient, Rows: chains, Points: k.x, Chain: chainIndex(chains)}
	return nil
}

// sgldNoise holds the standard normals of one step of the
// stochastic-gradient kernels, drawn chain by chain, coordinate by
// coordinate, either in Tell or ahead of it by Prepare; snap is the
// stream's state before draws made ahead, so that a state saved after
// Prepare resumes exactly as one saved before it.
type sgldNoise struct {
	src      *rand.PCG
	rng      *rand.Rand
	z        []float64
	prepared bool
	snap     rand.PCG
}

func (s *sgldNoise) init(src *rand.PCG, n int) {
	*s = sgldNoise{src: src, rng: rand.New(src), z: make([]float64, n)}
}

// prepare draws the next step's normals unless already drawn.
func (s *sgldNoise) prepare() {
	if s.prepared {
		return
	}
	s.snap = *s.src
	for i := range s.z {
		s.z[i] = s.rng.NormFloat64()
	}
	s.prepared = true
}

// draw returns the normals for the step being completed and consumes them.
func (s *sgldNoise) draw() []float64 {
	s.prepare()
	s.prepared = false
	return s.z
}

// saved returns the stream as it was before any draws made ahead.
func (s *sgldNoise) saved() *rand.PCG {
	if s.prepared {
		return &s.snap
	}
	return s.src
}
