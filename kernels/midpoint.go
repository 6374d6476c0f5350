package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// Midpoint is the randomised midpoint method for kinetic Langevin (Shen &
// Lee, NeurIPS 2019) over a batch of chains, for the
// diffusion of Kinetic with friction γ = 2:
//
//	dv = −2v dt + u ∇log π(x) dt + 2√u dB,   dx = v dt.
//
// Each step draws α ~ U[0, 1) per chain, sets a = αh, and with
// G(·) = ∇log π(·) moves
//
//	x_mid = x + ½(1 − e^{−2a}) v + (u/2)(a − ½(1 − e^{−2a})) G(x) + W1
//	x'    = x + ½(1 − e^{−2h}) v + (uh/2)(1 − e^{−2(h−a)}) G(x_mid) + W2
//	v'    = e^{−2h} v + uh e^{−2(h−a)} G(x_mid) + W3
//
// where, on one Brownian path B over [0, h],
//
//	W1 = √u ∫₀ᵃ (1 − e^{−2(a−s)}) dB_s
//	W2 = √u ∫₀ʰ (1 − e^{−2(h−s)}) dB_s
//	W3 = 2√u ∫₀ʰ e^{−2(h−s)} dB_s.
//
// (W1, W2, W3) are drawn from four normals per coordinate with the exact
// joint law derived here: (X0, V0) is the frozen-force
// kinetic noise (Kinetic's 2×2 law) over [0, a] and (X1, V1) over [a, h],
// independent, and
//
//	W1 = X0,   W2 = X0 + X1 + ½(1 − e^{−2(h−a)}) V0,   W3 = e^{−2(h−a)} V0 + V1,
//
// which stays well conditioned for α near 0 or 1, where the 3×3
// covariance is nearly singular.
//
// A step is two requests, all chains in each: the gradient at every
// chain's position (Tell returns false), then at every chain's midpoint
// (Tell returns true). Per chain the stream gives α, then z1…z4 for each
// coordinate in turn (X0, V0 from z1, z2; X1, V1 from z3, z4), chain by
// chain, all during the first Tell of the step.
type Midpoint struct {
	dim, chains int
	h, u        float64
	e, b        float64 // e^{−2h}, ½(1 − e^{−2h})
	steps       int
	mid         bool      // the step's first Tell is done; the midpoints are requested
	x, v        []float64 // chains×dim positions and velocities at the last completed step
	// Within a step: the midpoints, the parts of x' and v' not involving
	// G(x_mid), and per chain the coefficients of G(x_mid) in x' and v'.
	xmid, xnext, vnext []float64
	cx, cv             []float64
	reqX, reqMid       Request
	src                *rand.PCG
	rng                *rand.Rand
	pc                 precond
	pending            *Metric // set between the two requests of a step
	pendingSet         bool
}

var (
	_ Kernel     = (*Midpoint)(nil)
	_ MetricUser = (*Midpoint)(nil)
)

// SetMetric implements MetricUser: the inverse mass becomes u·C, C = L·Lᵀ,
// from the next step (a metric set between the two requests of a step
// waits for the step to complete). As for Kinetic this is the method run
// on y = L⁻¹x: G(·) becomes C·G(·) in both updates and (W1, W2, W3)
// become L·(W1, W2, W3), the normals drawn in the same order (derived
// here by that change of variables); the invariant law is
// π(x)·N(v; 0, u·C).
func (k *Midpoint) SetMetric(m *Metric) {
	m = checkMetric("Midpoint", m, k.dim)
	if k.mid {
		k.pending, k.pendingSet = m, true
		return
	}
	k.pc.set("Midpoint", m, k.dim, 4*k.dim)
}

// Metric implements MetricUser: the metric of the next step.
func (k *Midpoint) Metric() *Metric {
	if k.pendingSet {
		return orIdentity(k.pending, k.dim)
	}
	return orIdentity(k.pc.metric, k.dim)
}

