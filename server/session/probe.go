package session

import (
	"math"

	"sluice/kernels"
	"sluice/kernels/diag"
)

// probing runs the opt-in curvature probe before the session's kernel:
// power iteration for the largest eigenvalue of ∇²(−log π) at chain 0's
// start, then for the smallest on a shifted operator (THEORY.md §12), one
// gradient at a time through the same requests as sampling, so every
// evaluation is validated and counted. It presents itself as a kernel
// whose Tell never completes a step; once done, the engine drives the
// real kernel.
type probing struct {
	inner       kernels.Kernel
	iters       int
	theta       []float64
	eps         float64
	large       *diag.CurvatureProbe
	small       *diag.CurvatureProbe
	req         kernels.Request
	bigM, m     float64
	evaluations int
	done        bool
}

func newProbing(inner kernels.Kernel, iters int) *probing {
	d := inner.Dim()
	theta := append([]float64(nil), inner.Positions()[:d]...)
	var n2 float64
	for _, v := range theta {
		n2 += v * v
	}
	// A relative difference step: 1e-4 (THEORY.md §12's example) times
	// the start's scale, at least 1.
	p := &probing{inner: inner, iters: iters, theta: theta, eps: 1e-4 * math.Max(1, math.Sqrt(n2/float64(d)))}
	p.large = diag.NewLargestCurvature(theta, nil, nil, p.eps)
	p.req = kernels.Request{Need: kernels.NeedGradient, Rows: 1, Chain: []int{0}}
	return p
}

func (p *probing) current() *diag.CurvatureProbe {
	if p.small != nil {
		return p.small
	}
	return p.large
}

func (p *probing) Dim() int                       { return p.inner.Dim() }
func (p *probing) Chains() int                    { return p.inner.Chains() }
func (p *probing) Steps() int                     { return p.inner.Steps() }
func (p *probing) Positions() []float64           { return p.inner.Positions() }
func (p *probing) EvaluationsPerStep() int        { return p.inner.EvaluationsPerStep() }
func (p *probing) MarshalBinary() ([]byte, error) { return p.inner.MarshalBinary() }
func (p *probing) UnmarshalBinary(b []byte) error { return p.inner.UnmarshalBinary(b) }

func (p *probing) Next() *kernels.Request {
	p.req.Points = p.current().Next()
	return &p.req
}

// Tell feeds the probe; a probe that cannot continue (a vanishing
// direction) ends early with what it has.
func (p *probing) Tell(a *kernels.Answer) bool {
	pr := p.current()
	err := pr.Tell(a.Grad[:p.inner.Dim()])
	p.evaluations++
	if err == nil && pr.Iterations() < p.iters {
		return false
	}
	if p.small == nil {
		p.bigM = pr.Estimate()
		shift := 1.1 * p.bigM
		if !(shift > 0) || math.IsInf(shift, 0) {
			p.done = true
			return false
		}
		p.small = diag.NewSmallestCurvature(p.theta, nil, nil, p.eps, shift)
		return false
	}
	p.m = pr.Estimate()
	p.done = true
	return false
}
