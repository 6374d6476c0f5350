package main

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"net"
	"os"
	"sort"
	"strconv"
	"strings"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/experimental"

	"sluice/client"
	"sluice/client/history"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server"
)

// demoConfig is what the demo's flags set.
type demoConfig struct {
	chains        int
	kernel        string
	step          float64
	burnIn        int64
	keepEvery     int64
	draws         int64
	maxEvals      int64
	maxTime       time.Duration
	seed          uint64
	out           string
	json          bool
	planTemp      float64
	planCool      float64
	logLevel      string
	noProgressBar bool
	wantESS       float64
	wantRhat      float64
	wantKSD       float64
	minibatch     int
	eps           float64
	interval      float64
	history       string
	progressEvery int64
}

func demo(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("demo", flag.ContinueOnError)
	fs.SetOutput(stderr)
	var c demoConfig
	fs.IntVar(&c.chains, "chains", 8, "number of chains")
	fs.StringVar(&c.kernel, "kernel", "lmc", "sampling kernel")
	fs.Float64Var(&c.step, "step", 0, "step size h (0: automatic, with a metric adapted during burn-in; with --minibatch, a tenth of 1/M)")
	fs.Int64Var(&c.burnIn, "burn-in", 1000, "steps per chain discarded before keeping draws")
	fs.Int64Var(&c.keepEvery, "keep-every", 10, "keep every k-th step after burn-in (thinning)")
	fs.Int64Var(&c.draws, "draws", 1000, "kept draws per chain (0: until a budget runs out)")
	fs.Int64Var(&c.maxEvals, "max-evals", 0, "most gradient evaluations (0: no limit)")
	fs.DurationVar(&c.maxTime, "max-time", 50*time.Second, "most wall time (0: no limit)")
	fs.Uint64Var(&c.seed, "seed", 0, "random seed for start points and chains (0: pick one and print it)")
	fs.StringVar(&c.out, "out", "", "write the draws to this file: .csv (chain, iteration, parameters) or .npy (chains × draws × parameters), and the summary to the same name plus .summary.json")
	fs.BoolVar(&c.json, "json", false, "print the summary as one JSON object")
	fs.Float64Var(&c.planTemp, "plan-temp", 1150, "planned peak temperature in °C, for the question answered at the end")
	fs.Float64Var(&c.planCool, "plan-cool", 8, "planned cooling rate in °C per minute")
	fs.StringVar(&c.logLevel, "log-level", "warn", "server log level: debug, info, warn, error")
	fs.BoolVar(&c.noProgressBar, "quiet", false, "no live progress line")
	fs.Float64Var(&c.wantESS, "want-ess", 0, "finish once every parameter's bulk- and tail-ESS reach this (0: no target)")
	fs.Float64Var(&c.wantRhat, "want-rhat", 0, "finish once every parameter's R-hat is below this, e.g. 1.01 (0: no target)")
	fs.Float64Var(&c.wantKSD, "want-ksd", 0, "finish once the kernel Stein discrepancy is below this (0: no target)")
	fs.IntVar(&c.minibatch, "minibatch", 0, "answer with stochastic gradients from minibatches of this many firings, two replicates per point (0: exact gradients)")
	fs.Float64Var(&c.eps, "eps", 0.5, "with --minibatch: the W2 accuracy to plan for with the measured noise")
	fs.Float64Var(&c.interval, "interval", 0.9, "level of the central interval shown for each parameter and for the answer, in (0, 1)")
	fs.Int64Var(&c.progressEvery, "progress-every", 1000, "a progress report every this many steps, every diagnostic measured at each, so the same seed gives the same history (0: every 200 ms of wall time, diagnostics within the server's share of the time)")
	fs.StringVar(&c.history, "history", "", "write the progress history (JSON lines, see docs/report.md) to this file (default: beside --out, <out>.history.jsonl)")
	setHelp(fs, help{
		usage: "sluice demo [flags]",
		about: "Runs a sluice server and a client in one process, on loopback, and samples an invented model end to end: " +
			"a Bayesian logistic regression of whether a batch of glazed tiles cracks in a kiln, against peak firing " +
			"temperature and cooling rate, on 300 firings invented for this demo. It prints, for each coefficient, the " +
			"mean with its Monte Carlo error, the spread (standard deviation), the median, a central interval at " +
			"--interval, R-hat and the bulk and tail ESS; then the measured accuracy (Stein discrepancy, curvature seen " +
			"along the chains) and, apart, the guaranteed bound for the declared curvature; then the chance that a batch " +
			"cracks at a planned schedule (--plan-temp, --plan-cool). With --minibatch it answers with minibatch gradients " +
			"and shows the measured noise and what a guarantee would cost with it. --json prints the same summary as JSON " +
			"(its layout: README, \"The demo's summary\").",
		examples: []string{
			"sluice demo",
			"sluice demo --kernel mala --chains 4 --draws 2000 --interval 0.95",
			"sluice demo --want-ess 400 --want-rhat 1.01 --draws 0 --max-time 30s",
			"sluice demo --minibatch 30 --eps 0.5",
			"sluice demo --seed 11 --out draws.npy   # also writes draws.npy.summary.json",
			"sluice demo --json --quiet > summary.json",
		},
		kernels: "Kernels the server runs (--kernel takes any but rejection, whose Gaussian envelope with a proven bound " +
			"would accept about 1 proposal in 1400 for this posterior):",
	})
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if !(c.interval > 0 && c.interval < 1) {
		return usagef("--interval %v: the level must be in (0, 1), e.g. 0.9 for a 90%% interval", c.interval)
	}
	if c.history == "" && c.out != "" {
		c.history = sidecar(c.out, "history.jsonl")
	}
	if c.out != "" && !strings.HasSuffix(c.out, ".csv") && !strings.HasSuffix(c.out, ".npy") {
		return usagef("--out %q: the name must end in .csv or .npy", c.out)
	}
	if c.progressEvery < 0 {
		return usagef("--progress-every must be ≥ 0")
	}
	if c.chains < 1 || c.burnIn < 0 || c.keepEvery < 1 || c.draws < 0 || c.maxEvals < 0 || c.maxTime < 0 || c.step < 0 {
		return usagef("--chains and --keep-every must be ≥ 1; --burn-in, --draws, --max-evals, --max-time, --step ≥ 0")
	}
	if c.kernel == "rejection" {
		return usagef("--kernel rejection needs a Gaussian envelope with a proven bound; for this posterior the bound one can prove (scale 1/√m) accepts about 1 proposal in 1400: use hit-and-run as the density-only reference")
	}
	if c.minibatch < 0 || c.minibatch > kilnFirings || !(c.eps > 0) {
		return usagef("--minibatch must be between 0 and %d, --eps > 0", kilnFirings)
	}
	if c.wantESS < 0 || c.wantKSD < 0 || (c.wantRhat != 0 && c.wantRhat <= 1) {
		return usagef("--want-ess and --want-ksd must be ≥ 0, --want-rhat > 1")
	}
	if c.draws == 0 && c.maxEvals == 0 && c.maxTime == 0 {
		return usagef("with --draws 0, set --max-evals or --max-time so the run ends")
	}
	if c.seed == 0 {
		c.seed = rand.Uint64()>>1 | 1
	}
	res, err := runDemo(ctx, c, stderr)
	if err != nil {
		return err
	}
	if c.out != "" {
		if err := writeSummaryJSON(summaryPath(c.out), res); err != nil {
			return err
		}
	}
	if c.json {
		enc := json.NewEncoder(stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(res)
	}
	printDemo(stdout, res)
	return nil
}

// demoParameter is one row of the posterior table (its JSON form is
// documented in the README, "The demo's summary").
type demoParameter struct {
	Name string `json:"name"`
	// Mean of the pooled kept draws, and the server's Monte Carlo error
	// of that mean (sd/√ESS; null when the server had not measured it).
	Mean      float64 `json:"mean"`
	MeanError num     `json:"mean_error"`
	// Spread is the standard deviation of the pooled draws.
	Spread float64 `json:"spread"`
	Median float64 `json:"median"`
	// Interval is the central interval of the pooled draws at the
	// requested level.
	Interval interval `json:"interval"`
	// Mixing is how well the chains mixed, as the server measured it
	// (Vehtari et al. 2021; docs/methods.md, section 6).
	Mixing mixing `json:"mixing"`
}

// interval is a central interval: a share Level of the draws lies
// between Low and High, (1 − Level)/2 below and as many above.
type interval struct {
	Level float64 `json:"level"`
	Low   float64 `json:"low"`
	High  float64 `json:"high"`
}

// mixing holds the server's convergence figures for one parameter: R-hat
// (the larger of the rank-normalised and folded split R-hat) and the
// effective sample sizes for the bulk and the tails.
type mixing struct {
	Rhat    num `json:"rhat"`
	ESSBulk num `json:"ess_bulk"`
	ESSTail num `json:"ess_tail"`
}

// demoNoise is what the server measured of minibatch gradients, and what
// a guaranteed W2 accuracy would cost with that noise (sluice plan).
type demoNoise struct {
	Minibatch     int     `json:"minibatch"`
	Variance      float64 `json:"variance"`
	VarianceSE    float64 `json:"variance_se"`
	Epochs        float64 `json:"epochs"`
	Eps           float64 `json:"eps"`
	PlanStep      float64 `json:"plan_step"`
	PlanEvals     int64   `json:"plan_evaluations"`
	PlanNoiseTerm float64 `json:"plan_noise_term"`
}

// demoAccuracy is the server's accuracy report at the end: measured
// (Stein discrepancy, curvature seen) and guaranteed (the bound, with its
// label), kept apart.
type demoAccuracy struct {
	KSD             num     `json:"ksd"`
	KSDUpper95      num     `json:"ksd_upper95"`
	KSDState        string  `json:"ksd_state,omitempty"`
	SmoothnessSeen  num     `json:"smoothness_at_least"`
	ConvexitySeen   num     `json:"strong_convexity_at_most"`
	DeclaredM       float64 `json:"declared_m"`
	DeclaredBigM    float64 `json:"declared_M"`
	BoundMetric     string  `json:"bound_metric,omitempty"`
	Bound           float64 `json:"bound,omitempty"`
	BoundLabel      string  `json:"bound_label,omitempty"`
	BoundStart      float64 `json:"bound_start_term,omitempty"`
	BoundDiscretise float64 `json:"bound_discretisation_term,omitempty"`
	BoundNoise      float64 `json:"bound_noise_term,omitempty"`
}

// demoAnswer is the downstream question answered from the draws: the
// chance that a batch cracks at the planned schedule, averaged over the
// draws, and the central interval of its values over the draws.
type demoAnswer struct {
	TempC          float64  `json:"temperature_c"`
	CoolCPerMinute float64  `json:"cooling_c_per_minute"`
	Chance         float64  `json:"chance_of_cracking"`
	Interval       interval `json:"interval"`
}

// drawsFile describes the file --out wrote, so that the summary beside it
// says how to read it (a .npy array has no room for parameter names).
type drawsFile struct {
	Path   string `json:"path"`
	Format string `json:"format"` // "csv" or "npy"
	// Layout says where each value is: for csv, a header row then one row
	// per draw; for npy, the axes of the array.
	Layout string `json:"layout"`
	// Shape is [chains, draws, parameters] for npy.
	Shape []int `json:"shape,omitempty"`
	// ParameterNames are the names of the parameter axis (npy) or of the
	// columns after chain and iteration (csv), in order.
	ParameterNames []string `json:"parameter_names"`
	// Summary is the path of the summary file written beside it.
	Summary string `json:"summary"`
}

// demoChoice is one setting the server chose automatically.
type demoChoice struct {
	Setting string  `json:"setting"`
	Value   float64 `json:"value"`
	Reason  string  `json:"reason"`
}

type demoResult struct {
	Scenario      string          `json:"scenario"`
	SessionID     string          `json:"session_id"`
	Kernel        string          `json:"kernel"`
	Step          float64         `json:"step"`
	Metric        string          `json:"metric"`
	Tuning        []demoChoice    `json:"tuning,omitempty"`
	TuningEvals   int64           `json:"tuning_evaluations"`
	Chains        int             `json:"chains"`
	Seed          uint64          `json:"seed"`
	Reason        string          `json:"reason"`
	Evaluations   int64           `json:"evaluations"`
	Seconds       float64         `json:"seconds"`
	DrawsPerChain int             `json:"draws_per_chain"`
	Parameters    []demoParameter `json:"parameters"`
	Accuracy      demoAccuracy    `json:"accuracy"`
	Noise         *demoNoise      `json:"noise,omitempty"`
	Question      *demoAnswer     `json:"question,omitempty"`
	DrawsFile     *drawsFile      `json:"draws_file,omitempty"`
	// Message is the server's detail on the reason (which check failed).
	Message string `json:"message,omitempty"`
	// Checks is the session's verdict: every named check with its status.
	Checks         []demoCheck `json:"checks"`
	MinDrawsNeeded int         `json:"-"`
}

// demoCheck is one check of the verdict (status "pass", "warn" or
// "fail"; figure null when there is none).
type demoCheck struct {
	Name    string `json:"name"`
	Status  string `json:"status"`
	Figure  num    `json:"figure"`
	Message string `json:"message"`
}

func runDemo(ctx context.Context, c demoConfig, stderr io.Writer) (*demoResult, error) {
	target, err := kilnTarget(kilnData())
	if err != nil {
		return nil, err
	}
	if c.step == 0 && (c.minibatch > 0 || strings.HasPrefix(c.kernel, "ozaki")) {
		// Automatic tuning probes the curvature with exact gradients, and
		// the Ozaki kernels have none: those get a fixed step.
		_, bigM := target.Curvature()
		switch c.kernel {
		case "kinetic", "baoab", "midpoint":
			// With inverse mass u = 1/M (the server's default when M is
			// declared) the underdamped dynamics' frequencies are at most
			// 1: a step of a quarter of that time unit.
			c.step = 0.25
		default:
			c.step = 0.1 / bigM
		}
	}
	log, err := newLogger(c.logLevel, stderr)
	if err != nil {
		return nil, err
	}
	defer func() { _ = log.Sync() }()

	// A real server on a loopback port, and a client talking to it.
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return nil, err
	}
	opts := server.Options{Logger: log}
	if c.progressEvery > 0 {
		// Every report measured, whatever the wall time it takes: the
		// history (and a target's finishing step) then depends on the
		// seed alone.
		opts.Limits.DiagnosticsShare = -1
	}
	srv := server.New(opts)
	go func() { _ = srv.Serve(lis) }()
	defer srv.Stop()
	conn, err := grpc.NewClient(lis.Addr().String(), grpc.WithTransportCredentials(insecure.NewCredentials()),
		experimental.WithBufferPool(server.BufferPool()))
	if err != nil {
		return nil, err
	}
	defer conn.Close()

	// Dispersed start points, one per chain, drawn from the prior's scale.
	r := rand.New(rand.NewPCG(c.seed, 1))
	start := make([]float64, c.chains*3)
	for i := range start {
		start[i] = r.NormFloat64()
	}
	// The model's curvature is known: m is the prior precision and M adds
	// a quarter of λ_max(XᵀX). A chain started at x is within
	// ‖x − θ*‖ + √(p/m) of π in W2 (triangle inequality and
	// E_π‖θ − θ*‖² ≤ p/m; docs/methods.md, section 2.3), which the demo
	// can declare because it knows the mode θ*.
	m, bigM := target.Curvature()
	mode, err := target.Mode(1e-10, 100)
	if err != nil {
		return nil, err
	}
	w0 := 0.0
	for ch := range c.chains {
		var d2 float64
		for i := range 3 {
			d := start[ch*3+i] - mode[i]
			d2 += d * d
		}
		w0 = math.Max(w0, math.Sqrt(d2)+math.Sqrt(3/m))
	}
	spec := client.Spec{Dim: 3, Chains: c.chains, Kernel: c.kernel, Start: start, Step: c.step, BurnIn: c.burnIn,
		KeepEvery: c.keepEvery, DrawsPerChain: c.draws, MaxEvaluations: c.maxEvals, MaxTime: c.maxTime,
		Seed: c.seed, Names: kilnNames, ProgressInterval: 200 * time.Millisecond, ProgressEverySteps: c.progressEvery,
		Curvature: &client.Curvature{StrongConvexity: m, Smoothness: bigM, StartDistance: w0},
		Wants:     client.Wants{MinBulkESS: c.wantESS, MinTailESS: c.wantESS, MaxRhat: c.wantRhat, MaxKSD: c.wantKSD}}

	chains := make([][][]float64, 3) // [param][chain][draw]
	for i := range chains {
		chains[i] = make([][]float64, c.chains)
	}
	runOpts := []client.Option{client.OnDraws(func(d *client.Draws) {
		for row := range d.Rows {
			ch := d.Chains[row]
			for i := range 3 {
				chains[i][ch] = append(chains[i][ch], d.Values[row*3+i])
			}
		}
	})}
	var csv *history.DrawsWriter
	if strings.HasSuffix(c.out, ".csv") {
		if csv, err = history.CreateDraws(c.out, kilnNames); err != nil {
			return nil, err
		}
		runOpts = append(runOpts, client.WriteDraws(csv))
	}
	// The live view of `sluice watch`, on a terminal only.
	live := newView(stderr, !c.noProgressBar && !c.json && isTerminal(stderr), time.Now)
	live.title = "sluice demo"
	live.head = &client.FollowHeader{Dim: 3, Chains: c.chains, Kernel: c.kernel, Names: kilnNames, Step: c.step,
		BurnIn: c.burnIn, KeepEvery: c.keepEvery, DrawsPerChain: c.draws, MaxEvaluations: c.maxEvals, MaxTime: c.maxTime}
	var hist *history.Writer
	if c.history != "" {
		if hist, err = history.Create(c.history); err != nil {
			return nil, err
		}
		runOpts = append(runOpts, client.WriteHistory(hist))
	}
	if live.tty {
		runOpts = append(runOpts, client.OnProgress(live.progress))
	}
	eval := kilnExact(target)
	if c.minibatch > 0 {
		spec.Noise = &client.Noise{Replicates: 2, DataSize: kilnFirings, MinibatchSize: int64(c.minibatch)}
		eval = kilnMinibatch(kilnData(), c.minibatch, c.seed)
	}
	sum, err := client.Run(ctx, conn, spec, eval, runOpts...)
	live.done()
	if hist != nil {
		if herr := hist.Close(); err == nil && herr != nil {
			err = herr
		}
	}
	if csv != nil {
		if cerr := csv.Close(); err == nil && cerr != nil {
			err = cerr
		}
	}
	if err != nil {
		return nil, err
	}
	res := &demoResult{
		Scenario:  "kiln tile cracking: Bayesian logistic regression on 300 invented firings",
		SessionID: sum.Registered.SessionID, Kernel: sum.Registered.Kernel, Step: sum.Registered.Step,
		Chains: c.chains, Seed: sum.Registered.Seed, Reason: string(sum.Reason),
		Evaluations: sum.Progress.EvaluationsUsed, Seconds: sum.Progress.Elapsed.Seconds(),
		TuningEvals: sum.Progress.TuningEvaluations,
	}
	if k := sum.Progress.Kernel.Step; k > 0 {
		res.Step = k // the step in use (the automatic one when Registered said 0)
	}
	mr := sum.Progress.Metric
	res.Metric = mr.Kind
	if mr.Source == "adapted" {
		res.Metric = fmt.Sprintf("%s, adapted during burn-in (%d updates, last at step %d, condition number %.3g, shrinkage %.2f)",
			mr.Kind, mr.Updates, mr.UpdatedAtStep, mr.Condition, mr.Shrinkage)
	}
	for _, t := range sum.Progress.Tuning {
		res.Tuning = append(res.Tuning, demoChoice{t.Setting, t.Value, t.Reason})
	}
	n := len(chains[0][0])
	for _, ch := range chains[0] {
		n = min(n, len(ch))
	}
	res.DrawsPerChain = n
	switch {
	case strings.HasSuffix(c.out, ".npy"):
		if err := writeNPY(c.out, c.chains, n, 3, func(ch, t, i int) float64 { return chains[i][ch][t] }); err != nil {
			return nil, err
		}
		res.DrawsFile = &drawsFile{Path: c.out, Format: "npy", Shape: []int{c.chains, n, 3},
			Layout:         "float64 array, axes (chain, draw, parameter); draw t of a chain is its t-th kept draw",
			ParameterNames: kilnNames, Summary: summaryPath(c.out)}
	case c.out != "":
		res.DrawsFile = &drawsFile{Path: c.out, Format: "csv",
			Layout:         "header row, then one row per kept draw: chain, iteration, then one column per parameter",
			ParameterNames: kilnNames, Summary: summaryPath(c.out)}
	}
	if n < 4 {
		return res, fmt.Errorf("session ended (%s) with %d draws per chain: too few to summarise", sum.Reason, n)
	}
	for i, name := range kilnNames {
		for ch := range chains[i] {
			chains[i][ch] = chains[i][ch][:n]
		}
		p := summarise(name, chains[i], c.interval)
		for _, d := range sum.Progress.Parameters {
			if d.Name == name {
				p.MeanError = num(d.MCSE)
				p.Mixing = mixing{Rhat: num(d.Rhat), ESSBulk: num(d.BulkESS), ESSTail: num(d.TailESS)}
			}
		}
		res.Parameters = append(res.Parameters, p)
	}
	fp := sum.Progress
	res.Message = sum.Message
	res.Checks = []demoCheck{}
	for _, ch := range sum.Checks {
		res.Checks = append(res.Checks, demoCheck{Name: ch.Name, Status: string(ch.Status), Figure: num(ch.Figure), Message: ch.Message})
	}
	if n := fp.Noise; n != nil && c.minibatch > 0 {
		res.Noise = &demoNoise{Minibatch: c.minibatch, Variance: n.Variance, VarianceSE: n.SE, Epochs: n.Epochs, Eps: c.eps}
		// What a guaranteed W2 ≤ eps would cost with this noise: the noise
		// term's σ is the replicate mean's, √(s²/2).
		plan, perr := server.MakePlan(&sluicev1.PlanRequest{Curvature: &sluicev1.Curvature{StrongConvexity: m, Smoothness: bigM},
			Dim: 3, Eps: c.eps, Metric: sluicev1.Metric_METRIC_W2, NoiseSd: math.Sqrt(math.Max(n.Variance, 0) / 2),
			StartDistance: w0, Chains: int32(c.chains)})
		if perr == nil {
			res.Noise.PlanStep, res.Noise.PlanEvals, res.Noise.PlanNoiseTerm = plan.Step, plan.Evaluations, plan.Bound.NoiseTerm
		}
	}
	res.Accuracy = demoAccuracy{KSD: num(fp.KSD), SmoothnessSeen: num(fp.Curvature.SmoothnessAtLeast),
		ConvexitySeen: num(fp.Curvature.StrongConvexityAtMost), DeclaredM: m, DeclaredBigM: bigM, KSDUpper95: -1}
	if st := fp.Stein; st != nil {
		res.Accuracy.KSDUpper95, res.Accuracy.KSDState = num(st.Upper95), st.State
	}
	if b := fp.Bound; b != nil {
		res.Accuracy.BoundMetric, res.Accuracy.Bound, res.Accuracy.BoundLabel = string(b.Metric), b.Value, b.Label
		res.Accuracy.BoundStart, res.Accuracy.BoundDiscretise, res.Accuracy.BoundNoise = b.Start, b.Discretisation, b.Noise
	}
	// The downstream question: the chance of cracking at the planned
	// schedule, one value per draw, summarised.
	x := kilnFeatures(c.planTemp, c.planCool)
	var probs []float64
	for ch := range c.chains {
		for t := range n {
			theta := []float64{chains[0][ch][t], chains[1][ch][t], chains[2][ch][t]}
			probs = append(probs, sigmoid(dot(theta, x)))
		}
	}
	sort.Float64s(probs)
	res.Question = &demoAnswer{TempC: c.planTemp, CoolCPerMinute: c.planCool, Chance: meanOf(probs),
		Interval: centralInterval(probs, c.interval)}
	return res, nil
}