// NewMidpoint returns a Midpoint kernel for chains chains in dimension dim
// with step h and inverse mass u, started at positions start and
// velocities velocity (each chains×dim values, or dim values shared by
// every chain), drawing α and the noise from src. The friction is 2. A
// zero u means 1 (Shen & Lee, like Cheng et al., take u = 1/M with M the
// Lipschitz constant of ∇log π; see NewKinetic). A nil velocity starts
// every chain at rest. It panics on a non-positive or non-finite h, a
// negative or non-finite u, or a start or velocity of the wrong length.
func NewMidpoint(dim, chains int, h, u float64, start, velocity []float64, src *rand.PCG) *Midpoint {
	if dim < 1 || chains < 1 {
		panic(fmt.Sprintf("kernels: Midpoint with dim %d, chains %d", dim, chains))
	}
	if u == 0 {
		u = 1
	}
	if !positive(h) || !positive(u) {
		panic(fmt.Sprintf("kernels: Midpoint step %v, inverse mass %v", h, u))
	}
	x := broadcastStart(start, dim, chains)
	v := make([]float64, dim*chains)
	if velocity != nil {
		v = broadcastStart(velocity, dim, chains)
	}
	k := &Midpoint{dim: dim, chains: chains, h: h, u: u, x: x, v: v, src: src}
	k.init()
	return k
}

// init sets the derived fields and buffers from dim, chains, h, u, x, v
// and src, keeping any buffers already present.
func (k *Midpoint) init() {
	n := k.dim * k.chains
	k.e = math.Exp(-2 * k.h)
	k.b = -math.Expm1(-2*k.h) / 2
	k.rng = rand.New(k.src)
	if k.xmid == nil {
		k.xmid, k.xnext, k.vnext = make([]float64, n), make([]float64, n), make([]float64, n)
		k.cx, k.cv = make([]float64, k.chains), make([]float64, k.chains)
	}
	idx := chainIndex(k.chains)
	k.reqX = Request{Need: NeedGradient, Rows: k.chains, Points: k.x, Chain: idx}
	k.reqMid = Request{Need: NeedGradient, Rows: k.chains, Points: k.xmid, Chain: idx}
}

// Dim implements Kernel.
func (k *Midpoint) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *Midpoint) Chains() int { return k.chains }

// Steps implements Kernel.
func (k *Midpoint) Steps() int { return k.steps }

// Step returns the step size h.
func (k *Midpoint) Step() float64 { return k.h }

// SetStep changes the step size h from the next step: a step whose
// midpoints are already out finishes with the coefficients its first
// request fixed. It panics on a non-positive or non-finite h.
func (k *Midpoint) SetStep(h float64) {
	if !positive(h) {
		panic(fmt.Sprintf("kernels: Midpoint step %v", h))
	}
	k.h = h
	k.e = math.Exp(-2 * k.h)
	k.b = -math.Expm1(-2*k.h) / 2
}

// InverseMass returns u.
func (k *Midpoint) InverseMass() float64 { return k.u }

// SetInverseMass changes the scalar inverse mass u from the next step (a
// step whose midpoints are already out finishes with the coefficients its
// first request fixed; with a metric C the inverse mass is u·C). It panics
// on a non-positive or non-finite u.
func (k *Midpoint) SetInverseMass(u float64) {
	if !positive(u) {
		panic(fmt.Sprintf("kernels: Midpoint inverse mass %v", u))
	}
	k.u = u
}

// EvaluationsPerStep implements Kernel: two gradients per chain.
func (k *Midpoint) EvaluationsPerStep() int { return 2 * k.chains }

// Positions implements Kernel: the positions x at the last completed
// step (also between the two requests of a step).
func (k *Midpoint) Positions() []float64 { return k.x }

// Velocities returns the velocities at the last completed step, Chains×Dim
// values, row-major. The slice belongs to the kernel: read it before the
// next Tell and do not modify it.
func (k *Midpoint) Velocities() []float64 { return k.v }

// Next implements Kernel: the gradient at every chain's position, then at
// every chain's midpoint.
func (k *Midpoint) Next() *Request {
	if k.mid {
		return &k.reqMid
	}
	return &k.reqX
}

