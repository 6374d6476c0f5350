package session

import (
	"fmt"
	"math"
	"time"

	"sluice/kernels"
	"sluice/kernels/bound"
)

// Spec is a session as the client asked for it. Zero values are documented
// per field; New validates everything.
type Spec struct {
	Dim, Chains int
	// Kernel names the method (see KernelNames); "" means the default,
	// unadjusted Langevin.
	Kernel string
	// Start holds StartRows×Dim values; StartRows is 1 (shared by every
	// chain) or Chains.
	Start     []float64
	StartRows int
	// Step is the step size h > 0, in the metric's units when there is a
	// metric; 0 means automatic for the kernels that tune it (tune.go):
	// the engine chooses the step, and the kinetic kernels' friction and
	// inverse mass left at 0, from the curvature it probes, and adapts a
	// metric during burn-in unless MetricForm says otherwise.
	Step float64
	// BurnIn steps per chain are discarded; then every KeepEvery-th step
	// is kept (0 means 1).
	BurnIn, KeepEvery int64
	// DrawsPerChain ends the session once every chain has that many kept
	// draws; 0 means no limit.
	DrawsPerChain int64
	// MaxEvaluations caps evaluated points; 0 means no limit.
	MaxEvaluations int64
	// MaxTime caps wall time; 0 means no limit (Limits.MaxTime may still
	// apply).
	MaxTime time.Duration
	// ProgressEverySteps, when > 0, sends Progress every that many steps;
	// otherwise ProgressInterval sets the cadence (0 means
	// Limits.ProgressInterval).
	ProgressEverySteps int64
	ProgressInterval   time.Duration
	// Seed of the random stream; 0 means the server picks one.
	Seed uint64
	// Names of the Dim parameters; empty means theta[0], theta[1], ...
	Names []string
	// MaxMessageBytes is the client's receive limit; 0 means 4 MiB.
	MaxMessageBytes int64
	// DrawReferences says the client rebuilds draws sent by reference to
	// the points of the request it received last (Draws.PointRows).
	DrawReferences bool
	// DrawsInPoints says the client reads draws carried in Points frames
	// (Points.Draws): a completed step's first Draws frame then rides in
	// the Points frame sent just before it when both fit one message.
	DrawsInPoints bool
	// Curvature is what the client declares of the potential's curvature;
	// nil when nothing is declared.
	Curvature *Curvature
	// Wants are accuracy targets; zero fields are not targets.
	Wants Wants
	// Friction γ of the kinetic and baoab kernels (0: 2); InverseMass u
	// of the kinetic, baoab and midpoint kernels (0: 1/M when Curvature is
	// declared, else 1).
	Friction, InverseMass float64
	// Noise describes the client's gradients; the zero value means exact.
	Noise Noise
	// KrylovTolerance (0: 1e-8) and KrylovMaxIterations (0: min(dim, 64))
	// tune the ozaki-krylov kernel.
	KrylovTolerance     float64
	KrylovMaxIterations int
	// Schedule, when set, gives sgld a decreasing step (Step must be 0).
	Schedule *kernels.SGLDSchedule
	// AnchorEvery is svrg's anchor period (0: 10).
	AnchorEvery int
	// FixedPointTolerance and FixedPointIterations tune sgld-cv's search
	// (0: 1e-6 and 100).
	FixedPointTolerance  float64
	FixedPointIterations int
	// CurvatureProbe asks for that many power iterations (each way, for
	// M and m) at chain 0's start before sampling; 0: none.
	CurvatureProbe int
	// SliceWidth and SliceMaxExpansions tune hit-and-run (0: defaults).
	SliceWidth         float64
	SliceMaxExpansions int
	// Envelope is rejection's Gaussian envelope and declared bound.
	Envelope *Envelope
	// CheckpointEverySteps, when > 0, checkpoints the session every that
	// many steps (when the server keeps checkpoints; see Checkpoints).
	CheckpointEverySteps int64
	// WorkersOnly says the owner's stream only consumes: workers attached
	// to the session (Session.Attach) evaluate every row.
	WorkersOnly bool
	// Metric is a declared preconditioner C for the kernels that take one
	// (kernels.MetricUser): Dim values (a diagonal) or Dim×Dim values
	// (dense, row-major, symmetric positive definite), for example an
	// inverse Hessian at a mode the client knows; nil when none is
	// declared. Declared curvature (Curvature.StrongConvexity and
	// Smoothness) is then read in the metric's units: as bounds on
	// Lᵀ∇²(−log π)L, C = L·Lᵀ.
	Metric []float64
	// MetricForm says what the engine does about the metric (adapt.go).
	MetricForm MetricForm
	// GradientCheckPoints is how many start points the gradient check
	// compares the gradient with finite differences of log π at, before
	// sampling (log densities are asked for then, and counted): 0 means 3
	// for kernels that ask for log densities anyway and none for the
	// others; −1 means none.
	GradientCheckPoints int
	// ChainGroups is how many groups of consecutive chains step
	// independently once burn-in is over (pipelined requests: the client
	// has another group's points to evaluate while the server handles one
	// group's answers): 0 lets the engine choose, 1 is one request at a
	// time; at most Chains. Kernels whose registry entry does not pipeline
	// run as one group whatever it says.
	ChainGroups int
}

