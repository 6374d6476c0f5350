package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// BAOAB is kinetic Langevin, the diffusion of Kinetic,
//
//	dv = −γ v dt + u ∇log π(x) dt + √(2γu) dB,   dx = v dt,
//
// integrated by the BAOAB splitting of B. Leimkuhler and C. Matthews
// (2013), "Rational construction of stochastic numerical methods for
// molecular sampling", Applied Mathematics Research eXpress: a step of
// length h is a half kick (B: v += (h/2)·u·G), a half drift (A:
// x += (h/2)·v), the friction and noise solved exactly over h (O:
// v ← e^{−γh}·v + √(u(1 − e^{−2γh}))·z), a half drift and a half kick with
// the gradient at the new position. On a Gaussian target its stationary
// law of the position is exact at every stable step (ω·h < 2 on a
// direction of angular frequency ω = √(uλ); Leimkuhler and Matthews 2013,
// from memory, confirmed by the engine's tests through the step's linear
// map), so its step is bound by stability and by the target's departure
// from a Gaussian rather than by the variance error that holds back Kinetic
// and LMC on stiff directions; the bias on other targets is of order h².
//
// The closing half kick of one step and the opening half kick of the next
// use the same gradient, so each step asks for one gradient per chain, at
// the position the step ends at; the first step's request is at the start.
// Velocities therefore reports v before the closing half kick (owed to the
// next Tell, with the step and inverse mass of the step that owes it);
// Positions reports the BAOAB positions, which are the draws. One normal
// per coordinate per step is drawn from the injected stream, chain by
// chain, coordinate by coordinate.
type BAOAB struct {
	dim, chains int
	h, gamma, u float64
	e, s        float64 // e^{−γh} and √(u(1 − e^{−2γh}))
	owed        float64 // the half kick's u·h/2 owed to v: 0 before the first step
	steps       int
	x, v        []float64 // chains×dim positions and velocities
	req         Request
	src         *rand.PCG
	rng         *rand.Rand
	pc          precond
}

var (
	_ Kernel       = (*BAOAB)(nil)
	_ MetricUser   = (*BAOAB)(nil)
	_ StepSetter   = (*BAOAB)(nil)
	_ Damped       = (*BAOAB)(nil)
	_ Checkpointer = (*BAOAB)(nil)
)

// NewBAOAB returns a BAOAB kernel for chains chains in dimension dim with
// step h, friction gamma (γ) and inverse mass u, started at positions
// start and velocities velocity (each chains×dim values, or dim values
// shared by every chain; nil starts every chain at rest), drawing its
// noise from src. A zero gamma means 2 and a zero u means 1, as for
// Kinetic. It panics on a non-positive or non-finite h, a negative or
// non-finite gamma or u, or a start or velocity of the wrong length:
// callers validate data from clients before building a kernel.
func NewBAOAB(dim, chains int, h, gamma, u float64, start, velocity []float64, src *rand.PCG) *BAOAB {
	if dim < 1 || chains < 1 {
		panic(fmt.Sprintf("kernels: BAOAB with dim %d, chains %d", dim, chains))
	}
	if gamma == 0 {
		gamma = 2
	}
	if u == 0 {
		u = 1
	}
	k := &BAOAB{dim: dim, chains: chains, src: src, rng: rand.New(src)}
	k.setCoef(h, gamma, u)
	k.x = broadcastStart(start, dim, chains)
	if velocity == nil {
		k.v = make([]float64, dim*chains)
	} else {
		k.v = broadcastStart(velocity, dim, chains)
	}
	k.req = Request{Need: NeedGradient, Rows: chains, Points: k.x, Chain: chainIndex(chains)}
	return k
}

func (k *BAOAB) setCoef(h, gamma, u float64) {
	if !positive(h) || !positive(gamma) || !positive(u) {
		panic(fmt.Sprintf("kernels: BAOAB step %v, friction %v, inverse mass %v", h, gamma, u))
	}
	y := gamma * h
	k.h, k.gamma, k.u = h, gamma, u
	k.e = math.Exp(-y)
	// 1 − e^{−2y} from expm1, so that a small γh keeps its digits.
	k.s = math.Sqrt(u * -math.Expm1(-2*y))
}

// SetMetric implements MetricUser: from the next Tell the inverse mass is
// u·C (C = L·Lᵀ): the kicks add (h/2)·u·C·G and the noise is
// √(u(1 − e^{−2γh}))·L·z, which is the kernel above run on y = L⁻¹x
// (velocity L⁻¹v), whose target π(Ly) has score Lᵀ∇log π; its invariant
// law is π(x)·N(v; 0, u·C) (derived here by that change of variables).
func (k *BAOAB) SetMetric(m *Metric) { k.pc.set("BAOAB", m, k.dim, 2*k.dim) }

// Metric implements MetricUser.
func (k *BAOAB) Metric() *Metric { return orIdentity(k.pc.metric, k.dim) }

