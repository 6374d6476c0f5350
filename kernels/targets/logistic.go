package targets

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
)

// Logistic is Bayesian logistic regression: y_i ∈ {0,1},
// P(y_i=1|θ) = σ(x_iᵀθ), prior θ ~ N(0, α⁻¹I). With n rows x_i ∈ R^p,
//
//	log π(θ) = Σ_i [y_i·x_iᵀθ − log(1+exp(x_iᵀθ))] − (α/2)‖θ‖²   (+ const)
//	∇log π(θ) = Xᵀ(y − σ(Xθ)) − αθ
//
// and the potential f = −log π has m = α and M = α + ¼·λ_max(XᵀX). It is
// immutable and safe for concurrent use.
type Logistic struct {
	n, p    int
	x       *mat.Dense // n×p copy of the design
	y       []float64
	alpha   float64
	m, bigM float64
}

var _ Target = (*Logistic)(nil)

// NewLogistic returns the posterior of logistic regression with design x
// (n×p, one row per observation), labels y (length n, each 0 or 1) and prior
// precision α = priorPrecision. It returns an error if x is nil or empty,
// len(y) differs from the number of rows, a label is not 0 or 1, an entry of
// x is non-finite, or α is not finite and positive. The inputs are copied.
func NewLogistic(x *mat.Dense, y []float64, priorPrecision float64) (*Logistic, error) {
	if x == nil || x.IsEmpty() {
		return nil, errors.New("targets: empty design matrix")
	}
	n, p := x.Dims()
	if len(y) != n {
		return nil, fmt.Errorf("targets: %d labels for %d rows", len(y), n)
	}
	for i, v := range y {
		if v != 0 && v != 1 {
			return nil, fmt.Errorf("targets: label %d is %g, want 0 or 1", i, v)
		}
	}
	if !(priorPrecision > 0) || math.IsInf(priorPrecision, 1) {
		return nil, fmt.Errorf("targets: prior precision %g, want finite and > 0", priorPrecision)
	}
	xc := mat.DenseCopyOf(x)
	for i := range n {
		if !allFinite(xc.RawRowView(i)) {
			return nil, fmt.Errorf("targets: row %d of the design has a non-finite entry", i)
		}
	}
	var xtx mat.SymDense
	xtx.SymOuterK(1, xc.T())
	var eig mat.EigenSym
	if !eig.Factorize(&xtx, false) {
		return nil, errors.New("targets: eigendecomposition of XᵀX failed")
	}
	vals := eig.Values(nil) // ascending
	lmax := math.Max(vals[p-1], 0)
	return &Logistic{
		n:     n,
		p:     p,
		x:     xc,
		y:     append([]float64(nil), y...),
		alpha: priorPrecision,
		m:     priorPrecision,
		bigM:  priorPrecision + 0.25*lmax,
	}, nil
}

// Dim returns p, the number of coefficients.
func (l *Logistic) Dim() int { return l.p }

// Rows returns n, the number of observations.
func (l *Logistic) Rows() int { return l.n }

// Curvature returns m = α and M = α + ¼·λ_max(XᵀX), computed once by the
// constructor (gonum mat.EigenSym).
func (l *Logistic) Curvature() (m, M float64) { return l.m, l.bigM }

// LogDensity returns Σ_i [y_i·x_iᵀθ − log(1+exp(x_iᵀθ))] − (α/2)‖θ‖². It
// panics if len(theta) != Dim and allocates nothing.
func (l *Logistic) LogDensity(theta []float64) float64 {
	checkPoint(theta, l.p)
	var s float64
	for i := range l.n {
		z := dot(l.x.RawRowView(i), theta)
		s += l.y[i]*z - softplus(z)
	}
	return s - 0.5*l.alpha*dot(theta, theta)
}

// GradLogDensity writes Xᵀ(y − σ(Xθ)) − αθ into dst. It panics if len(dst)
// or len(theta) is not Dim or if dst and theta start at the same element; it
// allocates nothing.
func (l *Logistic) GradLogDensity(dst, theta []float64) {
	checkGrad(dst, theta, l.p)
	for j, t := range theta {
		dst[j] = -l.alpha * t
	}
	for i := range l.n {
		row := l.x.RawRowView(i)
		r := l.y[i] - sigmoid(dot(row, theta))
		for j, v := range row {
			dst[j] += r * v
		}
	}
}

