package targets

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Gaussian is N(mean, Q⁻¹) given its precision matrix Q (symmetric positive
// definite). It is immutable and safe for concurrent use.
type Gaussian struct {
	p       int
	mean    []float64
	q       []float64 // full p×p precision, row-major
	cov     *mat.SymDense
	logZ    float64 // −(p/2)·log 2π + ½·log det Q
	m, bigM float64
}

var _ Target = (*Gaussian)(nil)

// NewGaussian returns N(mean, precision⁻¹). It returns an error if the
// precision is nil, its size differs from len(mean), mean is empty, any
// entry is non-finite, or the precision is not positive definite (its
// Cholesky factorisation fails). The inputs are copied.
func NewGaussian(mean []float64, precision *mat.SymDense) (*Gaussian, error) {
	if precision == nil {
		return nil, errors.New("targets: nil precision matrix")
	}
	p := len(mean)
	if p == 0 {
		return nil, errors.New("targets: empty mean")
	}
	if precision.IsEmpty() || precision.SymmetricDim() != p {
		return nil, fmt.Errorf("targets: precision is %d×%d, mean has length %d",
			precision.SymmetricDim(), precision.SymmetricDim(), p)
	}
	if !allFinite(mean) {
		return nil, errors.New("targets: mean has a non-finite entry")
	}
	q := make([]float64, p*p)
	for i := range p {
		for j := range p {
			v := precision.At(i, j)
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return nil, fmt.Errorf("targets: precision entry (%d,%d) is not finite", i, j)
			}
			q[i*p+j] = v
		}
	}
	var chol mat.Cholesky
	if !chol.Factorize(precision) {
		return nil, errors.New("targets: precision is not positive definite (Cholesky failed)")
	}
	var eig mat.EigenSym
	if !eig.Factorize(precision, false) {
		return nil, errors.New("targets: eigendecomposition of the precision failed")
	}
	vals := eig.Values(nil) // ascending
	if !(vals[0] > 0) {
		return nil, fmt.Errorf("targets: precision has smallest eigenvalue %g, not positive definite", vals[0])
	}
	cov := mat.NewSymDense(p, nil)
	if err := chol.InverseTo(cov); err != nil {
		return nil, fmt.Errorf("targets: inverting the precision: %w", err)
	}
	return &Gaussian{
		p:    p,
		mean: append([]float64(nil), mean...),
		q:    q,
		cov:  cov,
		logZ: -0.5*float64(p)*math.Log(2*math.Pi) + 0.5*chol.LogDet(),
		m:    vals[0],
		bigM: vals[p-1],
	}, nil
}

// Dim returns p.
func (g *Gaussian) Dim() int { return g.p }

// Mean returns a copy of μ.
func (g *Gaussian) Mean() []float64 { return append([]float64(nil), g.mean...) }

// Covariance returns Q⁻¹ as a new matrix.
func (g *Gaussian) Covariance() *mat.SymDense {
	c := mat.NewSymDense(g.p, nil)
	c.CopySym(g.cov)
	return c
}

// Precision returns a copy of Q.
func (g *Gaussian) Precision() *mat.SymDense {
	c := mat.NewSymDense(g.p, nil)
	for i := range g.p {
		for j := i; j < g.p; j++ {
			c.SetSym(i, j, g.q[i*g.p+j])
		}
	}
	return c
}

// LogDensity is the normalised log density
//
//	−½(x−μ)ᵀQ(x−μ) − (p/2)·log 2π + ½·log det Q.
//
// It panics if len(x) != Dim and allocates nothing.
func (g *Gaussian) LogDensity(x []float64) float64 {
	p := g.p
	checkPoint(x, p)
	var quad float64
	for i := range p {
		row := g.q[i*p : (i+1)*p : (i+1)*p]
		quad += (x[i] - g.mean[i]) * dotDiff(row, x, g.mean)
	}
	return -0.5*quad + g.logZ
}

// GradLogDensity writes −Q(x−μ) into dst. It panics if len(dst) or len(x)
// is not Dim or if dst and x start at the same element; it allocates
// nothing.
func (g *Gaussian) GradLogDensity(dst, x []float64) {
	p := g.p
	checkGrad(dst, x, p)
	for i := range p {
		row := g.q[i*p : (i+1)*p : (i+1)*p]
		dst[i] = -dotDiff(row, x, g.mean)
	}
}

// Curvature returns m = λ_min(Q) and M = λ_max(Q), computed once by the
// constructor (gonum mat.EigenSym).
func (g *Gaussian) Curvature() (m, M float64) { return g.m, g.bigM }