// Envelope is q = N(Mean, Scale²I) with π̃ ≤ exp(LogBound)·q.
type Envelope struct {
	Mean            []float64
	Scale, LogBound float64
}

// Noise describes stochastic gradients.
type Noise struct {
	Stochastic bool
	// Variance is the declared σ² of one replicate's error per
	// coordinate (0: not declared); Bias the declared δ.
	Variance, Bias float64
	// DataSize N and MinibatchSize n, for epochs (0: not given).
	DataSize, MinibatchSize int64
	// Replicates per point, ≥ 1 (0 means 1).
	Replicates int
}

// Curvature declares m·I ⪯ ∇²f ⪯ M·I for the potential f = −log π.
type Curvature struct {
	StrongConvexity, Smoothness float64
	// StartDistance bounds W2(start, π); 0 means √(dim/m) (a start at
	// the mode).
	StartDistance float64
	// SecondMoment μ₂ ≥ E_π‖θ − centre‖², for m = 0 with a TV target:
	// the engine then samples the penalised π_λ ∝ π·exp(−λ‖θ − centre‖²/2),
	// whose TV distance to π is at most λμ₂/2 (derived here).
	SecondMoment float64
	// PenaltyCentre (Dim values) is the penalty's centre; nil means the
	// mean of the start points.
	PenaltyCentre []float64
}

// Wants are the accuracy targets of a session.
type Wants struct {
	MinBulkESS, MinTailESS, MaxRhat, MaxKSD float64
	// Eps is a guaranteed error in Metric (bound.TV or bound.W2); it needs
	// Curvature.
	Eps    float64
	Metric bound.Metric
}

// any reports whether some target is set.
func (w Wants) any() bool {
	return w.MinBulkESS > 0 || w.MinTailESS > 0 || w.MaxRhat > 0 || w.MaxKSD > 0 || w.Eps > 0
}

// Limits are the server's caps, applied to every session. Zero values mean
// the defaults given per field.
type Limits struct {
	// MaxDim caps Spec.Dim (default 1<<20).
	MaxDim int
	// MaxChains caps Spec.Chains (default 1<<16).
	MaxChains int
	// MaxValues caps Dim×Chains, the size of the state (default 1<<26,
	// 512 MiB of positions).
	MaxValues int
	// MaxMessageBytes is the server's own message limit (default 4 MiB);
	// the session uses the smaller of it and the client's.
	MaxMessageBytes int64
	// MaxTime caps every session's wall time (default: none).
	MaxTime time.Duration
	// AnswerTimeout is how long the server waits for the answer to one
	// Points frame before it suspends the session (when checkpointed:
	// ErrSilent) or fails it (default DefaultAnswerTimeout).
	AnswerTimeout time.Duration
	// ProgressInterval is the default Progress cadence (default 1 s).
	ProgressInterval time.Duration
	// DiagnosticsShare is the largest share of a session's least work
	// (its steps with a gradient that costs nothing, by the cost model of
	// judge.go) its measured diagnostics may take when no target rests on
	// them (default 0.1; judgeCadence); negative means every step is
	// judged at once (tests that need every report measured).
	DiagnosticsShare float64
	// FollowBuffer is how many of its latest draws (rows) each session
	// keeps for followers, capped at 64 MiB of values per session; 0 means
	// followers are not served. The ring starts small and doubles as it
	// fills; the budget counts it at its cap.
	FollowBuffer int
	// MaxSessionBytes caps the memory one session may need at worst (see
	// Budget); default DefaultMaxSessionBytes.
	MaxSessionBytes int64
	// InflightAnswers is how many received answer frames the transport
	// may hold decoded before the engine takes them, counted in the
	// budget (default 2).
	InflightAnswers int
	// Pool tunes how rows are shared among a session's evaluators.
	Pool PoolOptions
}