// Tell implements Kernel. The first call of a step draws α and the noise
// and sets the midpoints; the second completes the step.
func (k *Midpoint) Tell(a *Answer) bool {
	n := len(k.x)
	if len(a.Grad) < n {
		panic(fmt.Sprintf("kernels: Midpoint answer has %d gradient values, want %d", len(a.Grad), n))
	}
	g := a.Grad[:n]
	if k.mid {
		xn, vn := k.xnext[:n], k.vnext[:n]
		for c := range k.chains {
			cx, cv := k.cx[c], k.cv[c]
			lo, hi := c*k.dim, (c+1)*k.dim
			if m := k.pc.metric; m != nil {
				cg := k.pc.tmp[3*k.dim : 4*k.dim] // C·G(x_mid)
				m.Apply(cg, g[lo:hi])
				for i := lo; i < hi; i++ {
					k.x[i] = xn[i] + cx*cg[i-lo]
					k.v[i] = vn[i] + cv*cg[i-lo]
				}
				continue
			}
			for i := lo; i < hi; i++ {
				k.x[i] = xn[i] + cx*g[i]
				k.v[i] = vn[i] + cv*g[i]
			}
		}
		k.mid = false
		k.steps++
		if k.pendingSet {
			k.pendingSet = false
			k.pc.set("Midpoint", k.pending, k.dim, 4*k.dim)
			k.pending = nil
		}
		return true
	}
	if k.pc.metric != nil {
		k.firstMetric(g)
		k.mid = true
		return false
	}
	h, u, e, b := k.h, k.u, k.e, k.b
	for c := range k.chains {
		a := k.rng.Float64() * h
		rest := h - a
		s0 := newKineticCoef(2, u, a)    // [0, a]: x_mid's coefficients and (X0, V0)
		s1 := newKineticCoef(2, u, rest) // [a, h]: (X1, V1); s1.e = e^{−2(h−a)}, s1.c = ½(1 − e^{−2(h−a)})
		k.cx[c] = u * h * s1.c
		k.cv[c] = u * h * s1.e
		lo, hi := c*k.dim, (c+1)*k.dim
		x, v := k.x[lo:hi], k.v[lo:hi]
		xm, xn, vn, gc := k.xmid[lo:hi], k.xnext[lo:hi], k.vnext[lo:hi], g[lo:hi]
		for i, xi := range x {
			z1 := k.rng.NormFloat64()
			z2 := k.rng.NormFloat64()
			z3 := k.rng.NormFloat64()
			z4 := k.rng.NormFloat64()
			w1, w2, w3 := midpointNoise(&s0, &s1, z1, z2, z3, z4)
			vi := v[i]
			xm[i] = xi + s0.c*vi + s0.ax*gc[i] + w1
			xn[i] = xi + b*vi + w2
			vn[i] = e*vi + w3
		}
	}
	k.mid = true
	return false
}

// firstMetric is the first Tell of a step with a metric: the step of the
// plain method with G(x) replaced by C·G(x) and the noises by L·(W1, W2,
// W3), the normals drawn in the plain order.
func (k *Midpoint) firstMetric(g []float64) {
	m, p := k.pc.metric, k.dim
	w1, w2, w3, cg := k.pc.tmp[:p], k.pc.tmp[p:2*p], k.pc.tmp[2*p:3*p], k.pc.tmp[3*p:4*p]
	h, u, e, b := k.h, k.u, k.e, k.b
	for c := range k.chains {
		a := k.rng.Float64() * h
		s0 := newKineticCoef(2, u, a)
		s1 := newKineticCoef(2, u, h-a)
		k.cx[c] = u * h * s1.c
		k.cv[c] = u * h * s1.e
		for i := range w1 {
			z1 := k.rng.NormFloat64()
			z2 := k.rng.NormFloat64()
			z3 := k.rng.NormFloat64()
			z4 := k.rng.NormFloat64()
			w1[i], w2[i], w3[i] = midpointNoise(&s0, &s1, z1, z2, z3, z4)
		}
		m.ApplyFactor(w1, w1)
		m.ApplyFactor(w2, w2)
		m.ApplyFactor(w3, w3)
		lo, hi := c*p, (c+1)*p
		m.Apply(cg, g[lo:hi])
		x, v := k.x[lo:hi], k.v[lo:hi]
		xm, xn, vn := k.xmid[lo:hi], k.xnext[lo:hi], k.vnext[lo:hi]
		for i, xi := range x {
			vi := v[i]
			xm[i] = xi + s0.c*vi + s0.ax*cg[i] + w1[i]
			xn[i] = xi + b*vi + w2[i]
			vn[i] = e*vi + w3[i]
		}
	}
}

