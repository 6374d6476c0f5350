package session

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"

	"sluice/kernels"
)

// Stability of a kernel's step on the stiffest direction seen. On a
// Gaussian direction with curvature λ (potential λx²/2) every gradient
// kernel here is a linear recursion in its state, s' = A·s + noise, with A
// random for the randomised midpoint kernels. Its second moment grows
// without bound exactly when the spectral radius of E[A ⊗ A] is ≥ 1
// (mean-square stability of a random linear recursion; standard, derived
// here for each kernel's A below). growth returns that spectral radius
// (for a deterministic A, ρ(A)²); the chains are unstable at ≥ 1.
//
//	lmc, sgld, svrg, sgld-cv: A = 1 − hλ                 (stable iff hλ < 2)
//	midpoint-overdamped:      A = 1 − hλ + α(hλ)²,  α ~ U[0, 1)
//	kinetic:                  A from Kinetic's step with G = −λx (friction γ, inverse mass u)
//	baoab:                    A from the BAOAB step with G = −λx (stable iff ω·h < 2, ω = √(uλ))
//	midpoint:                 A(α) from Midpoint's step with G = −λx (γ = 2, inverse mass u)
//
// MALA and the Ozaki kernels are exempt (MALA's accept/reject step keeps
// π invariant whatever the step; Ozaki's step is exact on a Gaussian);
// hit-and-run and rejection take no step.
type stabilityRule struct {
	// matrix fills A for step h, curvature λ and midpoint fraction α
	// (ignored by deterministic kernels); n is the state size (1 or 2).
	n      int
	random bool
	matrix func(h, lambda, alpha float64, a []float64)
	source string
}

// stabilityRuleOf returns the rule of the named kernel (by the tuning
// rule its registry entry declares); false when it is exempt.
func stabilityRuleOf(name string, k kernels.Kernel) (stabilityRule, bool) {
	e, ok := lookupKernel(name)
	if !ok {
		return stabilityRule{}, false
	}
	gamma, u := 2.0, 1.0
	if kk, ok := k.(kernels.Massive); ok {
		u = kk.InverseMass()
	}
	if kk, ok := k.(kernels.Damped); ok {
		gamma = kk.Friction()
	}
	return stabilityRuleFor(e.tuning, gamma, u)
}

// stabilityRuleFor returns the rule of a kernel with tuning rule r,
// friction gamma and inverse mass u (the kinetic kernels'; the midpoint
// kernel's friction is 2); false when it is exempt.
func stabilityRuleFor(r tuneRule, gamma, u float64) (stabilityRule, bool) {
	switch r {
	case ruleOverdamped:
		return stabilityRule{n: 1, source: "the recursion multiplies by 1 − hM, stable only for hM < 2",
			matrix: func(h, l, _ float64, a []float64) { a[0] = 1 - h*l }}, true
	case ruleOverdampedMidpoint:
		return stabilityRule{n: 1, random: true, source: "the randomised midpoint recursion's mean-square growth",
			matrix: func(h, l, al float64, a []float64) { t := h * l; a[0] = 1 - t + al*t*t }}, true
	case ruleKinetic:
		return stabilityRule{n: 2, source: fmt.Sprintf("the kinetic step's growth with friction %.3g and inverse mass %.3g", gamma, u),
			matrix: func(h, l, _ float64, a []float64) {
				e := math.Exp(-gamma * h)
				c := (1 - e) / gamma
				lu := l * u
				a[0], a[1] = 1-(lu/gamma)*(h-c), c
				a[2], a[3] = -lu*c, e
			}}, true
	case ruleSplitting:
		return stabilityRule{n: 2, source: fmt.Sprintf("the BAOAB step's growth with friction %.3g and inverse mass %.3g, stable only for ω·h < 2 with ω = √(u·M)", gamma, u),
			matrix: func(h, l, _ float64, a []float64) {
				_, _, m := baoabScheme(h, gamma, u)(l)
				a[0], a[1], a[2], a[3] = m[0][0], m[0][1], m[1][0], m[1][1]
			}}, true
	case ruleMidpoint:
		return stabilityRule{n: 2, random: true, source: fmt.Sprintf("the randomised midpoint step's mean-square growth with inverse mass %.3g", u),
			matrix: func(h, l, al float64, a []float64) {
				lu := l * u
				at := al * h
				a1 := (1 - math.Exp(-2*at)) / 2
				// x_mid = (1 − (lu/2)(at − a1))·x + a1·v
				mx, mv := 1-(lu/2)*(at-a1), a1
				g := lu * h * (1 - math.Exp(-2*(h-at))) / 2
				w := lu * h * math.Exp(-2*(h-at))
				a[0], a[1] = 1-g*mx, (1-math.Exp(-2*h))/2-g*mv
				a[2], a[3] = -w*mx, math.Exp(-2*h)-w*mv
			}}, true
	}
	return stabilityRule{}, false
}

// growth is the spectral radius of E[A ⊗ A] at step h and curvature λ
// (the midpoint fraction averaged by the 32-point midpoint rule).
func (r stabilityRule) growth(h, lambda float64) float64 {
	n := r.n
	nodes := 1
	if r.random {
		nodes = 32
	}
	a := make([]float64, n*n)
	kron := mat.NewDense(n*n, n*n, nil)
	for q := range nodes {
		al := (float64(q) + 0.5) / float64(nodes)
		r.matrix(h, lambda, al, a)
		for i := range n {
			for j := range n {
				for k := range n {
					for l := range n {
						kron.Set(i*n+k, j*n+l, kron.At(i*n+k, j*n+l)+a[i*n+j]*a[k*n+l]/float64(nodes))
					}
				}
			}
		}
	}
	if n == 1 {
		return math.Abs(kron.At(0, 0))
	}
	var eig mat.Eigen
	if !eig.Factorize(kron, mat.EigenNone) {
		return math.NaN()
	}
	var rho float64
	for _, v := range eig.Values(nil) {
		rho = math.Max(rho, math.Hypot(real(v), imag(v)))
	}
	return rho
}

// largestStable is the largest step at which growth stays below 1 for
// curvature λ, by bisection from 0 (where every rule is stable) up to the
// first unstable step found by doubling from 1/λ.
func (r stabilityRule) largestStable(lambda float64) float64 {
	lo, hi := 0.0, 1/lambda
	for i := 0; r.growth(hi, lambda) < 1; i++ {
		if i > 60 {
			return math.Inf(1)
		}
		lo, hi = hi, 2*hi
	}
	for range 60 {
		mid := (lo + hi) / 2
		if r.growth(mid, lambda) < 1 {
			lo = mid
		} else {
			hi = mid
		}
	}
	return lo
}