// Length limits of the strings a client sends.
const (
	// MaxNameBytes caps each parameter name.
	MaxNameBytes = 256
	// MaxKernelBytes caps the kernel's name.
	MaxKernelBytes = 64
)

const maxFollowBytes = 64 << 20

// DefaultAnswerTimeout is Limits.AnswerTimeout's default: two minutes, long
// enough for a batch of expensive simulations, short enough that a silent
// client does not hold its session slot and memory for long.
const DefaultAnswerTimeout = 2 * time.Minute

const defaultMessageBytes = 4 << 20

func (l Limits) withDefaults() Limits {
	if l.MaxDim <= 0 {
		l.MaxDim = 1 << 20
	}
	if l.MaxChains <= 0 {
		l.MaxChains = 1 << 16
	}
	if l.MaxValues <= 0 {
		l.MaxValues = 1 << 26
	}
	if l.MaxMessageBytes <= 0 {
		l.MaxMessageBytes = defaultMessageBytes
	}
	if l.AnswerTimeout <= 0 {
		l.AnswerTimeout = DefaultAnswerTimeout
	}
	if l.MaxSessionBytes <= 0 {
		l.MaxSessionBytes = DefaultMaxSessionBytes
	}
	if l.InflightAnswers <= 0 {
		l.InflightAnswers = 2
	}
	if l.ProgressInterval <= 0 {
		l.ProgressInterval = time.Second
	}
	if l.DiagnosticsShare == 0 {
		l.DiagnosticsShare = 0.1
	}
	return l
}

// validate checks s against the server's limits and fills in defaults
// (the kernel's tuning defaults included); it returns the registry entry
// of the kernel s names.
func (s *Spec) validate(l Limits) (*kernelEntry, error) {
	if err := s.validateSize(l); err != nil {
		return nil, err
	}
	if s.Kernel == "" {
		s.Kernel = defaultKernel
	}
	if len(s.Kernel) > MaxKernelBytes {
		return nil, BadField("register.kernel", "is %d bytes long, the limit is %d (known kernels: %v)", len(s.Kernel), MaxKernelBytes, KernelNames())
	}
	k, known := lookupKernel(s.Kernel)
	if !known {
		return nil, BadField("register.kernel", "unknown kernel %q (known: %v)", s.Kernel, KernelNames())
	}
	if err := s.validateFields(k); err != nil {
		return nil, err
	}
	if k.tune != nil {
		k.tune(s)
	}
	return k, nil
}

// validateSize checks the dimension and chains against the server's
// limits.
func (s *Spec) validateSize(l Limits) error {
	bad := func(field, format string, args ...any) error { return BadField("register."+field, format, args...) }
	switch {
	case s.Dim < 1:
		return bad("dim", "must be at least 1, got %d", s.Dim)
	case s.Dim > l.MaxDim:
		return &Error{Kind: TooLarge, Field: "register.dim", Chain: -1, Coord: -1, Reason: fmt.Sprintf("%d exceeds the server's limit of %d", s.Dim, l.MaxDim)}
	case s.Chains < 1:
		return bad("chains", "must be at least 1, got %d", s.Chains)
	case s.Chains > l.MaxChains:
		return &Error{Kind: TooLarge, Field: "register.chains", Chain: -1, Coord: -1, Reason: fmt.Sprintf("%d exceeds the server's limit of %d", s.Chains, l.MaxChains)}
	case s.Dim*s.Chains > l.MaxValues:
		return &Error{Kind: TooLarge, Field: "register.chains", Chain: -1, Coord: -1, Reason: fmt.Sprintf("chains × dim = %d exceeds the server's limit of %d values", s.Dim*s.Chains, l.MaxValues)}
	}
	return nil
}

