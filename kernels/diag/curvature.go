package diag

import (
	"errors"
	"fmt"
	"math"
)

// Secant holds the three curvature ratios of one pair of points x ≠ y
// (standard convex analysis, derived here). With the
// potential f = −log π, s = x − y and y_g = ∇f(x) − ∇f(y):
//
//	r_in   = ⟨y_g, s⟩ / ‖s‖²
//	r_norm = ‖y_g‖ / ‖s‖
//	r_coc  = ‖y_g‖² / ⟨y_g, s⟩          (only when ⟨y_g, s⟩ > 0)
//
// With H̄ the mean Hessian of f on the segment [x, y] (y_g = H̄s): if
// m·I ⪯ H̄ ⪯ M·I, then r_in ∈ [m, M] and |r_norm| ≤ max(|m|, |M|) for any
// f, and r_coc ∈ [m, M] only when m ≥ 0 (H̄ positive semi-definite); in
// that case r_in ≤ r_norm ≤ r_coc. A negative r_in proves f is not convex
// there.
type Secant struct {
	In   float64 // r_in; NaN when x = y
	Norm float64 // r_norm; NaN when x = y
	Coc  float64 // r_coc; NaN unless ⟨y_g, s⟩ > 0
}

// SecantRatios returns the ratios of the pair (x, y) from the gradients of
// log π at the two points, scoreX = ∇log π(x) and scoreY = ∇log π(y), as a
// client sends them: the potential's gradients are their negatives, so
// y_g = scoreY − scoreX. All four slices must have the same length.
func SecantRatios(x, y, scoreX, scoreY []float64) Secant {
	p := len(x)
	if len(y) != p || len(scoreX) != p || len(scoreY) != p {
		panic(fmt.Sprintf("diag: secant ratios on slices of lengths %d, %d, %d, %d", len(x), len(y), len(scoreX), len(scoreY)))
	}
	var ss, gs, gg float64 // ‖s‖², ⟨y_g, s⟩, ‖y_g‖²
	for i := range x {
		s := x[i] - y[i]
		g := scoreY[i] - scoreX[i]
		ss += s * s
		gs += g * s
		gg += g * g
	}
	out := Secant{In: math.NaN(), Norm: math.NaN(), Coc: math.NaN()}
	if ss > 0 {
		out.In = gs / ss
		out.Norm = math.Sqrt(gg / ss)
	}
	if gs > 0 {
		out.Coc = gg / gs
	}
	return out
}

// CurvatureBounds accumulates the one-sided curvature certificates of the
// pairs of points a session has already evaluated (standard convex
// analysis, derived here; see Secant). Over all pairs added,
//
//	M ≥ LipschitzFloor   = max r_norm     (any f: ‖H̄s‖ ≤ ‖H̄‖·‖s‖)
//	M ≥ max r_coc                          (only where H̄ ⪰ 0 on the segment)
//	m ≤ ConvexityCeiling = min r_in       (Rayleigh quotient of the mean Hessian)
//
// with M the Lipschitz constant of ∇f (the largest |eigenvalue| of ∇²f)
// and H̄ = ∫₀¹ ∇²f(y + t(x − y)) dt the segment's mean Hessian, so that
// y_g = H̄s. The co-coercivity ratio is a floor on M only when H̄ is
// positive semi-definite (then H̄² ⪯ ‖H̄‖·H̄, so ‖H̄s‖² ≤ M·sᵀH̄s); on a
// non-convex potential a segment whose H̄ is indefinite can have
// sᵀH̄s > 0 but tiny and an r_coc far above M (an equal mixture of
// N(±2·1, I) in 4-D gives ratios above 40 where M = 15). A pair with
// r_in < 0 proves non-convexity; from then on SmoothnessFloor reports the
// largest r_norm seen over all pairs, never r_coc. No finite set of pairs
// can bound M from above or m from below. Gradients must be exact, or
// taken on the same minibatch at both points: independent noise of
// variance σ² per coordinate on each gradient adds 2pσ² to E‖y_g‖² and
// inflates every ratio; so do pairs closer together than the gradients'
// own precision resolves. Pairs of consecutive Langevin iterates probe
// mostly random directions, whose ratios concentrate near tr(∇²f)/p: use
// CurvatureProbe for M.
//
// The zero value is ready to use. A CurvatureBounds is not safe for
// concurrent use.
type CurvatureBounds struct {
	pairs, skipped int
	cocPairs       int
	maxCoc, minIn  float64
	maxNorm        float64
	nonConvex      bool
}

// Add takes one pair of points with the gradients of log π at them,
// scoreX = ∇log π(x) and scoreY = ∇log π(y) (not of the potential f), and
// returns the pair's ratios. A pair with x = y or non-finite ratios is
// counted as skipped. Slices of different lengths panic.
func (c *CurvatureBounds) Add(x, y, scoreX, scoreY []float64) Secant {
	r := SecantRatios(x, y, scoreX, scoreY)
	if math.IsNaN(r.In) || math.IsInf(r.In, 0) || math.IsInf(r.Norm, 0) || math.IsNaN(r.Norm) {
		c.skipped++
		return r
	}
	if c.pairs == 0 || r.In < c.minIn {
		c.minIn = r.In
	}
	c.maxNorm = math.Max(c.maxNorm, r.Norm)
	c.pairs++
	if r.In < 0 {
		c.nonConvex = true
	}
	if !math.IsNaN(r.Coc) && !math.IsInf(r.Coc, 0) {
		if c.cocPairs == 0 || r.Coc > c.maxCoc {
			c.maxCoc = r.Coc
		}
		c.cocPairs++
	}
	return r
}

