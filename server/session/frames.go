package session

import (
	"time"

	"sluice/kernels"
	"sluice/kernels/bound"
)

// Frame is one message from the engine to the client: *Registered,
// *Points, *Draws, *Progress or *Finished. A frame and its slices belong to the
// engine (Points and Draws frames are reused) and are valid only during
// the send call that carries it.
type Frame interface{ frame() }

// Registered acknowledges the registration.
type Registered struct {
	SessionID          string
	Seed               uint64
	Kernel             string
	Step               float64
	EvaluationsPerStep int
	MaxMessageBytes    int64
	Names              []string
	// PlannedSteps is the steps per chain the plan needs, from the
	// chains' actual start, when the step was planned from Wants.Eps: for
	// TV from the mode search's N(x̂, M⁻¹I) (the plan leaves a tenth of
	// eps to its shift term); for W2 from the declared start distance,
	// and 0 when that distance is yet to be certified from the start
	// gradients (see Session.plannedSteps); 0 otherwise.
	PlannedSteps int
	// Token is the session's secret (Session.SetToken); Resumed is set
	// when the session was restored from a checkpoint.
	Token   string
	Resumed bool
	// Metric is the metric at registration and the adaptation schedule.
	Metric MetricReport
	// Tuning lists the automatic settings and what will choose them
	// (their values come in Progress); empty when the client gave the
	// step.
	Tuning []Choice
}

// Points asks the client to evaluate rows points: part of request
// RequestID starting at row FirstRow of TotalRows.
type Points struct {
	RequestID                 uint64
	FirstRow, Rows, TotalRows int
	Dim                       int
	Points                    []float64 // Rows×Dim
	Chains                    []int     // Rows
	Need                      kernels.Need
	// Vectors holds Rows×Dim values when Need has NeedHessianVector.
	Vectors []float64
	// Groups holds a minibatch group per row, or is nil.
	Groups []int
	// FullData asks for exact gradients over the whole data set.
	FullData bool
	// Replicates is the gradient replicates per row the answer carries.
	Replicates int
	// Draws, when not nil, are draws carried in this frame (only for a
	// session whose Spec.DrawsInPoints is set, and only in the last part
	// of a request): the same as a Draws frame sent right after it.
	Draws *Draws
}

// Draws carries kept draws numbered Seq, Seq+1, ..., Seq+Rows−1.
//
// When PointRows is nil, Values holds Rows×Dim values. Otherwise (only
// for a session whose Spec.DrawReferences is set) PointRows has Rows
// entries: an entry r ≥ 0 says the draw is, bit for bit, row r of the
// points of request FromRequestID, the request whose Points frames were
// sent last; an entry −1 says its values are in Values, which then holds
// only those rows, in order. The draw log and followers always get full
// values.
type Draws struct {
	Seq        uint64
	Rows, Dim  int
	Values     []float64 // Rows×Dim, or the rows marked −1 in PointRows
	Chains     []int     // Rows
	Iterations []int64   // Rows
	// FromRequestID and PointRows name draws the client already has.
	FromRequestID uint64
	PointRows     []int
}

// State is where a session is.
type State int

const (
	BurnIn State = iota + 1
	Sampling
	Done
)