// validateFields checks every other field, for kernel k.
func (s *Spec) validateFields(k *kernelEntry) error {
	bad := func(field, format string, args ...any) error { return BadField("register."+field, format, args...) }
	if s.StartRows != 1 && s.StartRows != s.Chains {
		return bad("start_rows", "must be 1 or chains (%d), got %d", s.Chains, s.StartRows)
	}
	if len(s.Start) != s.StartRows*s.Dim {
		return bad("start", "has %d values, want start_rows × dim = %d", len(s.Start), s.StartRows*s.Dim)
	}
	for i, v := range s.Start {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			chain := i / s.Dim
			if s.StartRows == 1 {
				chain = -1
			}
			return badValue("register.start", chain, i%s.Dim, "value %v is not finite", v)
		}
	}
	for _, f := range []struct {
		name string
		v    float64
	}{{"friction", s.Friction}, {"inverse_mass", s.InverseMass}} {
		if math.IsNaN(f.v) || math.IsInf(f.v, 0) || f.v < 0 {
			return bad(f.name, "must be finite and >= 0, got %v", f.v)
		}
	}
	if t := s.KrylovTolerance; math.IsNaN(t) || t < 0 || t >= 1 {
		return bad("krylov_tolerance", "must be in [0, 1), got %v", t)
	}
	if s.KrylovMaxIterations < 0 {
		return bad("krylov_max_iterations", "must be >= 0, got %d", s.KrylovMaxIterations)
	}
	if err := s.validateNoise(k); err != nil {
		return err
	}
	if s.ChainGroups < 0 || s.ChainGroups > s.Chains {
		return bad("chain_groups", "must be between 0 (the server chooses) and chains = %d, got %d", s.Chains, s.ChainGroups)
	}
	if s.GradientCheckPoints < -1 || s.GradientCheckPoints > 64 {
		return bad("gradient_check_points", "must be between -1 (none) and 64, got %d", s.GradientCheckPoints)
	}
	if s.GradientCheckPoints > 0 && (s.Noise.Stochastic || !k.need().Has(kernels.NeedGradient)) {
		return bad("gradient_check_points", "the gradient check compares exact gradients with finite differences of log π: kernel %s with these gradients cannot take it", s.Kernel)
	}
	if s.CurvatureProbe < 0 || s.CurvatureProbe > 10000 {
		return bad("curvature_probe_iterations", "must be between 0 and 10000, got %d", s.CurvatureProbe)
	}
	if s.CurvatureProbe > 0 && s.Noise.Stochastic {
		return bad("curvature_probe_iterations", "the probe's finite differences need exact gradients (or pairs on one minibatch, not offered yet)")
	}
	if err := s.validateAccuracy(k); err != nil {
		return err
	}
	if sc := s.Schedule; sc != nil {
		switch {
		case !k.schedule:
			return bad("schedule", "kernel %q takes no step schedule", s.Kernel)
		case !(sc.A > 0) || math.IsInf(sc.A, 0):
			return bad("schedule.a", "must be finite and > 0, got %v", sc.A)
		case !(sc.B > 0) || math.IsInf(sc.B, 0):
			return bad("schedule.b", "must be finite and > 0, got %v", sc.B)
		case !(sc.Gamma > 0.5 && sc.Gamma <= 1):
			return bad("schedule.gamma", "must be in (0.5, 1], got %v", sc.Gamma)
		case s.Step != 0:
			return bad("step", "must be 0 with a schedule (the schedule gives the step), got %v", s.Step)
		}
	}
	if s.AnchorEvery < 0 || s.FixedPointIterations < 0 || math.IsNaN(s.FixedPointTolerance) || s.FixedPointTolerance < 0 || s.FixedPointTolerance >= 1 {
		return bad("anchor_every", "anchor_every and fixed_point_iterations must be >= 0, fixed_point_tolerance in [0, 1)")
	}
	if err := s.validateKernelFields(k); err != nil {
		return err
	}
	if s.Schedule != nil || k.noStep {
		// the schedule gives the step; density-only kernels have none
	} else if s.Step == 0 && s.Wants.Eps > 0 && k.guaranteed {
		// planned below, in New
	} else if s.Step == 0 && k.tuning != ruleNone {
		// automatic (tune.go)
	} else if !(s.Step > 0) || math.IsInf(s.Step, 0) {
		return bad("step", "must be a finite number > 0 (or 0: automatic for the Langevin kernels, planned with curvature and wants.eps), got %v", s.Step)
	}
	for _, f := range []struct {
		name string
		v    int64
	}{{"burn_in", s.BurnIn}, {"keep_every", s.KeepEvery}, {"draws_per_chain", s.DrawsPerChain},
		{"max_evaluations", s.MaxEvaluations}, {"progress_every_steps", s.ProgressEverySteps}, {"max_message_bytes", s.MaxMessageBytes},
		{"checkpoint_every_steps", s.CheckpointEverySteps}} {
		if f.v < 0 {
			return bad(f.name, "must be >= 0, got %d", f.v)
		}
	}
	if s.MaxTime < 0 {
		return bad("max_seconds", "must be >= 0, got %v", s.MaxTime.Seconds())
	}
	if s.ProgressInterval < 0 {
		return bad("progress_interval_seconds", "must be >= 0, got %v", s.ProgressInterval.Seconds())
	}
	if s.KeepEvery == 0 {
		s.KeepEvery = 1
	}
	if len(s.Names) != 0 && len(s.Names) != s.Dim {
		return bad("names", "has %d names, want 0 or dim = %d", len(s.Names), s.Dim)
	}
	seen := make(map[string]bool, len(s.Names))
	for i, n := range s.Names {
		if n == "" {
			return bad("names", "name %d is empty", i)
		}
		if len(n) > MaxNameBytes {
			return bad("names", "name %d is %d bytes long, the limit is %d", i, len(n), MaxNameBytes)
		}
		if seen[n] {
			return bad("names", "name %q appears twice", n)
		}
		seen[n] = true
	}
	if len(s.Names) == 0 {
		s.Names = make([]string, s.Dim)
		for i := range s.Names {
			s.Names[i] = fmt.Sprintf("theta[%d]", i)
		}
	}
	return nil
}