// Dim implements Kernel.
func (k *BAOAB) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *BAOAB) Chains() int { return k.chains }

// Steps implements Kernel.
func (k *BAOAB) Steps() int { return k.steps }

// Step implements Stepper.
func (k *BAOAB) Step() float64 { return k.h }

// SetStep implements StepSetter: the step from the next Tell (the half
// kick a completed step owes keeps the step it was taken with).
func (k *BAOAB) SetStep(h float64) { k.setCoef(h, k.gamma, k.u) }

// SetFriction changes γ from the next Tell. It panics on a non-positive or
// non-finite γ.
func (k *BAOAB) SetFriction(gamma float64) { k.setCoef(k.h, gamma, k.u) }

// SetInverseMass changes the scalar inverse mass u from the next Tell.
// It panics on a non-positive or non-finite u.
func (k *BAOAB) SetInverseMass(u float64) { k.setCoef(k.h, k.gamma, u) }

// Friction implements Damped.
func (k *BAOAB) Friction() float64 { return k.gamma }

// InverseMass implements Massive.
func (k *BAOAB) InverseMass() float64 { return k.u }

// EvaluationsPerStep implements Kernel: one gradient per chain.
func (k *BAOAB) EvaluationsPerStep() int { return k.chains }

// Positions implements Kernel: the positions x only.
func (k *BAOAB) Positions() []float64 { return k.x }

// Velocities returns every chain's velocity before the closing half kick
// of the last step, Chains×Dim values, row-major. The slice belongs to the
// kernel: read it before the next Tell and do not modify it.
func (k *BAOAB) Velocities() []float64 { return k.v }

// Next implements Kernel: the gradient at every chain's position.
func (k *BAOAB) Next() *Request { return &k.req }

// Tell implements Kernel. Every call completes a step: the half kick the
// last step owes and this step's first half kick, both with the gradient
// just received, then A, O, A.
func (k *BAOAB) Tell(a *Answer) bool {
	if len(a.Grad) < len(k.x) {
		panic(fmt.Sprintf("kernels: BAOAB answer has %d gradient values, want %d", len(a.Grad), len(k.x)))
	}
	g := a.Grad[:len(k.x)]
	v := k.v[:len(k.x)]
	kick := k.owed + k.u*k.h/2
	half := k.h / 2
	if m := k.pc.metric; m != nil {
		p := k.dim
		w, cg := k.pc.tmp[:p], k.pc.tmp[p:2*p]
		for ch := range k.chains {
			lo, hi := ch*p, (ch+1)*p
			for i := range w {
				w[i] = k.s * k.rng.NormFloat64()
			}
			m.ApplyFactor(w, w)
			m.Apply(cg, g[lo:hi])
			x, vc := k.x[lo:hi], v[lo:hi]
			for i, xi := range x {
				vi := vc[i] + kick*cg[i]
				xi += half * vi
				vi = k.e*vi + w[i]
				x[i] = xi + half*vi
				vc[i] = vi
			}
		}
	} else {
		for i, xi := range k.x {
			vi := v[i] + kick*g[i]
			xi += half * vi
			vi = k.e*vi + k.s*k.rng.NormFloat64()
			k.x[i] = xi + half*vi
			v[i] = vi
		}
	}
	k.owed = k.u * k.h / 2
	k.steps++
	return true
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// step, friction, inverse mass, the owed half kick, completed steps,
// positions, velocities, metric and the random stream's state.
func (k *BAOAB) MarshalBinary() ([]byte, error) {
	w := newStateWriter("BAOAB")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("h", k.h)
	w.floats("gamma", k.gamma)
	w.floats("u", k.u)
	w.floats("owed", k.owed)
	w.ints("steps", k.steps)
	w.floats("x", k.x...)
	w.floats("v", k.v...)
	writeMetric(w, "metric", k.pc.metric)
	w.stream("rng", k.src)
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension and number of chains.
func (k *BAOAB) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "BAOAB")
	if err != nil {
		return err
	}
	dim, chains := r.shape()
	h, gamma, u, owed := r.float("h"), r.float("gamma"), r.float("u"), r.float("owed")
	steps := r.integer("steps")
	x, v := r.floats("x", dim*chains), r.floats("v", dim*chains)
	metric := readMetric(r, "metric", dim)
	src := r.stream("rng")
	ok := steps >= 0 && positive(h) && positive(gamma) && positive(u) &&
		owed >= 0 && !math.IsInf(owed, 0) && (owed == 0) == (steps == 0)
	if err := r.check(ok, "step, friction, inverse mass, owed kick or step count"); err != nil {
		return err
	}
	*k = BAOAB{dim: dim, chains: chains, owed: owed, steps: steps, x: x, v: v, src: src, rng: rand.New(src)}
	k.setCoef(h, gamma, u)
	k.SetMetric(metric)
	k.req = Request{Need: NeedGradient, Rows: chains, Points: k.x, Chain: chainIndex(chains)}
	return nil
}
