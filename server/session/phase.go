package session

import (
	"math"

	"sluice/kernels"
	"sluice/kernels/diag"
)

// A Phase is a stage the engine runs before sampling, in the same ask/tell
// shape as a kernel but without chains, steps or draws of its own: a
// gradient check (gradcheck.go), a curvature probe, and the mode search
// that starts a TV guarantee (modesearch.go); others can be added the
// same way.
//
// The contract:
//   - Next returns the phase's next request. Calling Next again before Tell
//     returns the same request. Its slices belong to the phase and stay
//     valid until the next Tell. Rows must index chains of the session
//     (Request.Chain), and the request must fit the shapes the phase
//     declared to the engine (see phaseShapes), so that registration can
//     size it.
//   - Tell gives the phase the engine-validated evaluations of that
//     request (after the engine's own corrections, such as a penalty) and
//     reports whether the phase is complete. A phase that cannot continue
//     (a vanishing direction, say) completes early with what it has; it
//     never panics on a client's values. It fails the session only
//     through an optional method Fault() *Error, read after every Tell
//     (the gradient check: a gradient that disagrees with finite
//     differences of log π is the client's error).
//   - Report adds what the phase has learnt to a progress report. The
//     engine calls it for every report, while the phase runs and after.
//
// Every evaluation a phase asks for is validated, counted against the
// budget and fed to the measured diagnostics exactly as a kernel's. The
// kernel does not move while a phase runs: its first request waits until
// every phase is complete. A Phase is not safe for concurrent use.
type Phase interface {
	Next() *kernels.Request
	Tell(a *kernels.Answer) (done bool)
	Report(p *Progress)
}

// curvatureProbe is the opt-in curvature probe: power iteration for the
// largest eigenvalue of ∇²(−log π) at chain 0's start, then for the
// smallest on the operator shifted by 1.1 times that estimate, one
// gradient at a time, with the Hessian-vector products taken as finite
// differences of gradients (package diag). The shift is standard convex
// analysis, derived here: the largest eigenvalue of cI − H is c − λ_min(H)
// when c ≥ λ_max(H), so power iteration on it finds the smallest.
type curvatureProbe struct {
	iters       int
	dim         int
	theta       []float64
	eps         float64
	large       *diag.CurvatureProbe
	small       *diag.CurvatureProbe
	req         kernels.Request
	bigM, m     float64
	evaluations int
}

// newCurvatureProbe probes at the first dim values of start (chain 0's
// start) with iters power iterations each way.
func newCurvatureProbe(start []float64, dim, iters int) *curvatureProbe {
	theta := append([]float64(nil), start[:dim]...)
	var n2 float64
	for _, v := range theta {
		n2 += v * v
	}
	// A relative difference step: 1e-4 times the start's scale, at least
	// 1e-4 (common practice for finite differences in double precision).
	p := &curvatureProbe{iters: iters, dim: dim, theta: theta, eps: 1e-4 * math.Max(1, math.Sqrt(n2/float64(dim)))}
	p.large = diag.NewLargestCurvature(theta, nil, nil, p.eps)
	p.req = kernels.Request{Need: kernels.NeedGradient, Rows: 1, Chain: []int{0}}
	return p
}

// probeShapes is the one kind of request the probe sends.
var probeShapes = []requestShape{{kernels.NeedGradient, 0}}

func (p *curvatureProbe) current() *diag.CurvatureProbe {
	if p.small != nil {
		return p.small
	}
	return p.large
}

// Next implements Phase: one gradient at the probe's next point.
func (p *curvatureProbe) Next() *kernels.Request {
	p.req.Points = p.current().Next()
	return &p.req
}

// Tell implements Phase.
func (p *curvatureProbe) Tell(a *kernels.Answer) bool {
	pr := p.current()
	err := pr.Tell(a.Grad[:p.dim])
	p.evaluations++
	if err == nil && pr.Iterations() < p.iters {
		return false
	}
	if p.small == nil {
		p.bigM = pr.Estimate()
		shift := 1.1 * p.bigM
		if !(shift > 0) || math.IsInf(shift, 0) {
			return true
		}
		p.small = diag.NewSmallestCurvature(p.theta, nil, nil, p.eps, shift)
		return false
	}
	p.m = pr.Estimate()
	return true
}

// Report implements Phase: the estimates of M and m and their cost.
func (p *curvatureProbe) Report(pr *Progress) {
	pr.Curvature.ProbedSmoothness, pr.Curvature.ProbedConvexity = p.bigM, p.m
	pr.Curvature.ProbeEvaluations = int64(p.evaluations)
}