// validateKernelFields checks the fields only some kernels take, then
// the kernel's own checks.
func (s *Spec) validateKernelFields(k *kernelEntry) error {
	finite := func(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }
	if !finite(s.SliceWidth) || s.SliceWidth < 0 || s.SliceMaxExpansions < 0 {
		return BadField("register.slice_width", "slice_width must be finite and >= 0, slice_max_expansions >= 0")
	}
	if !k.envelope && s.Envelope != nil {
		return BadField("register.envelope", "kernel %q takes no envelope", s.Kernel)
	}
	if k.check != nil {
		return k.check(s)
	}
	return nil
}

func (s *Spec) validateNoise(k *kernelEntry) error {
	n := &s.Noise
	finite := func(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }
	switch {
	case !finite(n.Variance) || n.Variance < 0:
		return BadField("register.noise.variance", "must be finite and >= 0, got %v", n.Variance)
	case !finite(n.Bias) || n.Bias < 0:
		return BadField("register.noise.bias", "must be finite and >= 0, got %v", n.Bias)
	case n.DataSize < 0:
		return BadField("register.noise.data_size", "must be >= 0, got %d", n.DataSize)
	case n.MinibatchSize < 0 || (n.DataSize > 0 && n.MinibatchSize > n.DataSize):
		return BadField("register.noise.minibatch_size", "must be between 0 and data_size (%d), got %d", n.DataSize, n.MinibatchSize)
	case n.Replicates < 0 || n.Replicates > 64:
		return BadField("register.noise.replicates", "must be between 0 and 64, got %d", n.Replicates)
	}
	if n.Replicates == 0 {
		n.Replicates = 1
	}
	if !n.Stochastic {
		if n.Variance > 0 || n.Bias > 0 || n.Replicates > 1 {
			return BadField("register.noise.kind", "variance, bias and replicates describe stochastic gradients: set kind to stochastic")
		}
		return nil
	}
	if !k.takesReplicates() {
		return BadField("register.noise.kind", "kernel %s needs exact gradients: its accept/reject step (or Hessian step) is wrong with noisy ones", s.Kernel)
	}
	return nil
}

