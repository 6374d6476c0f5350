package session

import (
	"fmt"
	"math"
	"math/rand/v2"

	"sluice/kernels"
	"sluice/kernels/bound"
)

// modeSearchPhase provides the start law of a TV guarantee. The TV bound
// of Dalalyan (2017) holds for chains started from N(x*, M⁻¹I), x* the
// mode of π; the phase finds a point x̂ near x* by gradient steps,
// certifies how near, and draws every chain's start from N(x̂, M⁻¹I).
// The guarantee then adds the shift term
//
//	TV(N(x̂, M⁻¹I), N(x*, M⁻¹I)) ≤ bound.ShiftTV(r, M) = erf(r√M/(2√2)) ≤ r√M/√(2π)
//
// to its start term, r the certified radius (docs/methods.md, section 2.5).
//
// The steps: from chain 0's start x₀, x ← x + h·C·∇log π(x) with
// h = 2/(m+M) (gradient descent on f = −log π; C the declared metric, the
// identity when none), which contracts ‖x − x*‖ (in the metric's units)
// by (M − m)/(M + m) per step for m-strongly convex, M-smooth f
// (Nesterov 2004, Theorem 2.1.15, from memory). At each point the radius
// r = ‖Lᵀ∇log π(x)‖/m bounds ‖L⁻¹(x − x*)‖ by strong convexity (C = L·Lᵀ;
// m and M are the declared curvature, read in the metric's units, or for
// m = 0 those of the penalised target π_λ, λ and M + λ, whose gradients
// the engine hands the phase). The search stops at the first point whose
// radius is at most guarantee.shiftBudget's radius (bound.ShiftRadius),
// then draws the starts x̂ + L·ξ/√M, ξ ~ N(0, I), from a stream of the
// session's seed (the same seed gives the same starts, bit for bit).
//
// Bounded: from the first gradient, bound.ModeSearchIterations gives the
// steps the theorem guarantees suffice; the search gets one more (for
// rounding), and fails the session on register.curvature when it has not
// certified by then (the declared m and M do not hold for this target,
// or its gradient is wrong), when that count exceeds
// maxModeSearchIterations, or when an iterate is not finite. Every
// gradient is one evaluation of chain 0, counted in the budget.
type modeSearchPhase struct {
	dim, chains int
	m, bigM     float64 // curvature of the sampled target, in the metric's units
	h, radius   float64
	metric      *kernels.Metric // nil: the identity
	g           *guarantee
	seed        uint64
	x, tmp      []float64
	req         kernels.Request
	// Results.
	iters, evaluated, limit int
	r0, r                   float64
	done                    bool
	fault                   *Error
	xhat, starts            []float64
}

// maxModeSearchIterations caps the mode search's gradient steps: a search
// the theorem says needs more is refused (a declared m that small makes
// the certificate, and the search, too weak to be worth it).
const maxModeSearchIterations = 100000

// modeSearchStream distinguishes the start draws' stream from the
// kernel's and the gradient check's (same seed, another sequence).
const modeSearchStream = 0x6d6f64657374 // "modest"

// modeSearchShapes is the one kind of request the search sends.
var modeSearchShapes = []requestShape{{kernels.NeedGradient, 0}}

// wantsModeSearch reports whether a session with guarantee g runs the
// mode search: a TV guarantee (validateTV has checked its assumptions).
func wantsModeSearch(g *guarantee) bool { return g != nil && g.metric == bound.TV }

// newModeSearch returns the search for guarantee g from start (chain 0's
// start point), in metric (nil: identity).
func newModeSearch(spec *Spec, g *guarantee, start []float64, metric *kernels.Metric) *modeSearchPhase {
	d := spec.Dim
	m, bigM := g.setting.Convexity+g.penalty, g.setting.Smoothness+g.penalty
	p := &modeSearchPhase{dim: d, chains: spec.Chains, m: m, bigM: bigM, h: bound.ModeSearchStep(m, bigM),
		radius: bound.ShiftRadius(g.shiftBudget, bigM), metric: metric, g: g, seed: spec.Seed,
		x: append([]float64(nil), start[:d]...), tmp: make([]float64, d)}
	if metric != nil && metric.Kind() == kernels.IdentityMetric {
		p.metric = nil
	}
	p.req = kernels.Request{Need: kernels.NeedGradient, Rows: 1, Points: p.x, Chain: []int{0}}
	return p
}

// Next implements Phase: the gradient at the current point.
func (p *modeSearchPhase) Next() *kernels.Request { return &p.req }