// summarise pools a parameter's chains: mean, spread (standard deviation,
// divisor n − 1), median and the central interval at level. The server's
// figures (mean error, mixing) start as not available.
func summarise(name string, chains [][]float64, level float64) demoParameter {
	var all []float64
	for _, c := range chains {
		all = append(all, c...)
	}
	m := meanOf(all)
	var ss float64
	for _, v := range all {
		ss += (v - m) * (v - m)
	}
	sd := math.Sqrt(ss / float64(len(all)-1))
	sort.Float64s(all)
	na := num(math.NaN())
	return demoParameter{Name: name, Mean: m, MeanError: na, Spread: sd, Median: quantileSorted(all, 0.5),
		Interval: centralInterval(all, level), Mixing: mixing{Rhat: na, ESSBulk: na, ESSTail: na}}
}

// centralInterval is the interval from the (1 − level)/2 to the
// (1 + level)/2 quantile of sorted x.
func centralInterval(sorted []float64, level float64) interval {
	return interval{Level: level, Low: quantileSorted(sorted, (1-level)/2), High: quantileSorted(sorted, (1+level)/2)}
}

func meanOf(x []float64) float64 {
	var s float64
	for _, v := range x {
		s += v
	}
	return s / float64(len(x))
}

// quantileSorted is the linear-interpolation quantile of sorted x
// (common practice: the "type 7" definition).
func quantileSorted(x []float64, q float64) float64 {
	h := q * float64(len(x)-1)
	lo := math.Floor(h)
	i := int(lo)
	if i+1 >= len(x) {
		return x[len(x)-1]
	}
	return x[i] + (h-lo)*(x[i+1]-x[i])
}

