package session

import (
	"math"

	"sluice/kernels/bound"
)

// ParameterDiagnostics is the measured accuracy of one parameter.
type ParameterDiagnostics struct {
	Name                                   string
	Mean, SD, Rhat, BulkESS, TailESS, MCSE float64
}

// CurvatureEstimate holds one-sided certificates from gradient pairs.
type CurvatureEstimate struct {
	Pairs int64
	// SmoothnessAtLeast is a lower bound on M; StrongConvexityAtMost an
	// upper bound on m.
	SmoothnessAtLeast, StrongConvexityAtMost float64
	NotConvex                                bool
}

// TargetStatus reports one accuracy target.
type TargetStatus struct {
	Name          string
	Want, Current float64
	Met           bool
	// ProjectedEvaluations still needed at the current rate; −1 when it
	// cannot be projected.
	ProjectedEvaluations int64
}

// guarantee computes the running theoretical bound of an lmc session whose
// client declared the curvature (package bound, THEORY.md §1.1, §2.1).
type guarantee struct {
	setting bound.Setting
	metric  bound.Metric
	h       float64
	planned int // steps the plan asked for; 0 when the step was given
}

// newGuarantee returns nil when no bound applies: no curvature declared,
// another kernel, m = 0, or a step outside the theorem's range.
func newGuarantee(spec *Spec) (*guarantee, error) {
	c := spec.Curvature
	if c == nil || spec.Kernel != "lmc" || c.StrongConvexity == 0 {
		return nil, nil
	}
	g := &guarantee{setting: bound.Setting{Convexity: c.StrongConvexity, Smoothness: c.Smoothness, Dim: spec.Dim,
		StartDistance: c.StartDistance, Source: bound.Declared}, metric: spec.Wants.Metric}
	if g.metric == 0 {
		g.metric = bound.W2
	}
	if g.metric == bound.TV {
		g.setting.StartDistance = 0 // TV's theorem fixes its own start law
	}
	if spec.Step == 0 { // plan it (validate allowed this only with wants.eps)
		p, err := bound.NewPlan(bound.Spec{Setting: g.setting, Metric: g.metric, Eps: spec.Wants.Eps, Chains: spec.Chains})
		if err != nil {
			return nil, BadField("register.wants.eps", "cannot plan a step: %v", err)
		}
		spec.Step, g.planned = p.Step, p.Iterations
	}
	g.h = spec.Step
	if _, err := g.at(0); err != nil {
		if spec.Wants.Eps > 0 {
			return nil, BadField("register.step", "no guaranteed bound holds for this step: %v", err)
		}
		return nil, nil
	}
	return g, nil
}

func (g *guarantee) at(k int) (bound.Bound, error) {
	if g.metric == bound.TV {
		return bound.TVBound(g.setting, 0, g.h, k)
	}
	return bound.W2Bound(g.setting, g.h, k)
}

// stepsTo returns the smallest step count ≥ k at which the bound is at
// most eps, or −1 when no step count reaches it (the terms that do not
// shrink with k already exceed eps).
func (g *guarantee) stepsTo(eps float64, k int) int {
	ok := func(n int) bool {
		b, err := g.at(n)
		return err == nil && b.Total <= eps
	}
	if ok(k) {
		return k
	}
	hi := max(2*k, 16)
	for !ok(hi) {
		if hi > math.MaxInt32 {
			return -1
		}
		hi *= 2
	}
	lo := k // !ok(lo)
	for hi-lo > 1 {
		mid := lo + (hi-lo)/2
		if ok(mid) {
			hi = mid
		} else {
			lo = mid
		}
	}
	return hi
}
