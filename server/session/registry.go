package session

import (
	"math"
	"math/rand/v2"
	"slices"

	"sluice/kernels"
)

// The kernel registry: everything the engine knows of each kernel, in one
// entry per kernel. Validation, construction, message sizing, accounting
// and the docs read from it; outside this file and the wire conversion,
// no kernel is named.

// defaultKernel is the kernel of a Spec that names none.
const defaultKernel = "lmc"

// kernelEntry describes one kernel to the engine.
type kernelEntry struct {
	// name is the kernel's name in Spec.Kernel and on the wire.
	name string
	// requests lists every kind of request the kernel may send, each with
	// its worst-case number of rows, so that registration can check that
	// every request (and its answer) fits a message, and a memory budget
	// can be computed from the entry alone.
	requests []requestShape
	// exactGradients is set when the kernel's correctness needs exact
	// gradients (an accept/reject step or a Hessian step): stochastic
	// gradients, and so replicates, are refused.
	exactGradients bool
	// noStep is set for kernels that take no step size (they ask for log
	// densities only).
	noStep bool
	// guaranteed is set for the kernels the guaranteed bounds of package
	// bound cover; only they may have their step planned from wants.eps,
	// and only they get an estimated bound from curvature certificates.
	guaranteed bool
	// schedule and envelope say whether the kernel takes Spec.Schedule
	// and Spec.Envelope.
	schedule, envelope bool
	// randomCost is set when EvaluationsPerStep is a ceiling or an
	// estimate (the cost is random or found by a search); those that
	// measure their mean cost implement kernels.CostMeter.
	randomCost bool
	// setupRows is the evaluations per chain a kernel spends once, before
	// its first step (MALA evaluates its start points).
	setupRows int
	// periodicRows returns the extra evaluations per chain beyond
	// EvaluationsPerStep over steps steps (svrg's full-data anchors), or
	// nil when there are none.
	periodicRows func(spec *Spec, steps int) int
	// faultField is the wire field a kernels.Faulter's error is charged
	// to ("" for kernels that raise none).
	faultField string
	// check validates the kernel's own Spec fields; nil when it has none.
	// It runs after the common validation.
	check func(s *Spec) error
	// tune fills the kernel's tuning defaults into the Spec (the values a
	// zero field stands for); nil when it has none.
	tune func(s *Spec)
	// tuning is the rule of the kernel's automatic settings (tune.go);
	// ruleNone for kernels that take neither a metric nor an automatic
	// step. Every other kernel implements kernels.MetricUser and
	// kernels.StepSetter.
	tuning tuneRule
	// build constructs the kernel from a validated, tuned Spec.
	build func(s *Spec, src *rand.PCG) kernels.Kernel
	// chainwise is set for kernels whose chains never read each other:
	// the session runs them as one kernel per chain, each with its own
	// random stream (kernels.ChainSource), so that a chain's draws do not
	// depend on how the chains are grouped into requests.
	chainwise bool
	// pipelines is set for chainwise kernels that ask one request per
	// step: their chains may be stepped in groups, a group at a time, so
	// that the client always has points to evaluate (Spec.Groups).
	pipelines bool
}

// buildKernel constructs the session's kernel from a validated, tuned
// Spec: for a chainwise entry one kernel per chain, chain c drawing from
// kernels.ChainSource(seed, c), batched by kernels.NewBlocks; else one
// kernel over every chain drawing from kernels.NewSource(seed).
func (e *kernelEntry) buildKernel(s *Spec) kernels.Kernel {
	if !e.chainwise {
		return e.build(s, kernels.NewSource(s.Seed))
	}
	ks := make([]kernels.Kernel, s.Chains)
	one := *s
	one.Chains = 1
	for c := range ks {
		one.Start = s.Start
		if len(s.Start) == s.Chains*s.Dim {
			one.Start = s.Start[c*s.Dim : (c+1)*s.Dim]
		}
		ks[c] = e.build(&one, kernels.ChainSource(s.Seed, c))
	}
	return kernels.NewBlocks(ks)
}

// requestShape is one kind of request: what it needs, and at most how
// many rows it has per chain.
type requestShape struct {
	need         kernels.Need
	rowsPerChain int
}

// need is every quantity the kernel may ask for.
func (e *kernelEntry) need() kernels.Need {
	var n kernels.Need
	for _, r := range e.requests {
		n |= r.need
	}
	return n
}

