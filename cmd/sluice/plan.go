package main

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"strings"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"

	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server"
)

// plan answers what reaching a guaranteed accuracy costs, before any
// sampling: locally, or from a server with --addr (the same computation).
func plan(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("plan", flag.ContinueOnError)
	fs.SetOutput(stderr)
	m := fs.Float64("m", 0, "strong convexity m of the potential −log π (0: convex only; TV then needs --second-moment)")
	bigM := fs.Float64("M", 0, "smoothness M of the potential (Lipschitz constant of its gradient)")
	dim := fs.Int("dim", 0, "dimension")
	eps := fs.Float64("eps", 0, "target error: in (0, 0.5) for tv, in units of θ for w2")
	metric := fs.String("metric", "tv", "tv (total variation) or w2 (2-Wasserstein)")
	noise := fs.Float64("noise-sd", 0, "gradient noise σ, w2 only: E‖noise‖² ≤ σ²·dim")
	bias := fs.Float64("bias", 0, "gradient bias δ, w2 only: ‖E noise‖² ≤ δ²·dim")
	start := fs.Float64("start-dist", 0, "upper bound on W2(start, π), w2 only (0: √(dim/m), a start at the mode)")
	mu2 := fs.Float64("second-moment", 0, "upper bound on E‖θ − centre‖² under π, for tv with m = 0")
	chains := fs.Int("chains", 1, "chains the cost is for")
	rate := fs.Float64("rate", 0, "gradient evaluations per second over all chains, for the wall time (0: unknown)")
	addr := fs.String("addr", "", "ask the sluice server at this address instead of computing locally")
	asJSON := fs.Bool("json", false, "print the plan as one JSON object")
	setHelp(fs, help{
		usage: "sluice plan --m M --M M --dim P --eps E [--metric tv|w2] [flags]",
		about: "Answers, before any sampling, what a guaranteed accuracy costs with unadjusted Langevin (the lmc kernel) " +
			"on a target whose potential −log π is m-strongly convex and M-smooth: the step size, the Langevin time, " +
			"the iterations per chain, the gradient evaluations and, given a rate, the wall time, with the bound reached " +
			"term by term and everything the promise rests on. TV uses the theorem of Dalalyan (2017), W2 that of " +
			"Dalalyan and Karagulyan (2019), which also covers gradient noise and bias; their constants are recalled " +
			"from the papers and checked by sluice only on Gaussian targets (docs/methods.md), so treat the figures as " +
			"planning guidance. With --addr the same computation runs on a server (the Plan rpc).",
		examples: []string{
			"sluice plan --m 1 --M 4 --dim 2 --eps 0.1 --metric tv",
			"sluice plan --m 1 --M 4 --dim 2 --eps 0.5 --metric w2 --noise-sd 2 --chains 8 --rate 1e6",
			"sluice plan --m 0 --M 4 --dim 2 --eps 0.1 --second-moment 10   # convex only: a penalised target",
			"sluice plan --m 1 --M 4 --dim 2 --eps 0.1 --json --addr 127.0.0.1:7070",
		},
		kernels: "Plans are for the lmc kernel; a session can run any of",
	})
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if missing := missingPlanFlags(fs, *metric); len(missing) > 0 {
		return usagef("missing %s (see sluice plan -h)", strings.Join(missing, ", "))
	}
	met, ok := map[string]sluicev1.Metric{"tv": sluicev1.Metric_METRIC_TV, "w2": sluicev1.Metric_METRIC_W2}[strings.ToLower(*metric)]
	if !ok {
		return usagef("--metric %q: want tv or w2", *metric)
	}
	req := &sluicev1.PlanRequest{Curvature: &sluicev1.Curvature{StrongConvexity: *m, Smoothness: *bigM},
		Dim: int32(*dim), Eps: *eps, Metric: met, NoiseSd: *noise, Bias: *bias, StartDistance: *start,
		SecondMoment: *mu2, Chains: int32(*chains), EvaluationsPerSecond: *rate}
	var resp *sluicev1.PlanResponse
	var err error
	if *addr != "" {
		conn, cerr := grpc.NewClient(*addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
		if cerr != nil {
			return cerr
		}
		defer conn.Close()
		cctx, cancel := context.WithTimeout(ctx, 10*time.Second)
		defer cancel()
		resp, err = sluicev1.NewSluiceServiceClient(conn).Plan(cctx, req)
	} else {
		resp, err = server.MakePlan(req)
	}
	if err != nil {
		if _, ok := status.FromError(err); ok {
			return usageError{err} // bad input: describeError shows the field
		}
		return err
	}
	if *asJSON {
		b := resp.Bound
		out := planJSON{Metric: strings.ToLower(*metric), Eps: *eps, Step: resp.Step, Horizon: resp.Horizon,
			Iterations: resp.Iterations, EvaluationsPerChain: resp.EvaluationsPerChain, Evaluations: resp.Evaluations,
			Seconds: resp.Seconds, Penalty: resp.Penalty, Assumptions: resp.Assumptions, ConstantsRecalled: resp.ConstantsRecalled,
			Bound: planBoundJSON{Value: b.Value, Label: b.Label, Start: b.StartTerm, Discretisation: b.DiscretisationTerm,
				Noise: b.NoiseTerm, Bias: b.BiasTerm}}
		enc := json.NewEncoder(stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(out)
	}
	chainWord := "chains"
	if *chains == 1 {
		chainWord = "chain"
	}
	fmt.Fprintf(stdout, "plan for %s ≤ %g with unadjusted Langevin (m = %g, M = %g, dim %d, %d %s)\n",
		strings.ToUpper(*metric), *eps, *m, *bigM, *dim, *chains, chainWord)
	fmt.Fprintf(stdout, "  step h          %.6g\n  horizon T       %.6g\n  iterations K    %d per chain\n  evaluations     %d\n",
		resp.Step, resp.Horizon, resp.Iterations, resp.Evaluations)
	if resp.Seconds >= 0 {
		fmt.Fprintf(stdout, "  wall time       %s at %g evaluations/s\n", time.Duration(resp.Seconds*float64(time.Second)).Round(time.Millisecond), *rate)
	}
	if resp.Penalty > 0 {
		fmt.Fprintf(stdout, "  penalty λ       %.6g (sample π·exp(−λ‖θ − centre‖²/2))\n", resp.Penalty)
	}
	b := resp.Bound
	fmt.Fprintf(stdout, "  bound after K   %.6g (start %.3g, discretisation %.3g, noise %.3g, bias %.3g)\n",
		b.Value, b.StartTerm, b.DiscretisationTerm, b.NoiseTerm, b.BiasTerm)
	fmt.Fprintln(stdout, "relies on:")
	for _, a := range resp.Assumptions {
		fmt.Fprintf(stdout, "  - %s\n", a)
	}
	if resp.ConstantsRecalled {
		src := "Dalalyan (2017)"
		if met == sluicev1.Metric_METRIC_W2 {
			src = "Dalalyan and Karagulyan (2019)"
		}
		fmt.Fprintf(stdout, "The bound's constants are recalled from %s and checked by sluice only on Gaussian targets\n"+
			"(where the exact distance is known): use the plan as guidance. Sources and derivations: docs/methods.md.\n", src)
	}
	return nil
}

// planJSON is the --json form of a plan.
type planJSON struct {
	Metric              string        `json:"metric"`
	Eps                 float64       `json:"eps"`
	Step                float64       `json:"step"`
	Horizon             float64       `json:"horizon"`
	Iterations          int64         `json:"iterations"`
	EvaluationsPerChain int64         `json:"evaluations_per_chain"`
	Evaluations         int64         `json:"evaluations"`
	Seconds             float64       `json:"seconds"` // -1: no rate given
	Penalty             float64       `json:"penalty"`
	Bound               planBoundJSON `json:"bound"`
	Assumptions         []string      `json:"assumptions"`
	ConstantsRecalled   bool          `json:"constants_recalled"`
}

type planBoundJSON struct {
	Value          float64 `json:"value"`
	Label          string  `json:"label"`
	Start          float64 `json:"start_term"`
	Discretisation float64 `json:"discretisation_term"`
	Noise          float64 `json:"noise_term"`
	Bias           float64 `json:"bias_term"`
}

// missingPlanFlags names the flags a plan cannot do without that were not
// given: --M, --dim and --eps always; --m unless a convex TV plan gives
// --second-moment instead.
func missingPlanFlags(fs *flag.FlagSet, metric string) []string {
	set := map[string]bool{}
	fs.Visit(func(f *flag.Flag) { set[f.Name] = true })
	var missing []string
	if !set["m"] && !(strings.EqualFold(metric, "tv") && set["second-moment"]) {
		missing = append(missing, "--m")
	}
	for _, name := range []string{"M", "dim", "eps"} {
		if !set[name] {
			missing = append(missing, "--"+name)
		}
	}
	return missing
}