// Hessian writes the Hessian of log π at theta, −XᵀWX − αI with
// W = diag(σ(x_iᵀθ)(1−σ(x_iᵀθ))), into dst. The result is negative definite.
// dst must be Dim×Dim and len(theta) must be Dim; otherwise Hessian panics.
func (l *Logistic) Hessian(dst *mat.SymDense, theta []float64) {
	if dst == nil {
		panic("targets: nil Hessian destination")
	}
	if dst.IsEmpty() || dst.SymmetricDim() != l.p {
		panic(fmt.Sprintf("targets: Hessian destination is %d×%d, want %d×%d",
			dst.SymmetricDim(), dst.SymmetricDim(), l.p, l.p))
	}
	checkPoint(theta, l.p)
	raw := dst.RawSymmetric() // upper triangle, row-major with stride
	for i := range l.p {
		r := raw.Data[i*raw.Stride : i*raw.Stride+l.p]
		for j := i; j < l.p; j++ {
			r[j] = 0
		}
		r[i] = -l.alpha
	}
	for k := range l.n {
		row := l.x.RawRowView(k)
		s := sigmoid(dot(row, theta))
		w := s * (1 - s)
		if w == 0 {
			continue
		}
		for i, xi := range row {
			wi := w * xi
			r := raw.Data[i*raw.Stride : i*raw.Stride+l.p]
			for j := i; j < l.p; j++ {
				r[j] -= wi * row[j]
			}
		}
	}
}

// Mode returns the posterior mode argmax log π by Newton's method from θ = 0:
// the step solves (XᵀWX + αI)·step = ∇log π(θ) by Cholesky (gonum), with
// step halving while log π would decrease (log π is strictly concave, so a
// full step is taken near the mode). It stops when the Newton step has
// ‖step‖∞ < tol and returns an error if that has not happened after maxIter
// steps, or if tol is not positive or maxIter is less than 1.
func (l *Logistic) Mode(tol float64, maxIter int) ([]float64, error) {
	if !(tol > 0) {
		return nil, fmt.Errorf("targets: Mode tolerance %g, want > 0", tol)
	}
	if maxIter < 1 {
		return nil, fmt.Errorf("targets: Mode maxIter %d, want >= 1", maxIter)
	}
	p := l.p
	theta := make([]float64, p)
	trial := make([]float64, p)
	grad := make([]float64, p)
	hess := mat.NewSymDense(p, nil)
	negHess := mat.NewSymDense(p, nil)
	step := mat.NewVecDense(p, nil)
	var chol mat.Cholesky
	lp := l.LogDensity(theta)
	for iter := range maxIter {
		l.GradLogDensity(grad, theta)
		l.Hessian(hess, theta)
		negHess.ScaleSym(-1, hess)
		if !chol.Factorize(negHess) {
			return nil, fmt.Errorf("targets: Mode: negative Hessian not positive definite at iteration %d", iter)
		}
		if err := chol.SolveVecTo(step, mat.NewVecDense(p, grad)); err != nil {
			return nil, fmt.Errorf("targets: Mode: Newton solve at iteration %d: %w", iter, err)
		}
		var inf float64
		for j := range p {
			inf = math.Max(inf, math.Abs(step.AtVec(j)))
		}
		if math.IsNaN(inf) {
			return nil, fmt.Errorf("targets: Mode: non-finite Newton step at iteration %d", iter)
		}
		if inf < tol {
			for j := range p {
				theta[j] += step.AtVec(j)
			}
			return theta, nil
		}
		// Damped step: halve until log π does not decrease.
		accepted := false
		for t := 1.0; t >= 1e-10; t /= 2 {
			for j := range p {
				trial[j] = theta[j] + t*step.AtVec(j)
			}
			if lt := l.LogDensity(trial); lt >= lp {
				lp = lt
				accepted = true
				break
			}
		}
		if !accepted {
			return nil, fmt.Errorf("targets: Mode: no ascent along the Newton step at iteration %d", iter)
		}
		copy(theta, trial)
	}
	return nil, fmt.Errorf("targets: Mode did not converge to ‖step‖∞ < %g in %d Newton steps", tol, maxIter)
}