// midpointNoise returns (W1, W2, W3) from four standard normals, given
// the frozen-force kinetic steps s0 over [0, a] and s1 over [a, h] with
// friction 2: (X0, V0) from z1, z2 by s0's factor, (X1, V1) from z3, z4 by
// s1's, W1 = X0, W2 = X0 + X1 + s1.c·V0, W3 = s1.e·V0 + V1 (s1.c =
// ½(1 − e^{−2(h−a)}), s1.e = e^{−2(h−a)}).
func midpointNoise(s0, s1 *kineticCoef, z1, z2, z3, z4 float64) (w1, w2, w3 float64) {
	x0 := s0.l11 * z1
	v0 := s0.l21*z1 + s0.l22*z2
	x1 := s1.l11 * z3
	v1 := s1.l21*z3 + s1.l22*z4
	return x0, x0 + x1 + s1.c*v0, s1.e*v0 + v1
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// step, inverse mass, completed steps, the within-step phase, positions,
// velocities, between the two requests of a step the midpoints and
// partial updates, and the random stream's state.
func (k *Midpoint) MarshalBinary() ([]byte, error) {
	w := newStateWriter("Midpoint")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("h", k.h)
	w.floats("u", k.u)
	w.ints("steps", k.steps)
	w.flag("mid", k.mid)
	w.floats("x", k.x...)
	w.floats("v", k.v...)
	if k.mid {
		w.floats("xmid", k.xmid...)
		w.floats("xnext", k.xnext...)
		w.floats("vnext", k.vnext...)
		w.floats("cx", k.cx...)
		w.floats("cv", k.cv...)
	}
	writeMetric(w, "metric", k.pc.metric)
	w.flag("pending", k.pendingSet)
	writeMetric(w, "pendingmetric", k.pending)
	w.stream("rng", k.src)
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension, number of chains and the phase within
// a step.
func (k *Midpoint) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "Midpoint")
	if err != nil {
		return err
	}
	dim, chains := r.shape()
	n := dim * chains
	m := Midpoint{dim: dim, chains: chains, h: r.float("h"), u: r.float("u"), steps: r.integer("steps"), mid: r.flag("mid")}
	m.x, m.v = r.floats("x", n), r.floats("v", n)
	if m.mid {
		m.xmid, m.xnext, m.vnext = r.floats("xmid", n), r.floats("xnext", n), r.floats("vnext", n)
		m.cx, m.cv = r.floats("cx", chains), r.floats("cv", chains)
	}
	metric := readMetric(r, "metric", dim)
	m.pendingSet = r.flag("pending")
	m.pending = readMetric(r, "pendingmetric", dim)
	m.src = r.stream("rng")
	if err := r.check(m.steps >= 0 && positive(m.h) && positive(m.u) && (m.mid || !m.pendingSet), "step, inverse mass, step count or phase"); err != nil {
		return err
	}
	m.pc.set("Midpoint", metric, dim, 4*dim)
	m.init()
	*k = m
	return nil
}

// OverdampedMidpoint is the randomised midpoint method for overdamped
// Langevin dθ = ∇log π(θ) dt + √2 dB (RLMC; Shen & Lee, NeurIPS 2019;
// the Brownian coupling derived here) over a batch of chains. Each step draws α ~ U[0, 1) per
// chain and, with G(·) = ∇log π(·) and z1, z2 ~ N(0, 1) per coordinate,
//
//	B_{αh} = √(αh)·z1,   B_h = B_{αh} + √((1 − α)h)·z2
//	y      = θ + αh·G(θ) + √2·B_{αh}
//	θ'     = θ + h·G(y) + √2·B_h
//
// (one Brownian path: the two noises are correlated). A step is two
// requests, all chains in each: the gradient at every chain's position
// (Tell returns false), then at every chain's midpoint y (Tell returns
// true). Per chain the stream gives α, then z1, z2 for each coordinate in
// turn, chain by chain, during the first Tell of the step.
type OverdampedMidpoint struct {
	dim, chains  int
	h            float64
	hmid         float64 // the step of the step in progress (set by its first Tell)
	steps        int
	mid          bool      // the step's first Tell is done; the midpoints are requested
	x            []float64 // chains×dim positions at the last completed step
	y, xnext     []float64 // within a step: midpoints and θ + √2·B_h
	reqX, reqMid Request
	src          *rand.PCG
	rng          *rand.Rand
	pc           precond
	pending      *Metric // set between the two requests of a step
	pendingSet   bool
}

