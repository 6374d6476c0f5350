package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// Kinetic is underdamped (kinetic) Langevin over a batch of chains,
// integrated exactly over each step with the gradient frozen at the step's
// start (Cheng, Chatterji, Bartlett & Jordan, COLT 2018).
// The diffusion is
//
//	dv = −γ v dt + u ∇log π(x) dt + √(2γu) dB,   dx = v dt
//
// whose invariant law is π(x)·N(v; 0, uI). With G = ∇log π(x_k),
// E = e^{−γh} and c = (1 − E)/γ, one step is, per coordinate,
//
//	x_{k+1} = x_k + c·v_k + (u/γ)(h − c)·G + L11·z1
//	v_{k+1} = E·v_k + u·c·G + L21·z1 + L22·z2,   z1, z2 ~ N(0, 1)
//
// where L is the lower Cholesky factor of the step's 2×2 noise covariance
//
//	Var x = (u/γ)[2h − (4/γ)(1 − E) + (1/γ)(1 − E²)]
//	Cov   = (u/γ)(1 − E)²
//	Var v = u(1 − E²)
//
// computed once. Each step asks for one gradient per chain, all chains in
// one request. The velocities are kernel state; Positions reports x only.
// The normals are drawn chain by chain, coordinate by coordinate, z1 then
// z2, from the injected stream.
type Kinetic struct {
	dim, chains int
	h, gamma, u float64
	c           kineticCoef
	steps       int
	x, v        []float64 // chains×dim positions and velocities
	req         Request
	src         *rand.PCG
	rng         *rand.Rand
	pc          precond
}

var (
	_ Kernel     = (*Kinetic)(nil)
	_ MetricUser = (*Kinetic)(nil)
)

// SetMetric implements MetricUser: from the next Tell the inverse mass is
// u·C. With C = L·Lᵀ this is the kernel above run on y = L⁻¹x (velocity
// L⁻¹v), whose target π(Ly) has score Lᵀ∇log π; mapped back, one step is
//
//	x' = x + c·v + ax·C·G + L·(l11·z1)
//	v' = e·v + av·C·G + L·(l21·z1 + l22·z2)
//
// with the same scalar coefficients, z1 and z2 drawn per coordinate as
// before, and invariant law π(x)·N(v; 0, u·C) (derived here by that change
// of variables; the same one Roberts and Stramer (2002) use for MALA).
func (k *Kinetic) SetMetric(m *Metric) { k.pc.set("Kinetic", m, k.dim, 3*k.dim) }

// Metric implements MetricUser.
func (k *Kinetic) Metric() *Metric { return orIdentity(k.pc.metric, k.dim) }

// NewKinetic returns a Kinetic kernel for chains chains in dimension dim
// with step h, friction gamma (γ) and inverse mass u, started at positions
// start and velocities velocity (each chains×dim values, or dim values
// shared by every chain), drawing its noise from src.
//
// A zero gamma means 2 and a zero u means 1. Cheng et al. take γ = 2 and
// u = 1/M with M the Lipschitz constant of ∇log π; u = 1 is that choice
// for a target whose Hessian is bounded by the identity, and a caller with
// an estimate of M (from gradient pairs, for example) should pass its inverse. A nil velocity
// starts every chain at rest (v = 0, as in the analysis of Cheng et al.
// 2018, Theorem 1). It panics on a non-positive or non-finite h, a negative or
// non-finite gamma or u, or a start or velocity of the wrong length:
// callers validate data from clients before building a kernel.
func NewKinetic(dim, chains int, h, gamma, u float64, start, velocity []float64, src *rand.PCG) *Kinetic {
	if dim < 1 || chains < 1 {
		panic(fmt.Sprintf("kernels: Kinetic with dim %d, chains %d", dim, chains))
	}
	if gamma == 0 {
		gamma = 2
	}
	if u == 0 {
		u = 1
	}
	if !positive(h) || !positive(gamma) || !positive(u) {
		panic(fmt.Sprintf("kernels: Kinetic step %v, friction %v, inverse mass %v", h, gamma, u))
	}
	k := &Kinetic{dim: dim, chains: chains, h: h, gamma: gamma, u: u, src: src, rng: rand.New(src)}
	k.c = newKineticCoef(gamma, u, h)
	k.x = broadcastStart(start, dim, chains)
	if velocity == nil {
		k.v = make([]float64, dim*chains)
	} else {
		k.v = broadcastStart(velocity, dim, chains)
	}
	k.req = Request{Need: NeedGradient, Rows: chains, Points: k.x, Chain: chainIndex(chains)}
	return k
}