// Pairs returns the number of pairs used.
func (c *CurvatureBounds) Pairs() int { return c.pairs }

// Skipped returns the number of pairs left out (x = y or non-finite).
func (c *CurvatureBounds) Skipped() int { return c.skipped }

// SmoothnessFloor returns the best lower bound on M the pairs give: the
// largest r_coc seen while every pair has been consistent with a convex
// potential (a floor on M if the potential is convex), and the largest
// r_norm seen (LipschitzFloor, a floor on M in any case) as soon as a
// pair has shown non-convexity. NaN until a pair has been used (or, for
// the convex case, until a pair with ⟨y_g, s⟩ > 0 has been added).
// Callers that cannot assume convexity call LipschitzFloor.
func (c *CurvatureBounds) SmoothnessFloor() float64 {
	if c.nonConvex {
		return c.LipschitzFloor()
	}
	if c.cocPairs == 0 {
		return math.NaN()
	}
	return c.maxCoc
}

// LipschitzFloor returns the largest r_norm = ‖y_g‖/‖s‖ seen: a lower
// bound on the Lipschitz constant of ∇log π whatever the shape of π,
// since ‖y_g‖ = ‖H̄s‖ ≤ sup‖∇²f‖·‖s‖. NaN until a pair has been used.
func (c *CurvatureBounds) LipschitzFloor() float64 {
	if c.pairs == 0 {
		return math.NaN()
	}
	return c.maxNorm
}

// ConvexityCeiling returns the smallest r_in seen, an upper bound on the
// strong convexity constant m; NaN until a pair has been used. A negative
// value means the potential is not convex (see NonConvex).
func (c *CurvatureBounds) ConvexityCeiling() float64 {
	if c.pairs == 0 {
		return math.NaN()
	}
	return c.minIn
}

// NonConvex reports whether some pair had r_in < 0, which proves that the
// potential −log π is not convex. Bounds that assume convexity (step
// sizes or error bounds from an estimated m or M) should be withheld once
// it is true.
func (c *CurvatureBounds) NonConvex() bool { return c.nonConvex }

// CurvatureProbe runs power iteration for an extreme eigenvalue of the
// Hessian H = ∇²f of the potential f = −log π at a fixed point θ, with
// forward-difference Hessian-vector products from gradients only
// (standard convex analysis, derived here):
//
//	Hv ≈ (∇f(θ + εv) − ∇f(θ)) / ε,   ‖v‖ = 1
//	estimate_k = vᵀHv,   then v ← Av/‖Av‖
//
// with A = H for the largest eigenvalue (NewLargestCurvature: estimates
// rise toward M from below, the Rayleigh quotient never exceeds λ_max) and
// A = σI − H for the smallest (NewSmallestCurvature, σ ≥ λ_max, e.g. a
// power-iteration M̂ times a safety factor: estimates fall toward m). Power
// iteration converges to the eigenvalue of A of largest magnitude, at the
// rate of the ratio of its two largest eigenvalues (squared for the
// Rayleigh quotient); v₀ must not be orthogonal to the wanted eigenvector.
// The forward difference adds an error of order ε·‖∇³f‖ (none for a
// quadratic) and a rounding error of order u·‖∇f‖/ε.
//
// It is an ask/tell state machine, so a session can run it through its
// client: Next returns the point at which the gradient of log π is wanted,
// Tell gives that gradient (∇log π, as clients send it: the probe negates
// it). Each iteration costs one extra gradient evaluation, plus one for
// ∇log π(θ) unless the caller already has it. Evaluations counts them.
// A CurvatureProbe is not safe for concurrent use.
type CurvatureProbe struct {
	theta    []float64
	gradF    []float64 // ∇f(θ) = −∇log π(θ), once known
	haveBase bool
	v, point []float64
	hv       []float64
	eps      float64
	shift    float64
	smallest bool
	estimate float64
	iters    int
	evals    int
}

// NewLargestCurvature returns a probe for the largest eigenvalue of
// ∇²(−log π)(θ). scoreTheta is ∇log π(θ) if the caller has it, else nil
// (the probe then asks for it first). v0 is the starting direction (any
// nonzero length-p vector; nil means (1, …, 1)/√p), eps > 0 the difference
// step along the unit direction. The probe copies its inputs. It panics on
// wrong lengths, a zero v0 or a non-positive eps.
func NewLargestCurvature(theta, scoreTheta, v0 []float64, eps float64) *CurvatureProbe {
	return newProbe(theta, scoreTheta, v0, eps, 0, false)
}