func printDemo(w io.Writer, r *demoResult) {
	fmt.Fprintf(w, "sluice demo: %s\n", r.Scenario)
	fmt.Fprintf(w, "session %s: kernel %s, step %.4g, %d chains, seed %d, metric %s\n", r.SessionID, r.Kernel, r.Step, r.Chains, r.Seed, r.Metric)
	for _, t := range r.Tuning {
		fmt.Fprintf(w, "chosen:     %s = %.4g: %s\n", t.Setting, t.Value, t.Reason)
	}
	if r.TuningEvals > 0 {
		fmt.Fprintf(w, "            (the curvature probes cost %d gradient evaluations)\n", r.TuningEvals)
	}
	fmt.Fprintf(w, "finished (%s): %d gradient evaluations in %.2f s, %d draws per chain kept\n",
		r.Reason, r.Evaluations, r.Seconds, r.DrawsPerChain)
	if r.Message != "" {
		fmt.Fprintf(w, "            %s\n", r.Message)
	}
	fmt.Fprintln(w)
	printVerdict(w, r.Checks)
	printParameters(w, r.Parameters)
	fmt.Fprintf(w, "(coefficients on the log-odds scale: temperature per %g °C, cooling rate per %g °C/min)\n\n", tempScale, coolScale)
	a := r.Accuracy
	if a.KSD >= 0 && strings.HasPrefix(a.KSDState, "not distinguishable") {
		// The estimate is no news when the test cannot tell it from 0: say
		// that, and how large it may be.
		fmt.Fprintf(w, "measured:   Stein discrepancy %s (upper 95%% bound %.4g); curvature seen along the chains M ≥ %.4g, m ≤ %.4g\n",
			a.KSDState, float64(a.KSDUpper95), float64(a.SmoothnessSeen), float64(a.ConvexitySeen))
	} else if a.KSD >= 0 {
		fmt.Fprintf(w, "measured:   Stein discrepancy %.4g (upper 95%% bound %.4g: %s); curvature seen along the chains M ≥ %.4g, m ≤ %.4g\n",
			float64(a.KSD), float64(a.KSDUpper95), a.KSDState, float64(a.SmoothnessSeen), float64(a.ConvexitySeen))
	} else {
		fmt.Fprintln(w, "measured:   no Stein discrepancy or curvature certificates: they need exact gradients of every draw")
	}
	if a.BoundLabel != "" {
		// Only a bound whose assumptions were declared and checked is
		// called guaranteed; an estimated one says so in its first word.
		head := "estimated: "
		if strings.HasPrefix(a.BoundLabel, "guaranteed") {
			head = "guaranteed:"
		}
		fmt.Fprintf(w, "%s %s ≤ %.4g after the last step (%s; m = %.3g, M = %.3g declared)\n",
			head, strings.ToUpper(a.BoundMetric), a.Bound, a.BoundLabel, a.DeclaredM, a.DeclaredBigM)
		fmt.Fprintf(w, "            of which %.3g from the start, %.3g from the step size", a.BoundStart, a.BoundDiscretise)
		if a.BoundNoise > 0 {
			fmt.Fprintf(w, ", %.3g from gradient noise", a.BoundNoise)
		}
		fmt.Fprintf(w, ": the worst case for condition number %.0f\n\n", a.DeclaredBigM/a.DeclaredM)
	} else {
		fmt.Fprintln(w)
	}
	if n := r.Noise; n != nil {
		fmt.Fprintf(w, "noise:      minibatches of %d firings, two per point; measured variance per coordinate %.4g ± %.2g, %.1f passes over the data\n",
			n.Minibatch, n.Variance, n.VarianceSE, n.Epochs)
		fmt.Fprintf(w, "            with two replicates averaged it inflates the draws' variance by about h·s²/4 = %.1f%%\n"+
			"            (exact for a Gaussian target: docs/methods.md, section 4)\n", 100*r.Step*n.Variance/4)
		if n.PlanStep > 0 {
			fmt.Fprintf(w, "            to guarantee W2 ≤ %g with this noise: step %.3g, %d evaluations (noise term %.3g)\n\n", n.Eps, n.PlanStep, n.PlanEvals, n.PlanNoiseTerm)
		} else {
			fmt.Fprintln(w)
		}
	}
	if q := r.Question; q != nil {
		fmt.Fprintf(w, "Planned firing at %g °C peak, cooling %g °C/min:\n", q.TempC, q.CoolCPerMinute)
		fmt.Fprintf(w, "  chance a batch cracks: %.3f (%s interval %.3f to %.3f over the draws)\n\n", q.Chance,
			levelPercent(q.Interval.Level), q.Interval.Low, q.Interval.High)
	}
	if f := r.DrawsFile; f != nil {
		fmt.Fprintf(w, "draws written to %s (%s), summary to %s\n", f.Path, f.Format, f.Summary)
	}
	fmt.Fprintln(w, "These draws are approximate and the diagnostics cannot prove convergence; validate before relying on them.")
}