var (
	_ Kernel     = (*OverdampedMidpoint)(nil)
	_ MetricUser = (*OverdampedMidpoint)(nil)
)

// SetMetric implements MetricUser: from the next step (a metric set
// between the two requests of a step waits for the step to complete),
// with C = L·Lᵀ,
//
//	y  = θ + αh·C·G(θ) + √2·L·B_{αh}
//	θ' = θ + h·C·G(y) + √2·L·B_h,
//
// the method run on L⁻¹θ (derived here by that change of variables).
func (k *OverdampedMidpoint) SetMetric(m *Metric) {
	m = checkMetric("OverdampedMidpoint", m, k.dim)
	if k.mid {
		k.pending, k.pendingSet = m, true
		return
	}
	k.pc.set("OverdampedMidpoint", m, k.dim, 3*k.dim)
}

// Metric implements MetricUser: the metric of the next step.
func (k *OverdampedMidpoint) Metric() *Metric {
	if k.pendingSet {
		return orIdentity(k.pending, k.dim)
	}
	return orIdentity(k.pc.metric, k.dim)
}

// NewOverdampedMidpoint returns an OverdampedMidpoint kernel for chains
// chains in dimension dim with step h, started at start (chains×dim
// values, or dim values shared by every chain), drawing α and the noise
// from src. It panics on a non-positive or non-finite h or a start of the
// wrong length.
func NewOverdampedMidpoint(dim, chains int, h float64, start []float64, src *rand.PCG) *OverdampedMidpoint {
	if dim < 1 || chains < 1 {
		panic(fmt.Sprintf("kernels: OverdampedMidpoint with dim %d, chains %d", dim, chains))
	}
	if !positive(h) {
		panic(fmt.Sprintf("kernels: OverdampedMidpoint step %v", h))
	}
	k := &OverdampedMidpoint{dim: dim, chains: chains, h: h, x: broadcastStart(start, dim, chains), src: src}
	k.init()
	return k
}

func (k *OverdampedMidpoint) init() {
	n := k.dim * k.chains
	k.rng = rand.New(k.src)
	if k.y == nil {
		k.y, k.xnext = make([]float64, n), make([]float64, n)
	}
	idx := chainIndex(k.chains)
	k.reqX = Request{Need: NeedGradient, Rows: k.chains, Points: k.x, Chain: idx}
	k.reqMid = Request{Need: NeedGradient, Rows: k.chains, Points: k.y, Chain: idx}
}

// Dim implements Kernel.
func (k *OverdampedMidpoint) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *OverdampedMidpoint) Chains() int { return k.chains }

// Steps implements Kernel.
func (k *OverdampedMidpoint) Steps() int { return k.steps }

// Step returns the step size h.
func (k *OverdampedMidpoint) Step() float64 { return k.h }

// SetStep changes the step size h from the next step: a step whose
// midpoints are already out finishes with the step it started with. It
// panics on a non-positive or non-finite h.
func (k *OverdampedMidpoint) SetStep(h float64) {
	if !positive(h) {
		panic(fmt.Sprintf("kernels: OverdampedMidpoint step %v", h))
	}
	k.h = h
}

// EvaluationsPerStep implements Kernel: two gradients per chain.
func (k *OverdampedMidpoint) EvaluationsPerStep() int { return 2 * k.chains }

// Positions implements Kernel: the positions at the last completed step
// (also between the two requests of a step).
func (k *OverdampedMidpoint) Positions() []float64 { return k.x }

// Next implements Kernel: the gradient at every chain's position, then at
// every chain's midpoint.
func (k *OverdampedMidpoint) Next() *Request {
	if k.mid {
		return &k.reqMid
	}
	return &k.reqX
}