// NewSmallestCurvature returns a probe for the smallest eigenvalue of
// ∇²(−log π)(θ) by power iteration on shift·I − ∇²f, where shift is at
// least the largest eigenvalue (a power-iteration estimate of M times a
// safety factor). Its estimates are Rayleigh quotients vᵀ∇²f v of the
// Hessian itself. The other arguments are as for NewLargestCurvature.
func NewSmallestCurvature(theta, scoreTheta, v0 []float64, eps, shift float64) *CurvatureProbe {
	if math.IsNaN(shift) || math.IsInf(shift, 0) {
		panic(fmt.Sprintf("diag: curvature probe shift %v", shift))
	}
	return newProbe(theta, scoreTheta, v0, eps, shift, true)
}

func newProbe(theta, scoreTheta, v0 []float64, eps, shift float64, smallest bool) *CurvatureProbe {
	p := len(theta)
	if p == 0 || (scoreTheta != nil && len(scoreTheta) != p) || (v0 != nil && len(v0) != p) {
		panic(fmt.Sprintf("diag: curvature probe with θ, score, v₀ of lengths %d, %d, %d", p, len(scoreTheta), len(v0)))
	}
	if !(eps > 0) || math.IsInf(eps, 1) {
		panic(fmt.Sprintf("diag: curvature probe step %v", eps))
	}
	pr := &CurvatureProbe{
		theta: append([]float64(nil), theta...),
		gradF: make([]float64, p),
		v:     make([]float64, p), point: make([]float64, p), hv: make([]float64, p),
		eps: eps, shift: shift, smallest: smallest, estimate: math.NaN(),
	}
	if v0 == nil {
		for i := range pr.v {
			pr.v[i] = 1
		}
	} else {
		copy(pr.v, v0)
	}
	n := euclidNorm(pr.v)
	if !(n > 0) || math.IsInf(n, 0) {
		panic("diag: curvature probe needs a nonzero finite starting direction")
	}
	for i := range pr.v {
		pr.v[i] /= n
	}
	if scoreTheta != nil {
		for i, g := range scoreTheta {
			pr.gradF[i] = -g
		}
		pr.haveBase = true
	}
	pr.setPoint()
	return pr
}

func (pr *CurvatureProbe) setPoint() {
	if !pr.haveBase {
		copy(pr.point, pr.theta)
		return
	}
	for i, t := range pr.theta {
		pr.point[i] = t + pr.eps*pr.v[i]
	}
}

// Next returns the point at which the probe wants ∇log π next: θ itself
// first if the probe was built without its gradient, then θ + εv. The
// slice belongs to the probe and is valid until the next Tell; calling
// Next again before Tell returns the same point.
func (pr *CurvatureProbe) Next() []float64 { return pr.point }

// Tell gives the probe ∇log π at the point last returned by Next. It
// returns an error, and leaves the probe unchanged apart from the count of
// evaluations, if the gradient is not finite or the new direction is zero
// (Av = 0: the iteration cannot continue). A gradient of the wrong length
// panics.
func (pr *CurvatureProbe) Tell(score []float64) error {
	if len(score) != len(pr.theta) {
		panic(fmt.Sprintf("diag: curvature probe told %d gradient values, want %d", len(score), len(pr.theta)))
	}
	pr.evals++
	for _, g := range score {
		if math.IsNaN(g) || math.IsInf(g, 0) {
			return errors.New("diag: curvature probe given a non-finite gradient")
		}
	}
	if !pr.haveBase {
		for i, g := range score {
			pr.gradF[i] = -g
		}
		pr.haveBase = true
		pr.setPoint()
		return nil
	}
	var rq float64
	for i, g := range score {
		pr.hv[i] = (-g - pr.gradF[i]) / pr.eps
		rq += pr.v[i] * pr.hv[i]
	}
	if pr.smallest {
		for i := range pr.hv {
			pr.hv[i] = pr.shift*pr.v[i] - pr.hv[i]
		}
	}
	n := euclidNorm(pr.hv)
	if !(n > 0) || math.IsInf(n, 0) {
		return errors.New("diag: curvature probe direction vanished (Av = 0)")
	}
	for i := range pr.v {
		pr.v[i] = pr.hv[i] / n
	}
	pr.estimate = rq
	pr.iters++
	pr.setPoint()
	return nil
}

// Estimate returns the latest Rayleigh quotient vᵀ∇²f v, the estimate of
// the wanted eigenvalue; NaN before the first iteration.
func (pr *CurvatureProbe) Estimate() float64 { return pr.estimate }

// Iterations returns the number of completed power iterations.
func (pr *CurvatureProbe) Iterations() int { return pr.iters }

// Evaluations returns the number of gradients the probe has been told,
// all of them extra evaluations beyond the run's own.
func (pr *CurvatureProbe) Evaluations() int { return pr.evals }

// Direction returns the current unit direction v (the probe's slice, valid
// until the next Tell).
func (pr *CurvatureProbe) Direction() []float64 { return pr.v }

func euclidNorm(v []float64) float64 {
	var s float64
	for _, x := range v {
		s += x * x
	}
	return math.Sqrt(s)
}