// summaryPath is where the JSON summary goes beside a draws file: the
// file's whole name plus ".summary.json" (draws.csv → draws.csv.summary.json,
// draws.npy → draws.npy.summary.json), so a CSV and an NPY run of the same
// stem keep their own summaries.
func summaryPath(out string) string { return out + ".summary.json" }

func writeSummaryJSON(path string, r *demoResult) error {
	b, err := json.MarshalIndent(r, "", "  ")
	if err != nil {
		return err
	}
	return os.WriteFile(path, append(b, '\n'), 0o644)
}

// num is a float64 that encodes as JSON null when not finite (NaN, ±Inf
// mean "not available" here, and JSON has no such numbers).
type num float64

func (n num) MarshalJSON() ([]byte, error) {
	f := float64(n)
	if math.IsNaN(f) || math.IsInf(f, 0) {
		return []byte("null"), nil
	}
	return json.Marshal(f)
}

func (n *num) UnmarshalJSON(b []byte) error {
	if string(b) == "null" {
		*n = num(math.NaN())
		return nil
	}
	var f float64
	err := json.Unmarshal(b, &f)
	*n = num(f)
	return err
}

// printParameters prints the posterior table:
//
//	parameter        mean ± MC error     spread     median   90% interval          R-hat  ESS bulk  ESS tail
//	intercept     -1.2345 ± 0.0031       0.2113    -1.2301   [-1.5812, -0.8911]    1.002      1843      2011
//
// "n/a" stands for a figure the server had not measured.
func printParameters(w io.Writer, ps []demoParameter) {
	level := 0.9
	if len(ps) > 0 {
		level = ps[0].Interval.Level
	}
	fmt.Fprintf(w, "%-14s %21s %9s %10s   %-21s %6s %9s %9s\n", "parameter", "mean ± MC error", "spread", "median",
		levelPercent(level)+" interval", "R-hat", "ESS bulk", "ESS tail")
	for _, p := range ps {
		fmt.Fprintf(w, "%-14s %21s %9.4f %10.4f   %-21s %6s %9s %9s\n", p.Name, meanWithError(p.Mean, p.MeanError), p.Spread, p.Median,
			fmt.Sprintf("[%.4f, %.4f]", p.Interval.Low, p.Interval.High), fmtNum(p.Mixing.Rhat, "%.3f"),
			fmtNum(p.Mixing.ESSBulk, "%.0f"), fmtNum(p.Mixing.ESSTail, "%.0f"))
	}
	fmt.Fprintln(w, "(mean ± its Monte Carlo error; spread: standard deviation of the draws; interval: central, of the pooled draws;")
	fmt.Fprintln(w, " R-hat and ESS as the server measured them, docs/methods.md section 6)")
}

