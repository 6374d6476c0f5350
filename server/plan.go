package server

import (
	"context"
	"errors"
	"fmt"

	"sluice/kernels/bound"
	sluicev1 "sluice/proto/sluice/v1"
)

// planField maps the inputs named by package bound to wire field names.
var planField = map[string]string{
	"m": "curvature.strong_convexity", "M": "curvature.smoothness", "p": "dim", "eps": "eps",
	"metric": "metric", "delta": "bias", "sigma": "noise_sd", "w0": "start_distance", "mu2": "second_moment",
	"chains": "chains", "rate": "evaluations_per_second",
}

// Plan implements the Plan rpc with package bound's rules.
func (s *Server) Plan(_ context.Context, req *sluicev1.PlanRequest) (*sluicev1.PlanResponse, error) {
	p, err := MakePlan(req)
	if err != nil {
		return nil, err
	}
	return p, nil
}

// MakePlan computes a plan from a wire request; errors are gRPC statuses
// (INVALID_ARGUMENT naming the field). The command line uses it directly,
// so `sluice plan` and the rpc give the same answer.
func MakePlan(req *sluicev1.PlanRequest) (*sluicev1.PlanResponse, error) {
	if req.GetCurvature() == nil {
		return nil, problem(badInput, "curvature", "m and M are required")
	}
	spec := bound.Spec{
		Setting: bound.Setting{
			Convexity: req.GetCurvature().GetStrongConvexity(), Smoothness: req.GetCurvature().GetSmoothness(),
			Dim: int(req.GetDim()), SecondMoment: req.GetSecondMoment(), StartDistance: req.GetStartDistance(),
			Bias: req.GetBias(), Noise: req.GetNoiseSd(), Source: bound.Declared,
		},
		Metric: metricFromWire[req.GetMetric()], Eps: req.GetEps(), Chains: int(req.GetChains()), Rate: req.GetEvaluationsPerSecond(),
	}
	eps := spec.Eps
	if spec.Metric == bound.TV && eps > 0 {
		// As a session does: the server's mode search starts the chains
		// within a shift of TVShiftShare·ε of the theorem's start, and
		// the rule is planned for the rest of ε.
		spec.Eps = (1 - bound.TVShiftShare) * eps
	}
	plan, err := bound.NewPlan(spec)
	if err == nil && spec.Metric == bound.TV && eps > 0 {
		plan.Final.Start += bound.TVShiftShare * eps
		plan.Final.Total += bound.TVShiftShare * eps
		plan.Assumptions = append(plan.Assumptions, fmt.Sprintf(
			"the chains start from N(x̂, M⁻¹I) around a point x̂ the server's gradient search certifies near the mode; the shift from the theorem's start costs at most %.3g of ε, and the step and steps are planned for the remaining %.3g",
			bound.TVShiftShare*eps, spec.Eps))
	}
	var ie *bound.InputError
	if errors.As(err, &ie) {
		f, ok := planField[ie.Input]
		if !ok {
			f = ie.Input
		}
		return nil, problem(badInput, f, "%s", ie.Error())
	}
	if err != nil {
		return nil, problem(badInput, "plan", "%v", err)
	}
	secs := -1.0
	if spec.Rate > 0 {
		secs = plan.Seconds
	}
	return &sluicev1.PlanResponse{
		Step: plan.Step, Horizon: plan.Horizon, Iterations: int64(plan.Iterations),
		EvaluationsPerChain: int64(plan.EvaluationsPerChain), Evaluations: int64(plan.Evaluations), Seconds: secs,
		Bound: boundToWire(plan.Final), Assumptions: plan.Assumptions, ConstantsRecalled: plan.Recalled, Penalty: plan.Penalty,
	}, nil
}

var metricFromWire = map[sluicev1.Metric]bound.Metric{
	sluicev1.Metric_METRIC_TV: bound.TV,
	sluicev1.Metric_METRIC_W2: bound.W2,
}

var metricToWire = map[bound.Metric]sluicev1.Metric{
	bound.TV: sluicev1.Metric_METRIC_TV,
	bound.W2: sluicev1.Metric_METRIC_W2,
}

func boundToWire(b bound.Bound) *sluicev1.Bound {
	src := sluicev1.BoundSource_BOUND_SOURCE_ESTIMATED
	if b.Source == bound.Declared {
		src = sluicev1.BoundSource_BOUND_SOURCE_DECLARED
	}
	return &sluicev1.Bound{Metric: metricToWire[b.Metric], Value: b.Total, Source: src, Label: b.Source.String(),
		StartTerm: b.Start, DiscretisationTerm: b.Discretisation, NoiseTerm: b.Noise, BiasTerm: b.Bias}
}
