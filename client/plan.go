package client

import (
	"context"

	"google.golang.org/grpc"

	sluicev1 "sluice/proto/sluice/v1"
)

// PlanSpec describes a target and the guaranteed accuracy wanted, for Plan
// (see the PlanRequest message of the wire API).
type PlanSpec struct {
	// Curvature gives m and M (required); its StartDistance (W2) and
	// SecondMoment (TV with m = 0) are used too.
	Curvature Curvature
	Dim       int
	// Eps is the error wanted in Metric: in (0, 1/2) for TV, > 0 for W2
	// (units of θ).
	Eps    float64
	Metric Metric
	// NoiseSD and Bias describe gradient noise (W2 only):
	// E‖noise‖² ≤ NoiseSD²·dim, ‖E noise‖² ≤ Bias²·dim.
	NoiseSD, Bias float64
	// Chains the cost is for (0: 1), and gradient evaluations per second
	// over all chains to turn it into wall time (0: unknown).
	Chains               int
	EvaluationsPerSecond float64
}

// PlanResult is the schedule and its cost: step size, Langevin horizon,
// iterations and gradient evaluations per chain, evaluations over all
// chains, wall time in seconds (−1 without a rate), the bound after
// Iterations steps, the assumptions in words, whether the bound's
// constants are recalled rather than verified, and the penalty weight of
// the convex (m = 0) TV rule (0 otherwise).
type PlanResult struct {
	Step, Horizon                   float64
	Iterations, EvaluationsPerChain int64
	Evaluations                     int64
	Seconds                         float64
	Bound                           Bound
	Assumptions                     []string
	ConstantsRecalled               bool
	Penalty                         float64
}

// Plan asks the server what reaching a guaranteed accuracy costs with
// unadjusted Langevin, before any sampling (the Plan rpc). Invalid input
// gives a gRPC status INVALID_ARGUMENT naming the field.
func Plan(ctx context.Context, cc grpc.ClientConnInterface, spec PlanSpec, opts ...grpc.CallOption) (*PlanResult, error) {
	c := spec.Curvature
	req := &sluicev1.PlanRequest{
		Curvature: &sluicev1.Curvature{StrongConvexity: c.StrongConvexity, Smoothness: c.Smoothness},
		Dim:       int32(spec.Dim), Eps: spec.Eps, Metric: metricToWire(spec.Metric),
		NoiseSd: spec.NoiseSD, Bias: spec.Bias, StartDistance: c.StartDistance, SecondMoment: c.SecondMoment,
		Chains: int32(spec.Chains), EvaluationsPerSecond: spec.EvaluationsPerSecond,
	}
	resp, err := sluicev1.NewSluiceServiceClient(cc).Plan(ctx, req, opts...)
	if err != nil {
		return nil, err
	}
	return planFromWire(resp), nil
}

func metricToWire(m Metric) sluicev1.Metric {
	return map[Metric]sluicev1.Metric{TV: sluicev1.Metric_METRIC_TV, W2: sluicev1.Metric_METRIC_W2}[m]
}

func planFromWire(r *sluicev1.PlanResponse) *PlanResult {
	var b Bound
	if w := progressFromWire(&sluicev1.Progress{Bound: r.GetBound()}).Bound; w != nil {
		b = *w
	}
	return &PlanResult{Step: r.GetStep(), Horizon: r.GetHorizon(), Iterations: r.GetIterations(),
		EvaluationsPerChain: r.GetEvaluationsPerChain(), Evaluations: r.GetEvaluations(), Seconds: r.GetSeconds(),
		Bound: b, Assumptions: r.GetAssumptions(), ConstantsRecalled: r.GetConstantsRecalled(), Penalty: r.GetPenalty()}
}