// takesReplicates reports whether the kernel can use replicated
// stochastic gradients.
func (e *kernelEntry) takesReplicates() bool {
	return !e.exactGradients && e.need().Has(kernels.NeedGradient)
}

// inverseMass is the inverse mass of the kinetic kernels: the declared
// one, else 1/M when the curvature is declared, else 1.
func inverseMass(s *Spec) float64 {
	if s.InverseMass == 0 && s.Curvature != nil {
		return 1 / s.Curvature.Smoothness
	}
	return s.InverseMass
}

var gradientRows = []requestShape{{kernels.NeedGradient, 1}}

// registry holds every kernel, in the order the docs list them.
var registry = []*kernelEntry{
	{
		name: "lmc", requests: gradientRows, guaranteed: true, tuning: ruleOverdamped, chainwise: true, pipelines: true,
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			return kernels.NewLMC(s.Dim, s.Chains, s.Step, s.Start, src)
		},
	},
	{
		name: "kinetic", requests: gradientRows, tuning: ruleKinetic, chainwise: true, pipelines: true,
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			return kernels.NewKinetic(s.Dim, s.Chains, s.Step, s.Friction, inverseMass(s), s.Start, nil, src)
		},
	},
	{
		name: "baoab", requests: gradientRows, tuning: ruleSplitting, chainwise: true, pipelines: true,
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			return kernels.NewBAOAB(s.Dim, s.Chains, s.Step, s.Friction, inverseMass(s), s.Start, nil, src)
		},
	},
	{
		name: "midpoint", requests: gradientRows, tuning: ruleMidpoint, chainwise: true,
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			return kernels.NewMidpoint(s.Dim, s.Chains, s.Step, inverseMass(s), s.Start, nil, src)
		},
	},
	{
		name: "midpoint-overdamped", requests: gradientRows, tuning: ruleOverdampedMidpoint, chainwise: true,
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			return kernels.NewOverdampedMidpoint(s.Dim, s.Chains, s.Step, s.Start, src)
		},
	},
	{
		name: "mala", requests: []requestShape{{kernels.NeedGradient | kernels.NeedLogDensity, 1}}, exactGradients: true,
		setupRows: 1, tuning: ruleMALA,
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			// Adaptation ends with burn-in, so no kept draw comes from it.
			return kernels.NewMALA(s.Dim, s.Chains, s.Step, int(min(s.BurnIn, math.MaxInt32)), s.Start, src)
		},
	},
	{
		name: "ozaki", requests: []requestShape{{kernels.NeedGradient | kernels.NeedHessian, 1}}, exactGradients: true,
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			return kernels.NewOzaki(s.Dim, s.Chains, s.Step, s.Start, src)
		},
	},
	{
		name: "ozaki-krylov", exactGradients: true, randomCost: true,
		requests: []requestShape{{kernels.NeedGradient | kernels.NeedHessianVector, 1}, {kernels.NeedHessianVector, 2}},
		tune: func(s *Spec) {
			if s.KrylovTolerance == 0 {
				s.KrylovTolerance = 1e-8
			}
			if s.KrylovMaxIterations == 0 {
				s.KrylovMaxIterations = min(s.Dim, 64)
			}
		},
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			return kernels.NewOzakiKrylov(s.Dim, s.Chains, s.Step, s.Start, s.KrylovTolerance, s.KrylovMaxIterations, src)
		},
	},
	{
		name: "sgld", requests: gradientRows, schedule: true, tuning: ruleOverdamped,
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			var sched kernels.SGLDSchedule
			if s.Schedule != nil {
				sched = *s.Schedule
			}
			return kernels.NewSGLD(s.Dim, s.Chains, s.Step, sched, s.Start, src)
		},
	},
	{
		name: "sgld-cv", randomCost: true, tuning: ruleOverdamped,
		requests: []requestShape{{kernels.NeedGradient | kernels.NeedFullData, 1}, {kernels.NeedGradient, 2}},
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			return kernels.NewSGLDCV(s.Dim, s.Chains, s.Step,
				kernels.SGLDCVOptions{Tol: s.FixedPointTolerance, MaxIter: s.FixedPointIterations}, s.Start, src)
		},
	},
	{
		name: "svrg", tuning: ruleOverdamped,
		requests: []requestShape{{kernels.NeedGradient | kernels.NeedFullData, 1}, {kernels.NeedGradient, 2}},
		periodicRows: func(s *Spec, steps int) int {
			return steps / s.AnchorEvery // one full-data anchor per chain every AnchorEvery steps
		},
		tune: func(s *Spec) {
			if s.AnchorEvery == 0 {
				s.AnchorEvery = 10
			}
		},
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			return kernels.NewSVRG(s.Dim, s.Chains, s.Step, s.AnchorEvery, s.Start, src)
		},
	},
	{
		name: "hit-and-run", requests: []requestShape{{kernels.NeedLogDensity, 2}}, exactGradients: true, noStep: true,
		randomCost: true,
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			return kernels.NewHitAndRun(s.Dim, s.Chains, s.Start,
				kernels.HitAndRunOptions{Width: s.SliceWidth, MaxExpansions: s.SliceMaxExpansions}, src)
		},
	},
	{
		name: "rejection", requests: []requestShape{{kernels.NeedLogDensity, 1}}, exactGradients: true, noStep: true,
		envelope: true, randomCost: true, faultField: "register.envelope.log_bound",
		check: checkEnvelope,
		build: func(s *Spec, src *rand.PCG) kernels.Kernel {
			e := s.Envelope
			return kernels.NewRejection(s.Dim, s.Chains, e.Mean, e.Scale, e.LogBound, src)
		},
	},
}