// Dim implements Kernel.
func (k *Kinetic) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *Kinetic) Chains() int { return k.chains }

// Steps implements Kernel.
func (k *Kinetic) Steps() int { return k.steps }

// Step returns the step size h.
func (k *Kinetic) Step() float64 { return k.h }

// SetStep changes the step size h from the next Tell. It panics on a
// non-positive or non-finite h.
func (k *Kinetic) SetStep(h float64) { k.setCoef(h, k.gamma, k.u) }

// SetFriction changes the friction γ from the next Tell. It panics on a
// non-positive or non-finite γ.
func (k *Kinetic) SetFriction(gamma float64) { k.setCoef(k.h, gamma, k.u) }

// SetInverseMass changes the scalar inverse mass u from the next Tell
// (with a metric C the inverse mass is u·C). It panics on a non-positive
// or non-finite u.
func (k *Kinetic) SetInverseMass(u float64) { k.setCoef(k.h, k.gamma, u) }

func (k *Kinetic) setCoef(h, gamma, u float64) {
	if !positive(h) || !positive(gamma) || !positive(u) {
		panic(fmt.Sprintf("kernels: Kinetic step %v, friction %v, inverse mass %v", h, gamma, u))
	}
	k.h, k.gamma, k.u, k.c = h, gamma, u, newKineticCoef(gamma, u, h)
}

// Friction returns γ.
func (k *Kinetic) Friction() float64 { return k.gamma }

// InverseMass returns the scalar inverse mass u (the inverse mass is
// u·C with a metric C).
func (k *Kinetic) InverseMass() float64 { return k.u }

// EvaluationsPerStep implements Kernel: one gradient per chain.
func (k *Kinetic) EvaluationsPerStep() int { return k.chains }

// Positions implements Kernel: the positions x only.
func (k *Kinetic) Positions() []float64 { return k.x }

// Velocities returns the current velocities of every chain, Chains×Dim
// values, row-major. The slice belongs to the kernel: read it before the
// next Tell and do not modify it.
func (k *Kinetic) Velocities() []float64 { return k.v }

// Next implements Kernel: the gradient at every chain's current position.
func (k *Kinetic) Next() *Request { return &k.req }

// Tell implements Kernel. Every call completes a step.
func (k *Kinetic) Tell(a *Answer) bool {
	if len(a.Grad) < len(k.x) {
		panic(fmt.Sprintf("kernels: Kinetic answer has %d gradient values, want %d", len(a.Grad), len(k.x)))
	}
	g := a.Grad[:len(k.x)]
	v := k.v[:len(k.x)]
	c := &k.c
	if m := k.pc.metric; m != nil {
		p := k.dim
		w1, w2, cg := k.pc.tmp[:p], k.pc.tmp[p:2*p], k.pc.tmp[2*p:3*p]
		for ch := range k.chains {
			lo, hi := ch*p, (ch+1)*p
			for i := range w1 {
				z1 := k.rng.NormFloat64()
				z2 := k.rng.NormFloat64()
				w1[i] = c.l11 * z1
				w2[i] = c.l21*z1 + c.l22*z2
			}
			m.ApplyFactor(w1, w1)
			m.ApplyFactor(w2, w2)
			m.Apply(cg, g[lo:hi])
			x, vc := k.x[lo:hi], v[lo:hi]
			for i, xi := range x {
				vi := vc[i]
				x[i] = xi + c.c*vi + c.ax*cg[i] + w1[i]
				vc[i] = c.e*vi + c.av*cg[i] + w2[i]
			}
		}
		k.steps++
		return true
	}
	for i, x := range k.x {
		z1 := k.rng.NormFloat64()
		z2 := k.rng.NormFloat64()
		vi := v[i]
		k.x[i] = x + c.c*vi + c.ax*g[i] + c.l11*z1
		v[i] = c.e*vi + c.av*g[i] + c.l21*z1 + c.l22*z2
	}
	k.steps++
	return true
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// step, friction, inverse mass, completed steps, positions, velocities and
// the random stream's state.
func (k *Kinetic) MarshalBinary() ([]byte, error) {
	w := newStateWriter("Kinetic")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("h", k.h)
	w.floats("gamma", k.gamma)
	w.floats("u", k.u)
	w.ints("steps", k.steps)
	w.floats("x", k.x...)
	w.floats("v", k.v...)
	writeMetric(w, "metric", k.pc.metric)
	w.stream("rng", k.src)
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension and number of chains.
func (k *Kinetic) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "Kinetic")
	if err != nil {
		return err
	}
	dim, chains := r.shape()
	h, gamma, u := r.float("h"), r.float("gamma"), r.float("u")
	steps := r.integer("steps")
	x, v := r.floats("x", dim*chains), r.floats("v", dim*chains)
	metric := readMetric(r, "metric", dim)
	src := r.stream("rng")
	if err := r.check(steps >= 0 && positive(h) && positive(gamma) && positive(u), "step, friction, inverse mass or step count"); err != nil {
		return err
	}
	*k = Kinetic{dim: dim, chains: chains, h: h, gamma: gamma, u: u, c: newKineticCoef(gamma, u, h),
		steps: steps, x: x, v: v, src: src, rng: rand.New(src)}
	k.SetMetric(metric)
	k.req = Request{Need: NeedGradient, Rows: chains, Points: k.x, Chain: chainIndex(chains)}
	return nil
}