// Tell implements Kernel. The first call of a step draws α and the noise
// and sets the midpoints; the second completes the step.
func (k *OverdampedMidpoint) Tell(a *Answer) bool {
	n := len(k.x)
	if len(a.Grad) < n {
		panic(fmt.Sprintf("kernels: OverdampedMidpoint answer has %d gradient values, want %d", len(a.Grad), n))
	}
	g := a.Grad[:n]
	if k.mid {
		h := k.hmid
		xn := k.xnext[:n]
		if m := k.pc.metric; m != nil {
			p := k.dim
			cg := k.pc.tmp[2*p : 3*p]
			for c := range k.chains {
				lo := c * p
				m.Apply(cg, g[lo:lo+p])
				for i := range cg {
					k.x[lo+i] = xn[lo+i] + h*cg[i]
				}
			}
		} else {
			for i := range k.x {
				k.x[i] = xn[i] + h*g[i]
			}
		}
		k.mid = false
		k.steps++
		if k.pendingSet {
			k.pendingSet = false
			k.pc.set("OverdampedMidpoint", k.pending, k.dim, 3*k.dim)
			k.pending = nil
		}
		return true
	}
	h := k.h
	k.hmid = h
	y, xn := k.y[:n], k.xnext[:n]
	if m := k.pc.metric; m != nil {
		p := k.dim
		b1, bh, cg := k.pc.tmp[:p], k.pc.tmp[p:2*p], k.pc.tmp[2*p:3*p]
		for c := range k.chains {
			alpha := k.rng.Float64()
			ah := alpha * h
			s1, s2 := math.Sqrt(ah), math.Sqrt(h-ah)
			for i := range b1 {
				b1[i] = s1 * k.rng.NormFloat64()
				bh[i] = b1[i] + s2*k.rng.NormFloat64()
			}
			m.ApplyFactor(b1, b1)
			m.ApplyFactor(bh, bh)
			lo := c * p
			m.Apply(cg, g[lo:lo+p])
			for i := range cg {
				xi := k.x[lo+i]
				y[lo+i] = xi + ah*cg[i] + math.Sqrt2*b1[i]
				xn[lo+i] = xi + math.Sqrt2*bh[i]
			}
		}
		k.mid = true
		return false
	}
	for c := range k.chains {
		alpha := k.rng.Float64()
		ah := alpha * h
		s1, s2 := math.Sqrt(ah), math.Sqrt(h-ah)
		for i := c * k.dim; i < (c+1)*k.dim; i++ {
			b1 := s1 * k.rng.NormFloat64()
			bh := b1 + s2*k.rng.NormFloat64()
			xi := k.x[i]
			y[i] = xi + ah*g[i] + math.Sqrt2*b1
			xn[i] = xi + math.Sqrt2*bh
		}
	}
	k.mid = true
	return false
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// step, completed steps, the within-step phase, positions, between the two
// requests of a step the midpoints and partial updates, and the random
// stream's state.
func (k *OverdampedMidpoint) MarshalBinary() ([]byte, error) {
	w := newStateWriter("OverdampedMidpoint")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("h", k.h)
	w.ints("steps", k.steps)
	w.flag("mid", k.mid)
	w.floats("x", k.x...)
	if k.mid {
		w.floats("y", k.y...)
		w.floats("xnext", k.xnext...)
		if k.hmid != k.h {
			w.floats("hmid", k.hmid)
		}
	}
	writeMetric(w, "metric", k.pc.metric)
	w.flag("pending", k.pendingSet)
	writeMetric(w, "pendingmetric", k.pending)
	w.stream("rng", k.src)
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension, number of chains and the phase within
// a step.
func (k *OverdampedMidpoint) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "OverdampedMidpoint")
	if err != nil {
		return err
	}
	dim, chains := r.shape()
	n := dim * chains
	m := OverdampedMidpoint{dim: dim, chains: chains, h: r.float("h"), steps: r.integer("steps"), mid: r.flag("mid")}
	m.x = r.floats("x", n)
	if m.mid {
		m.y, m.xnext = r.floats("y", n), r.floats("xnext", n)
		m.hmid = m.h
		if r.has("hmid") {
			m.hmid = r.float("hmid")
		}
	}
	metric := readMetric(r, "metric", dim)
	m.pendingSet = r.flag("pending")
	m.pending = readMetric(r, "pendingmetric", dim)
	m.src = r.stream("rng")
	if err := r.check(m.steps >= 0 && positive(m.h) && (!m.mid || positive(m.hmid)) && (m.mid || !m.pendingSet), "step, step count or phase"); err != nil {
		return err
	}
	m.pc.set("OverdampedMidpoint", metric, dim, 3*dim)
	m.init()
	*k = m
	return nil
}