// Tell implements Phase.
func (p *modeSearchPhase) Tell(a *kernels.Answer) bool {
	d := p.dim
	grad := a.Grad[:d]
	p.evaluated++
	// The radius in the metric's units: ‖Lᵀ∇log π(x)‖/m.
	if p.metric != nil {
		p.metric.ApplyFactorT(p.tmp, grad)
	} else {
		copy(p.tmp, grad)
	}
	var n2 float64
	for _, v := range p.tmp {
		n2 += v * v
	}
	p.r = math.Sqrt(n2) / p.m
	if p.evaluated == 1 {
		p.r0 = p.r
		k := bound.ModeSearchIterations(p.m, p.bigM, p.r0, p.radius)
		if k < 0 || k > maxModeSearchIterations {
			return p.fail(fmt.Sprintf("the mode search that starts a TV guarantee would need %s gradient steps from chain 0's start (certified distance to the mode %.4g, wanted %.4g, κ = M/m = %.4g; Nesterov 2004, Theorem 2.1.15), more than the limit of %d: declare a larger m if it holds, or start nearer the mode",
				countText(k), p.r0, p.radius, p.bigM/p.m, maxModeSearchIterations))
		}
		p.limit = k + 1
	}
	if p.r <= p.radius {
		p.finish()
		return true
	}
	if p.iters >= p.limit {
		return p.fail(fmt.Sprintf("the mode search that starts a TV guarantee did not certify the mode within %d gradient steps, which m-strong convexity and M-smoothness guarantee (Nesterov 2004, Theorem 2.1.15): the certified distance went from %.4g to %.4g, wanted %.4g; the declared m = %.4g and M = %.4g do not hold for this target (or its gradient is wrong)",
			p.iters, p.r0, p.r, p.radius, p.m-p.g.penalty, p.bigM-p.g.penalty))
	}
	// x ← x + h·C·∇log π(x).
	if p.metric != nil {
		p.metric.Apply(p.tmp, grad)
	} else {
		copy(p.tmp, grad)
	}
	for i, v := range p.tmp {
		p.x[i] += p.h * v
		if math.IsNaN(p.x[i]) || math.IsInf(p.x[i], 0) {
			return p.fail(fmt.Sprintf("the mode search that starts a TV guarantee left the finite numbers after %d gradient steps of size 2/(m+M) = %.4g: the declared M = %.4g is too small for this target (or its gradient is wrong)",
				p.iters+1, p.h, p.bigM-p.g.penalty))
		}
	}
	p.iters++
	return false
}

func countText(k int) string {
	if k < 0 {
		return "more than 2^31"
	}
	return fmt.Sprint(k)
}

func (p *modeSearchPhase) fail(msg string) bool {
	p.fault = &Error{Kind: Invalid, Field: "register.curvature", Chain: -1, Coord: -1, Reason: msg}
	p.done = true
	return true
}

// finish keeps x̂, draws the starts and sets the guarantee's shift term.
func (p *modeSearchPhase) finish() {
	d := p.dim
	p.done = true
	p.xhat = append([]float64(nil), p.x...)
	p.starts = make([]float64, p.chains*d)
	rng := rand.New(rand.NewPCG(p.seed, modeSearchStream))
	sd := 1 / math.Sqrt(p.bigM)
	for c := range p.chains {
		row := p.starts[c*d : (c+1)*d]
		for i := range row {
			row[i] = rng.NormFloat64()
		}
		if p.metric != nil {
			p.metric.ApplyFactor(row, row)
		}
		for i := range row {
			row[i] = p.xhat[i] + sd*row[i]
		}
	}
	p.g.shift = bound.ShiftTV(p.r, p.bigM)
	p.g.modeText = p.text()
}

// text says what the search found, for the guarantee check.
func (p *modeSearchPhase) text() string {
	return fmt.Sprintf("the chains start from N(x̂, M⁻¹I) (in the metric's units), x̂ found by %d gradient steps of the mode search (%d evaluations, counted) with certified distance to the mode ‖x̂ − x*‖ ≤ %.4g (strong convexity); the shift to the theorem's N(x*, M⁻¹I) adds TV ≤ erf(r√M/(2√2)) = %.4g to the bound",
		p.iters, p.evaluated, p.r, p.g.shift)
}

// Fault reports why the search failed; nil when it did not.
func (p *modeSearchPhase) Fault() *Error { return p.fault }

// Report implements Phase: nothing beyond the guarantee's check and
// bound, which carry the search's result.
func (p *modeSearchPhase) Report(*Progress) {}

// modeSearchState is what a checkpoint keeps of the search: its results
// (checkpoints are never taken while a phase runs). The guarantee's shift
// term is kept with the guarantee.
type modeSearchState struct {
	Done                    bool
	Iters, Evaluated, Limit int
	R0, R                   float64
	XHat, Starts            []float64
}

func (p *modeSearchPhase) marshal() ([]byte, error) {
	return gobBytes(modeSearchState{Done: p.done, Iters: p.iters, Evaluated: p.evaluated, Limit: p.limit,
		R0: p.r0, R: p.r, XHat: p.xhat, Starts: p.starts})
}

func (p *modeSearchPhase) unmarshal(b []byte) error {
	var st modeSearchState
	if err := gobRead(b, &st); err != nil {
		return fmt.Errorf("session: state's mode search: %w", err)
	}
	if (st.XHat != nil && len(st.XHat) != p.dim) || (st.Starts != nil && len(st.Starts) != p.dim*p.chains) {
		return fmt.Errorf("session: state's mode search has other sizes")
	}
	p.done, p.iters, p.evaluated, p.limit, p.r0, p.r, p.xhat, p.starts = st.Done, st.Iters, st.Evaluated, st.Limit, st.R0, st.R, st.XHat, st.Starts
	if p.xhat != nil {
		copy(p.x, p.xhat)
	}
	return nil
}