// kineticCoef holds the coefficients of one frozen-gradient kinetic step
// of length h (Cheng et al. 2018; the Gaussian step derived here by
// integrating the linear SDE with G frozen), with G = ∇log π:
//
//	x' = x + c·v + ax·G + l11·z1
//	v' = e·v + av·G + l21·z1 + l22·z2
//
// and the noise covariance (varX, cov, varV) that l factors.
type kineticCoef struct {
	e, c, ax, av    float64
	varX, cov, varV float64
	l11, l21, l22   float64
}

// KineticCoefficients are the coefficients of one frozen-gradient kinetic
// step as the kinetic kernel computes them (see newKineticCoef): the
// position and velocity maps E, C, AX, AV and the noise covariance VarX,
// Cov, VarV. Exported for planners that predict the kernel's behaviour
// (the engine's tuner) so that the formula has one home.
type KineticCoefficients struct {
	E, C, AX, AV    float64
	VarX, Cov, VarV float64
}

// KineticStepCoefficients returns the coefficients of one step of
// duration h ≥ 0 with friction gamma and inverse mass u.
func KineticStepCoefficients(gamma, u, h float64) KineticCoefficients {
	c := newKineticCoef(gamma, u, h)
	return KineticCoefficients{E: c.e, C: c.c, AX: c.ax, AV: c.av, VarX: c.varX, Cov: c.cov, VarV: c.varV}
}

// newKineticCoef computes the step's coefficients for friction gamma,
// inverse mass u and duration h ≥ 0. With y = γh, the two differences that
// lose digits to cancellation for small y,
//
//	ψ(y) = y − (1 − e^{−y}) = Σ_{k≥2} (−1)^k y^k/k!
//	φ(y) = 2y − 4(1 − e^{−y}) + (1 − e^{−2y}) = Σ_{k≥3} (−1)^{k+1} (2^k − 4) y^k/k!
//
// are summed from their series below y = 1/8 (evaluated directly they
// lose about 6/y² and 2/y ulps), so that ax = uψ/γ² and Var x = uφ/γ² keep nearly full
// relative precision for any step. A zero duration gives the identity map
// with no noise.
func newKineticCoef(gamma, u, h float64) kineticCoef {
	y := gamma * h
	if y == 0 {
		return kineticCoef{e: 1}
	}
	omE := -math.Expm1(-y)  // 1 − E
	omE2 := omE * (2 - omE) // 1 − E² = (1 − E)(1 + E)
	var psi, phi float64
	if y < 0.125 {
		t, t2 := y, 2*y // y^k/k!, (2y)^k/k!
		for n := 2; n <= 16; n++ {
			t *= y / float64(n)
			t2 *= 2 * y / float64(n)
			if n%2 == 0 {
				psi += t
				phi -= t2 - 4*t
			} else {
				psi -= t
				phi += t2 - 4*t
			}
		}
	} else {
		psi = y - omE
		phi = 2*y - 4*omE + omE2
	}
	g2 := gamma * gamma
	c := kineticCoef{
		e:    1 - omE,
		c:    omE / gamma,
		ax:   u * psi / g2,
		av:   u * omE / gamma,
		varX: u * phi / g2,
		cov:  u / gamma * omE * omE,
		varV: u * omE2,
	}
	if c.varX > 0 {
		c.l11 = math.Sqrt(c.varX)
		c.l21 = c.cov / c.l11
	}
	c.l22 = math.Sqrt(math.Max(0, c.varV-c.l21*c.l21))
	return c
}