// Progress reports the budget.
type Progress struct {
	State           State
	Steps           int64
	EvaluationsUsed int64
	// EvaluationsLeft is −1 when there is no evaluation limit.
	EvaluationsLeft int64
	Elapsed         time.Duration
	// TimeLeft is −1 when there is no time limit.
	TimeLeft             time.Duration
	DrawsSent            int64
	EvaluationsPerSecond float64
	// Parameters holds measured accuracy per parameter (empty until
	// enough draws).
	Parameters []ParameterDiagnostics
	// KSD is the kernel Stein discrepancy of the kept draws; −1 when not
	// available.
	KSD float64
	// Bound is the guaranteed (or estimated, and labelled so) bound; nil
	// when none applies. BoundLabel says, in words, what it rests on.
	Bound      *bound.Bound
	BoundLabel string
	// Curvature holds certificates from gradient pairs.
	Curvature CurvatureEstimate
	// Targets reports each requested target.
	Targets []TargetStatus
	// Noise reports gradient noise (stochastic gradients only).
	Noise *NoiseEstimate
	// Kernel is what the kernel reports of itself.
	Kernel KernelReport
	// Pool reports the evaluators and reissued rows.
	Pool PoolReport
	// Metric is the metric in use.
	Metric MetricReport
	// Tuning lists the settings the engine chose, with their reasons;
	// TuningEvaluations is what its curvature probes cost (counted in
	// EvaluationsUsed).
	Tuning            []Choice
	TuningEvaluations int64
	// Stein is the kernel Stein discrepancy with its uncertainty; nil
	// when not measured (KSD above is its point estimate).
	Stein *SteinReport
	// Checks is the verdict so far: every named check with its status.
	Checks []Check
}

// KernelReport holds a kernel's own figures (zero when it has none).
type KernelReport struct {
	Step            float64
	Adapting        bool
	AcceptanceRates []float64
	Krylov          kernels.KrylovStats
	// EvaluationsPerStepMean is the average cost of a step for kernels
	// whose cost is random; AcceptanceRate is rejection's.
	EvaluationsPerStepMean, AcceptanceRate float64
}

// NoiseEstimate reports stochastic-gradient noise.
type NoiseEstimate struct {
	// Variance of one replicate's error per coordinate, and its standard
	// error; −1 without replicates.
	Variance, SE float64
	Requests     int64
	Declared     float64
	Epochs       float64
	Warning      string
}

// Reason says why a session ended.
type Reason int

const (
	BudgetSpent Reason = iota + 1
	TimeSpent
	Stopped
	DrawsCollected
	Failed
	Shutdown
	TargetMet
	// CheckFailed: the session would have ended with its draws collected
	// or its targets met, but a check of the verdict failed.
	CheckFailed
)

func (r Reason) String() string {
	switch r {
	case BudgetSpent:
		return "budget spent"
	case TimeSpent:
		return "time spent"
	case Stopped:
		return "stopped by client"
	case DrawsCollected:
		return "draws collected"
	case Failed:
		return "failed"
	case Shutdown:
		return "server shutting down"
	case TargetMet:
		return "target met"
	case CheckFailed:
		return "check failed"
	}
	return "unknown"
}

// ParameterSummary summarises the kept draws of one parameter.
type ParameterSummary struct {
	Name     string
	Mean, SD float64
	Count    int64
}

// Finished is the last frame of a session.
type Finished struct {
	Reason     Reason
	Message    string
	Progress   Progress
	Parameters []ParameterSummary
	// Checks is the session's verdict (the same as Progress.Checks).
	Checks []Check
}

func (*Registered) frame() {}
func (*Points) frame()     {}
func (*Draws) frame()      {}
func (*Progress) frame()   {}
func (*Finished) frame()   {}

// Evaluations is the client's answer to one Points frame.
type Evaluations struct {
	RequestID      uint64
	FirstRow, Rows int
	Dim            int
	// Grad holds Rows×Replicates×Dim values (Replicates as asked in the
	// Points frame); LogDensity holds Rows values; Hessian
	// holds Rows×Dim×Dim values; HessVec holds Rows×Dim values. Each is
	// empty when not asked for.
	Grad, LogDensity, Hessian, HessVec []float64
}

// Message is one thing received from the client, or the end of the
// stream: exactly one of Evaluations, Stop or Err is set.
type Message struct {
	Evaluations *Evaluations
	Stop        bool
	StopReason  string
	// Shutdown, with Stop, says the server (not the client) asked to stop.
	Shutdown bool
	// Err ends the stream: io.EOF for a clean close, anything else for a
	// broken one. An *Error here fails the session with that error.
	Err error
}