// meanWithError writes "0.4120 ± 0.0030", or "0.4120 ± n/a".
func meanWithError(mean float64, err num) string {
	return fmt.Sprintf("%.4f ± %s", mean, fmtNum(err, "%.4f"))
}

// fmtNum formats a figure, or "n/a" when it is not available.
func fmtNum(n num, format string) string {
	f := float64(n)
	if math.IsNaN(f) || math.IsInf(f, 0) {
		return "n/a"
	}
	return fmt.Sprintf(format, f)
}

// levelPercent writes a level as a percentage: 0.9 → "90%", 0.995 → "99.5%".
func levelPercent(level float64) string {
	return strconv.FormatFloat(math.Round(level*100*1e6)/1e6, 'f', -1, 64) + "%"
}

// printVerdict prints the session's checks, one line each, failures and
// warnings first.
func printVerdict(w io.Writer, checks []demoCheck) {
	if len(checks) == 0 {
		return
	}
	fmt.Fprintln(w, "verdict:")
	for _, want := range []string{"fail", "warn", "pass"} {
		for _, c := range checks {
			if c.Status == want {
				fmt.Fprintf(w, "  %-4s %-10s %s\n", c.Status, c.Name, c.Message)
			}
		}
	}
	fmt.Fprintln(w)
}