// lookupKernel returns the registry entry named name.
func lookupKernel(name string) (*kernelEntry, bool) {
	i := slices.IndexFunc(registry, func(e *kernelEntry) bool { return e.name == name })
	if i < 0 {
		return nil, false
	}
	return registry[i], true
}

// KernelNames returns the names a Spec may give as Kernel, in the order
// the docs list them. The slice is the caller's.
func KernelNames() []string {
	names := make([]string, len(registry))
	for i, e := range registry {
		names[i] = e.name
	}
	return names
}

// KernelCost describes the evaluations a kernel spends, for callers that
// account for them (tests, capacity planning).
type KernelCost struct {
	// Random is set when EvaluationsPerStep is only a ceiling or an
	// estimate: the kernel's cost per step is random or searched.
	Random bool
	// SetupPerChain is the evaluations per chain spent once, before the
	// first step.
	SetupPerChain int
	// CheckRows is the evaluations the default gradient check spends once,
	// before sampling, whatever the number of chains (0 for kernels it
	// does not run for by default; see Spec.GradientCheckPoints).
	CheckRows int
	// Periodic returns the extra evaluations per chain beyond
	// EvaluationsPerStep over steps steps of spec; nil when there are
	// none. spec must have been validated by New (Session.Spec).
	Periodic func(spec *Spec, steps int) int
}

// CostOf returns what the registry knows of kernel name's cost; false
// when no kernel has that name.
func CostOf(name string) (KernelCost, bool) {
	e, ok := lookupKernel(name)
	if !ok {
		return KernelCost{}, false
	}
	c := KernelCost{Random: e.randomCost, SetupPerChain: e.setupRows, Periodic: e.periodicRows}
	if n := gradientCheckPoints(&Spec{}, e); n > 0 {
		c.CheckRows = n * gradCheckShape.rowsPerChain
	}
	return c, true
}

// checkEnvelope validates the rejection kernel's envelope.
func checkEnvelope(s *Spec) error {
	finite := func(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }
	e := s.Envelope
	switch {
	case s.Dim > kernels.RejectionMaxDim:
		return BadField("register.dim", "the rejection kernel is for dim <= %d, got %d: its acceptance falls geometrically with dimension", kernels.RejectionMaxDim, s.Dim)
	case e == nil:
		return BadField("register.envelope", "the rejection kernel needs an envelope (mean, scale, log_bound)")
	case len(e.Mean) != s.Dim:
		return BadField("register.envelope.mean", "has %d values, want dim = %d", len(e.Mean), s.Dim)
	case !finite(e.Scale) || !(e.Scale > 0):
		return BadField("register.envelope.scale", "must be finite and > 0, got %v", e.Scale)
	case !finite(e.LogBound):
		return BadField("register.envelope.log_bound", "must be finite, got %v", e.LogBound)
	}
	for i, v := range e.Mean {
		if !finite(v) {
			return badValue("register.envelope.mean", -1, i, "value %v is not finite", v)
		}
	}
	return nil
}