func (s *Spec) validateAccuracy(k *kernelEntry) error {
	finite := func(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }
	if c := s.Curvature; c != nil {
		switch {
		case !finite(c.StrongConvexity) || c.StrongConvexity < 0:
			return BadField("register.curvature.strong_convexity", "must be finite and >= 0, got %v", c.StrongConvexity)
		case !finite(c.Smoothness) || !(c.Smoothness > 0):
			return BadField("register.curvature.smoothness", "must be finite and > 0, got %v", c.Smoothness)
		case c.StrongConvexity > c.Smoothness:
			return BadField("register.curvature.strong_convexity", "m = %v exceeds M = %v", c.StrongConvexity, c.Smoothness)
		case !finite(c.StartDistance) || c.StartDistance < 0:
			return BadField("register.curvature.start_distance", "must be finite and >= 0, got %v", c.StartDistance)
		case !finite(c.SecondMoment) || c.SecondMoment < 0:
			return BadField("register.curvature.second_moment", "must be finite and >= 0, got %v", c.SecondMoment)
		case len(c.PenaltyCentre) != 0 && len(c.PenaltyCentre) != s.Dim:
			return BadField("register.curvature.penalty_centre", "has %d values, want 0 or dim = %d", len(c.PenaltyCentre), s.Dim)
		}
		for i, v := range c.PenaltyCentre {
			if !finite(v) {
				return badValue("register.curvature.penalty_centre", -1, i, "value %v is not finite", v)
			}
		}
	}
	w := s.Wants
	if w.Metric == bound.TV {
		if err := s.validateTV(k); err != nil {
			return err
		}
	}
	for _, f := range []struct {
		name string
		v    float64
	}{{"min_bulk_ess", w.MinBulkESS}, {"min_tail_ess", w.MinTailESS}, {"max_rhat", w.MaxRhat}, {"max_ksd", w.MaxKSD}, {"eps", w.Eps}} {
		if !finite(f.v) || f.v < 0 {
			return BadField("register.wants."+f.name, "must be finite and >= 0, got %v", f.v)
		}
	}
	if w.MaxRhat > 0 && w.MaxRhat <= 1 {
		return BadField("register.wants.max_rhat", "must be > 1 (R-hat is near 1 at best), got %v", w.MaxRhat)
	}
	if w.Eps > 0 {
		switch {
		case s.Curvature == nil:
			return BadField("register.wants.eps", "a guaranteed error needs register.curvature")
		case s.Curvature.StrongConvexity == 0 && (w.Metric != bound.TV || s.Curvature.SecondMoment == 0):
			return BadField("register.wants.eps", "with m = 0 a guaranteed error needs metric TV and curvature.second_moment (the engine samples a penalised target whose distance to π it bounds with them)")
		case w.Metric != bound.TV && w.Metric != bound.W2:
			return BadField("register.wants.metric", "must be METRIC_TV or METRIC_W2 when eps is set")
		case w.Metric == bound.TV && w.Eps >= 0.5:
			return BadField("register.wants.eps", "a TV target must be below 0.5, got %v", w.Eps)
		case !k.guaranteed:
			return BadField("register.wants.eps", "guaranteed bounds do not cover kernel %q", s.Kernel)
		}
	}
	return nil
}

// validateTV refuses a TV guarantee (wants.metric TV) whose assumptions
// the engine cannot establish, naming the field that is missing or
// wrong. The TV bound of Dalalyan (2017) holds for unadjusted Langevin
// with exact gradients from a start drawn from N(x*, M⁻¹I); the engine
// provides that start by a mode search (modesearch.go), which needs the
// declared m (or, for m = 0, the penalised target's λ) to certify how far
// its point is from the mode, and M for the start's spread.
func (s *Spec) validateTV(k *kernelEntry) error {
	c := s.Curvature
	const why = "the TV bound (Dalalyan 2017) holds only for chains started from N(x*, M⁻¹I), x* the mode: the server finds the mode by gradient steps and certifies how close it got with the declared m, then draws the starts with the declared M"
	switch {
	case c == nil:
		return BadField("register.curvature", "a TV guarantee (wants.metric TV) needs the declared curvature m > 0 and M (strong_convexity and smoothness): %s", why)
	case !k.guaranteed:
		return BadField("register.kernel", "a TV guarantee covers unadjusted Langevin (lmc) only, the method the theorem of Dalalyan (2017) is about; kernel %q is not covered", s.Kernel)
	case s.Noise.Stochastic:
		return BadField("register.noise.kind", "a TV guarantee needs exact gradients (the TV bound of Dalalyan 2017 has no term for gradient noise); use metric W2 with stochastic gradients")
	case c.StrongConvexity == 0 && (s.Wants.Eps == 0 || c.SecondMoment == 0):
		return BadField("register.curvature.strong_convexity", "a TV guarantee needs m > 0 (or, with m = 0, wants.eps and curvature.second_moment, for the penalised target): %s", why)
	case c.StartDistance > 0:
		return BadField("register.curvature.start_distance", "is for W2: a TV guarantee starts the chains from N(x̂, M⁻¹I) around a mode the server certifies, not from the given start")
	}
	return nil
}

// ParseSeconds converts a wire duration in seconds to a time.Duration,
// rejecting negative, NaN, infinite and absurdly long values.
func ParseSeconds(field string, sec float64) (time.Duration, error) {
	if math.IsNaN(sec) || sec < 0 || sec > 1e9 {
		return 0, BadField(field, "must be between 0 and 1e9 seconds, got %v", sec)
	}
	return time.Duration(sec * float64(time.Second)), nil
}
