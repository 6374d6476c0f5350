package client

import (
	"context"
	"errors"
	"fmt"
	"io"
	"time"

	"google.golang.org/grpc"

	"sluice/client/history"
	"sluice/internal/wire"
	sluicev1 "sluice/proto/sluice/v1"
)

// Spec describes a session; see the Register message of the wire API for
// every field's meaning and zero value.
type Spec struct {
	Dim, Chains int
	// Kernel names the method; "" means "lmc".
	Kernel string
	// Start holds Dim values (every chain starts there) or Chains×Dim.
	Start []float64
	// Step is the step size h > 0 (in the metric's units with a metric);
	// 0 means automatic for the Langevin kernels: the server chooses it
	// (and friction and inverse mass left at 0) and adapts a metric
	// during burn-in, reporting its choices in Progress.Tuning.
	Step                             float64
	BurnIn, KeepEvery, DrawsPerChain int64
	MaxEvaluations                   int64
	MaxTime                          time.Duration
	ProgressEverySteps               int64
	ProgressInterval                 time.Duration
	Seed                             uint64
	Names                            []string
	// MaxMessageBytes is the largest message this client accepts and
	// sends; 0 means 4 MiB.
	MaxMessageBytes int64
	// Curvature declares m and M of the potential −log π (nil: unknown).
	Curvature *Curvature
	// Wants are accuracy targets; the session ends with TargetMet once
	// all hold.
	Wants Wants
	// Friction and InverseMass tune the kinetic kernels (0: defaults).
	Friction, InverseMass float64
	// KrylovTolerance and KrylovMaxIterations tune ozaki-krylov (0:
	// defaults).
	KrylovTolerance     float64
	KrylovMaxIterations int
	// Noise describes stochastic gradients (nil: exact).
	Noise *Noise
	// Schedule gives sgld a decreasing step ε_t = A(B + t)^(−Gamma),
	// h_t = ε_t/2 (Step must be 0); nil: constant step.
	Schedule *Schedule
	// AnchorEvery (svrg), FixedPointTolerance and FixedPointIterations
	// (sgld-cv); 0: defaults.
	AnchorEvery          int
	FixedPointTolerance  float64
	FixedPointIterations int
	// CurvatureProbe asks for that many power iterations each way (M and
	// m) at chain 0's start before sampling, counted in the budget.
	CurvatureProbe int
	// GradientCheckPoints is how many start points the server compares
	// the gradient with finite differences of the log density at before
	// sampling (asking log densities then, counted in the budget): 0
	// means 3 for kernels that ask for log densities anyway and none for
	// the others; −1 means none.
	GradientCheckPoints int
	// ChainGroups is how many groups of chains step independently, so
	// that the server sends one group's next points while this client
	// evaluates another's (several requests outstanding, answered in the
	// order they come): 0 lets the server choose, 1 asks for one request
	// at a time; at most Chains. The draws are the same whatever it is.
	ChainGroups int
	// SliceWidth and SliceMaxExpansions tune hit-and-run (0: defaults).
	SliceWidth         float64
	SliceMaxExpansions int
	// Envelope is rejection's Gaussian envelope N(Mean, Scale²I) with the
	// declared bound π̃ ≤ exp(LogBound)·q.
	Envelope *Envelope
	// CheckpointEverySteps asks a server that keeps state to checkpoint
	// the session every that many steps (0: only at the server's wall-time
	// cadence and at shutdown).
	CheckpointEverySteps int64
	// WorkersOnly: this client only consumes draws and progress; workers
	// attached with Work evaluate every row (the eval passed to Run is
	// then never called and may be nil).
	WorkersOnly bool
	// Preconditioner is a declared metric C: Dim values (a diagonal) or
	// Dim×Dim (dense, row-major), for example an inverse Hessian at a
	// known mode; nil: none declared.
	Preconditioner []float64
	// MetricForm says what the server does about the metric ("": the
	// declared one, else adapted during burn-in when Step is 0).
	MetricForm MetricForm
}

// MetricForm is what the server does about the metric.
type MetricForm string

const (
	// MetricAuto: the declared Preconditioner, else one adapted during
	// burn-in when the step is automatic, else none.
	MetricAuto MetricForm = ""
	// MetricIdentity: no metric, no adaptation.
	MetricIdentity MetricForm = "identity"
	// MetricDiagonal: the declared diagonal, else an adapted one.
	MetricDiagonal MetricForm = "diagonal"
	// MetricDense: the declared dense metric, else an adapted one.
	MetricDense MetricForm = "dense"
)

var metricFormToWire = map[MetricForm]sluicev1.MetricForm{
	MetricAuto: sluicev1.MetricForm_METRIC_FORM_UNSPECIFIED, MetricIdentity: sluicev1.MetricForm_METRIC_FORM_IDENTITY,
	MetricDiagonal: sluicev1.MetricForm_METRIC_FORM_DIAGONAL, MetricDense: sluicev1.MetricForm_METRIC_FORM_DENSE,
}

// MetricReport says which metric the kernel uses: its Kind ("identity",
// "diagonal", "dense") and Source ("none", "declared", "adapted"),
// whether adaptation windows remain, the condition number of C, the step
// of the last update (−1: never), the updates so far, the last
// Ledoit–Wolf shrinkage and the steps at which the windows end.
type MetricReport struct {
	Kind, Source  string
	Adapting      bool
	Condition     float64
	UpdatedAtStep int64
	Updates       int
	Shrinkage     float64
	WindowEnds    []int64
}

// TuningChoice is one setting the server chose (or kept), with its reason.
type TuningChoice struct {
	Setting string
	Value   float64
	Reason  string
}

func metricReportFromWire(m *sluicev1.MetricReport) MetricReport {
	return MetricReport{Kind: m.GetKind(), Source: m.GetSource(), Adapting: m.GetAdapting(), Condition: m.GetCondition(),
		UpdatedAtStep: m.GetUpdatedAtStep(), Updates: int(m.GetUpdates()), Shrinkage: m.GetShrinkage(), WindowEnds: m.GetWindowEnds()}
}

func tuningFromWire(cs []*sluicev1.TuningChoice) []TuningChoice {
	var out []TuningChoice
	for _, c := range cs {
		out = append(out, TuningChoice{Setting: c.GetSetting(), Value: c.GetValue(), Reason: c.GetReason()})
	}
	return out
}

// Envelope is rejection's Gaussian envelope and declared bound.
type Envelope struct {
	Mean            []float64
	Scale, LogBound float64
}

// Schedule is a decreasing step for sgld.
type Schedule struct{ A, B, Gamma float64 }

// Noise describes stochastic gradients: declared variance of one
// replicate's error per coordinate and bias (0: not declared), data and
// minibatch sizes (for epochs), and replicates per point (0: 1).
type Noise struct {
	Variance, Bias          float64
	DataSize, MinibatchSize int64
	Replicates              int
}

// Curvature declares m·I ⪯ ∇²(−log π) ⪯ M·I; StartDistance bounds
// W2(start, π) (0: √(dim/m), a start at the mode).
type Curvature struct {
	StrongConvexity, Smoothness, StartDistance float64
	// SecondMoment μ₂ ≥ E_π‖θ − centre‖² turns on the penalised target
	// for m = 0 with a TV target; PenaltyCentre (Dim values, nil: the
	// mean of the start points) is its centre.
	SecondMoment  float64
	PenaltyCentre []float64
}

// Metric names the distance of a guaranteed bound.
type Metric string

const (
	TV Metric = "tv"
	W2 Metric = "w2"
)

// Wants lists accuracy targets; zero fields are not targets.
type Wants struct {
	MinBulkESS, MinTailESS, MaxRhat, MaxKSD float64
	// Eps is a guaranteed error in Metric; it needs Curvature.
	Eps    float64
	Metric Metric
}

// Batch is one set of points to evaluate. The evaluator fills Grad (and
// LogDensity when WantLogDensity) in row order. A Batch and its slices
// are reused between calls: copy what must outlive the call.
type Batch struct {
	Rows, Dim int
	// Points holds Rows×Dim values, row-major.
	Points []float64
	// Chains gives the chain of each row.
	Chains []int
	// WantGradient, WantLogDensity, WantHessian and WantHessianVector say
	// what the server asks for.
	WantGradient, WantLogDensity, WantHessian, WantHessianVector bool
	// Grad receives ∇log π, Rows×Dim values.
	Grad []float64
	// LogDensity receives log π (up to a constant), Rows values.
	LogDensity []float64
	// Hessian receives the Hessian of log π, Rows×Dim×Dim values (row r's
	// matrix is the r-th block, row-major).
	Hessian []float64
	// Vectors holds Rows×Dim values when WantHessianVector: HessVec
	// receives the Hessian of log π at each point times its vector.
	Vectors, HessVec []float64
	// Groups, when not nil, gives each row's minibatch group: rows with
	// the same group ≥ 0 must be evaluated on the same minibatch.
	Groups []int
	// FullData asks for exact gradients over the whole data set.
	FullData bool
	// Replicates is the number of independent gradient estimates to
	// return per row: Grad then holds Rows×Replicates×Dim values, row r's
	// replicate j at offset (r·Replicates + j)·Dim.
	Replicates int
}

// Point returns row r of Points.
func (b *Batch) Point(r int) []float64 { return b.Points[r*b.Dim : (r+1)*b.Dim] }

// Evaluator evaluates a batch. An error stops the session: the client
// sends Stop, still receives the draws already made and the summary, and
// Run returns the error.
type Evaluator func(ctx context.Context, b *Batch) error

// Registered is the server's acknowledgement.
type Registered struct {
	SessionID          string
	Seed               uint64
	Kernel             string
	Step               float64
	EvaluationsPerStep int64
	MaxMessageBytes    int64
	Names              []string
	// PlannedSteps is the steps per chain of a step planned from
	// Wants.Eps, from the chains' actual start (0 otherwise, and 0 for
	// W2 without a declared start distance until the start gradients
	// certify it: Progress's eps target projects the rest).
	PlannedSteps int64
	// Token is the session's secret: Follow and Resume need it with
	// SessionID, and workers attach with it (see Work). Keep it private.
	Token string
	// Resumed is set when the latest stream continued the session from a
	// checkpoint.
	Resumed bool
	// Metric is the metric at registration and the adaptation schedule;
	// Tuning lists the automatic settings to come (Step 0).
	Metric MetricReport
	Tuning []TuningChoice
}

// Draws is a block of draws numbered Seq, Seq+1, ..., Seq+Rows−1. It is
// reused between callbacks: copy what must outlive the call.
type Draws struct {
	Seq        uint64
	Rows, Dim  int
	Values     []float64 // Rows×Dim
	Chains     []int
	Iterations []int64
}

// State is where a session is.
type State string

const (
	BurnIn   State = "burn-in"
	Sampling State = "sampling"
	Finished State = "finished"
)

// Progress reports the budget and the accuracy so far. EvaluationsLeft
// and TimeLeft are −1 when unlimited.
type Progress struct {
	State                State
	Steps                int64
	EvaluationsUsed      int64
	EvaluationsLeft      int64
	Elapsed, TimeLeft    time.Duration
	DrawsSent            int64
	EvaluationsPerSecond float64
	// Parameters holds the measured accuracy per parameter.
	Parameters []Diagnostics
	// KSD is the kernel Stein discrepancy of the kept draws (−1: not
	// available).
	KSD float64
	// Bound is the theoretical bound, if any; Bound.Label says whether it
	// is guaranteed (declared curvature) or estimated.
	Bound *Bound
	// Curvature holds one-sided certificates from the gradient pairs.
	Curvature CurvatureEstimate
	// Targets reports each requested target.
	Targets []TargetStatus
	// Noise reports stochastic-gradient noise (nil for exact gradients).
	Noise *NoiseEstimate
	// Kernel is what the kernel reports of itself.
	Kernel KernelReport
	// ParametersOmitted counts parameters left out of Parameters so that
	// the frame fits the message limit (the first ones are sent).
	ParametersOmitted int
	// Workers lists the session's evaluators (the owner first when it
	// evaluates); empty when no worker ever attached. RowsReissued counts
	// rows issued again because their evaluator left or fell behind;
	// AnswersLate the answers dropped because another came first.
	Workers                   []WorkerReport
	RowsReissued, AnswersLate int64
	// Metric is the metric in use; Tuning the settings the server chose
	// (Step 0) with their reasons; TuningEvaluations what its curvature
	// probes cost (counted in EvaluationsUsed).
	Metric            MetricReport
	Tuning            []TuningChoice
	TuningEvaluations int64
	// Stein is the kernel Stein discrepancy with its uncertainty (nil
	// when not measured); KSD above is its point estimate.
	Stein *SteinAssessment
	// Checks is the session's verdict so far.
	Checks []Check
}

// WorkerReport is one evaluator of a session: its name, whether it is the
// owner's stream, its measured speed, the rows it answered first, its rows
// given to others, and its answers dropped as late.
type WorkerReport struct {
	Name          string
	Owner         bool
	RowsPerSecond float64
	Rows          int64
	RowsReissued  int64
	AnswersLate   int64
}

// SteinAssessment is a kernel Stein discrepancy in standardised
// coordinates: the point estimate √max(U, 0), the U-statistic of KSD² and
// its standard error, an upper 95 % bound (a max_ksd target is met only
// below it), the bootstrap p-value of KSD = 0, the draws it rests on, and
// what it can claim in plain words (State).
type SteinAssessment struct {
	KSD, U, SE, Upper95, PValue float64
	Draws                       int64
	State                       string
}

// CheckStatus is how a check of the verdict came out.
type CheckStatus string

const (
	CheckPass CheckStatus = "pass"
	CheckWarn CheckStatus = "warn"
	CheckFail CheckStatus = "fail"
)

// Check is one named check of the verdict (divergence, stability,
// mixing, bias, gradient, guarantee): its status, the figure it rests on
// and one sentence for a person.
type Check struct {
	Name    string
	Status  CheckStatus
	Figure  float64
	Message string
}

// NoiseEstimate: measured variance of one replicate's error per
// coordinate (−1 without replicates) and its standard error, requests it
// rests on, the declared variance, epochs, and a warning when they
// disagree.
type NoiseEstimate struct {
	Variance, SE float64
	Requests     int64
	Declared     float64
	Epochs       float64
	Warning      string
}

// KernelReport: the step in use, whether it is still adapting, per-chain
// acceptance rates (MALA), the last step's Lanczos figures
// (ozaki-krylov), the mean cost of a step and the acceptance rate
// (hit-and-run, rejection).
type KernelReport struct {
	Step                   float64
	Adapting               bool
	AcceptanceRates        []float64
	KrylovIterations       int
	KrylovErrorEstimate    float64
	KrylovUnconverged      int
	EvaluationsPerStepMean float64
	AcceptanceRate         float64
}

// Diagnostics is the measured accuracy of one parameter.
type Diagnostics struct {
	Name                                   string
	Mean, SD, Rhat, BulkESS, TailESS, MCSE float64
}

// Bound is a bound on the distance between a chain's law and π.
type Bound struct {
	Metric                             Metric
	Value                              float64
	Guaranteed                         bool
	Label                              string
	Start, Discretisation, Noise, Bias float64
}

// CurvatureEstimate: M ≥ SmoothnessAtLeast, m ≤ StrongConvexityAtMost
// (certificates from gradient pairs); ProbedSmoothness and
// ProbedConvexity are the opt-in probe's estimates (0: no probe), which
// cost ProbeEvaluations.
type CurvatureEstimate struct {
	Pairs                                    int64
	SmoothnessAtLeast, StrongConvexityAtMost float64
	NotConvex                                bool
	ProbedSmoothness, ProbedConvexity        float64
	ProbeEvaluations                         int64
}

// TargetStatus reports one accuracy target.
type TargetStatus struct {
	Name                 string
	Want, Current        float64
	Met                  bool
	ProjectedEvaluations int64 // −1: cannot be projected
}

// Reason says why a session ended.
type Reason string

const (
	BudgetSpent    Reason = "budget spent"
	TimeSpent      Reason = "time spent"
	Stopped        Reason = "stopped by client"
	DrawsCollected Reason = "draws collected"
	Failed         Reason = "failed"
	Shutdown       Reason = "server shutting down"
	TargetMet      Reason = "target met"
	// CheckFailed: the draws were collected or the targets met, but a
	// check of the verdict failed; Message names it.
	CheckFailed Reason = "check failed"
)

// Parameter summarises one parameter's kept draws (computed by the
// server over every kept draw).
type Parameter struct {
	Name     string
	Mean, SD float64
	Count    int64
}

// Summary is what a finished session reports. When a session fails
// before the server's final frame, Run still returns a Summary with what
// was received (Registered, the last Progress, DrawsReceived, and Draws
// with KeepDraws) and Reason "".
type Summary struct {
	Registered Registered
	Reason     Reason
	Message    string
	Progress   Progress
	Parameters []Parameter
	// ParametersOmitted counts parameters left out of Parameters so the
	// final frame fits the message limit (the first ones are kept).
	ParametersOmitted int
	DrawsReceived     int64
	// Draws holds every draw received when Run was given KeepDraws (nil
	// otherwise).
	Draws *DrawSet
	// NextSeq is the sequence number after the last draw received: where
	// a follower resumes.
	NextSeq uint64
	// Resumes counts the times the session was resumed on a new stream
	// after its stream broke.
	Resumes int
	// Header is the followed session's header (Follow only; nil for Run).
	Header *FollowHeader
	// Checks is the session's verdict from the final frame.
	Checks []Check
}

// Option adjusts Run.
type Option func(*config)

type config struct {
	onRegistered func(*Registered)
	onDraws      func(*Draws)
	onProgress   func(*Progress)
	onHeader     func(*FollowHeader)
	callOpts     []grpc.CallOption
	keepDraws    bool
	resume       ResumePolicy
	fullDraws    bool
	history      *history.Writer
	drawsOut     *history.DrawsWriter
}

// OnRegistered calls f once the server accepted the session.
func OnRegistered(f func(*Registered)) Option { return func(c *config) { c.onRegistered = f } }

// OnDraws calls f for every block of draws, in sequence order.
func OnDraws(f func(*Draws)) Option { return func(c *config) { c.onDraws = f } }

// OnProgress calls f for every progress report.
func OnProgress(f func(*Progress)) Option { return func(c *config) { c.onProgress = f } }

// FullDraws asks the server to send every draw's values, in Draws frames
// of their own. By default the client lets the server name draws that
// equal points it has just sent (most kernels' next request asks at the
// positions just reached) and rebuilds them, and reads a step's draws
// carried in the next request's Points frame (one frame fewer per step);
// OnDraws and the Summary see the same values either way.
func FullDraws() Option { return func(c *config) { c.fullDraws = true } }

// WithCallOptions adds gRPC call options to the session's stream. The
// stream keeps its own codec (internal/codec: protobuf, the hot frames
// read and written by hand), whatever codec option is given.
func WithCallOptions(o ...grpc.CallOption) Option {
	return func(c *config) { c.callOpts = append(c.callOpts, o...) }
}

// ErrDrawsLost is returned when the draws' sequence numbers show a gap or
// a repeat: it means a fault between server and client.
var ErrDrawsLost = errors.New("client: draws lost or repeated")

// Run opens a session, answers every request with eval until the server
// finishes, and returns the summary. Callbacks run on Run's goroutine. A
// server error (a gRPC status) is returned as it is, together with the
// summary: the server's when it managed to send one, else what was
// received before the failure (Reason "").
//
// When the stream breaks (UNAVAILABLE: the server was killed, restarts or
// shuts down; or a reset stream), Run resumes the session by itself on a
// new stream (WithResume bounds the tries): it sends Resume with the
// session's id, token and the next sequence number it needs, and the
// server continues from its latest checkpoint. OnDraws sees every draw
// exactly once, in order, with no gap; eval may be asked again for points
// it evaluated before the break. OnRegistered is called once, for the
// first Registered. A session that broke before it was registered is
// registered again.
func Run(ctx context.Context, cc grpc.ClientConnInterface, spec Spec, eval Evaluator, opts ...Option) (*Summary, error) {
	var cfg config
	for _, o := range opts {
		o(&cfg)
	}
	limit := spec.MaxMessageBytes
	if limit <= 0 {
		limit = 4 << 20
	}
	// The session's codec (wireframes.go) comes last: it reads and writes
	// the hot frames by hand, so no other may replace it on this stream.
	callOpts := append([]grpc.CallOption{grpc.MaxCallRecvMsgSize(int(limit)), grpc.MaxCallSendMsgSize(int(limit))}, cfg.callOpts...)
	callOpts = append(callOpts, withCodec())
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	r := runner{cfg: cfg, eval: eval, sum: &Summary{}, hand: true}
	if cfg.keepDraws {
		r.sum.Draws = &DrawSet{Dim: spec.Dim}
	}
	pol := cfg.resume.withDefaults()
	reg := registerFrame(spec, limit)
	reg.GetRegister().AcceptsDrawReferences = !cfg.fullDraws
	reg.GetRegister().DrawsInPoints = !cfg.fullDraws
	for tries := 0; ; {
		err := r.open(ctx, sluicev1.NewSluiceServiceClient(cc), reg, callOpts)
		var sum *Summary
		if err == nil {
			if sum, err = r.loop(ctx); err == nil {
				return sum, nil
			}
		}
		if r.registered { // this stream got the session back
			tries = 0
		}
		if pol.Attempts < 0 || tries >= pol.Attempts || r.finished || r.evalErr != nil || !resumable(ctx, err) {
			if r.stream != nil {
				return r.result(err)
			}
			return r.sum, err
		}
		if werr := pol.wait(ctx, tries); werr != nil {
			return r.sum, err
		}
		tries++
	}
}

// open starts a stream and sends its first frame: Register for a session
// not yet registered, else Resume.
func (r *runner) open(ctx context.Context, c sluicev1.SluiceServiceClient, reg *sluicev1.SessionRequest, callOpts []grpc.CallOption) error {
	if r.stream != nil {
		_ = r.stream.CloseSend()
		r.stream = nil
	}
	r.registered, r.sendClosed, r.finished = false, false, false
	stream, err := c.Session(ctx, callOpts...)
	if err != nil {
		return err
	}
	r.stream = stream
	first := reg
	if id := r.sum.Registered.SessionID; id != "" {
		first = &sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Resume{Resume: &sluicev1.Resume{
			SessionId: id, Token: r.sum.Registered.Token, NextSeq: r.nextSeq}}}
	}
	if err := stream.Send(first); err != nil {
		return recvStatus(stream, err)
	}
	return nil
}

func registerFrame(spec Spec, limit int64) *sluicev1.SessionRequest {
	startRows := int32(1)
	if spec.Dim > 0 && len(spec.Start) == spec.Dim*spec.Chains && spec.Chains > 1 {
		startRows = int32(spec.Chains)
	}
	return &sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Register{Register: &sluicev1.Register{
		Dim: int32(spec.Dim), Chains: int32(spec.Chains), Kernel: spec.Kernel,
		Start: putFloats(nil, spec.Start), StartRows: startRows, Step: spec.Step,
		BurnIn: spec.BurnIn, KeepEvery: spec.KeepEvery, DrawsPerChain: spec.DrawsPerChain,
		MaxEvaluations: spec.MaxEvaluations, MaxSeconds: spec.MaxTime.Seconds(),
		ProgressEverySteps: spec.ProgressEverySteps, ProgressIntervalSeconds: spec.ProgressInterval.Seconds(),
		Seed: spec.Seed, Names: spec.Names, MaxMessageBytes: limit,
		Curvature: curvatureToWire(spec.Curvature), Wants: wantsToWire(spec.Wants),
		Friction: spec.Friction, InverseMass: spec.InverseMass,
		KrylovTolerance: spec.KrylovTolerance, KrylovMaxIterations: int32(spec.KrylovMaxIterations),
		Noise: noiseToWire(spec.Noise), Schedule: scheduleToWire(spec.Schedule), AnchorEvery: int32(spec.AnchorEvery),
		FixedPointTolerance: spec.FixedPointTolerance, FixedPointIterations: int32(spec.FixedPointIterations),
		CurvatureProbeIterations: int32(spec.CurvatureProbe),
		GradientCheckPoints:      int32(spec.GradientCheckPoints),
		ChainGroups:              int32(spec.ChainGroups),
		SliceWidth:               spec.SliceWidth, SliceMaxExpansions: int32(spec.SliceMaxExpansions), Envelope: envelopeToWire(spec.Envelope),
		CheckpointEverySteps: spec.CheckpointEverySteps,
		OwnerEvaluates:       ownerEvaluates(spec),
		Metric:               putFloats(nil, spec.Preconditioner), MetricForm: metricFormToWire[spec.MetricForm],
	}}}
}

// ownerEvaluates is the wire's owner_evaluates: unset (true) unless
// WorkersOnly.
func ownerEvaluates(spec Spec) *bool {
	if !spec.WorkersOnly {
		return nil
	}
	f := false
	return &f
}

func envelopeToWire(e *Envelope) *sluicev1.Envelope {
	if e == nil {
		return nil
	}
	return &sluicev1.Envelope{Mean: putFloats(nil, e.Mean), Scale: e.Scale, LogBound: e.LogBound}
}

func scheduleToWire(s *Schedule) *sluicev1.StepSchedule {
	if s == nil {
		return nil
	}
	return &sluicev1.StepSchedule{A: s.A, B: s.B, Gamma: s.Gamma}
}

func noiseToWire(n *Noise) *sluicev1.GradientNoise {
	if n == nil {
		return nil
	}
	return &sluicev1.GradientNoise{Kind: sluicev1.GradientKind_GRADIENT_KIND_STOCHASTIC, Variance: n.Variance, Bias: n.Bias,
		DataSize: n.DataSize, MinibatchSize: n.MinibatchSize, Replicates: int32(n.Replicates)}
}

func curvatureToWire(c *Curvature) *sluicev1.Curvature {
	if c == nil {
		return nil
	}
	return &sluicev1.Curvature{StrongConvexity: c.StrongConvexity, Smoothness: c.Smoothness, StartDistance: c.StartDistance,
		SecondMoment: c.SecondMoment, PenaltyCentre: putFloats(nil, c.PenaltyCentre)}
}

func wantsToWire(w Wants) *sluicev1.Wants {
	if w == (Wants{}) {
		return nil
	}
	m := map[Metric]sluicev1.Metric{TV: sluicev1.Metric_METRIC_TV, W2: sluicev1.Metric_METRIC_W2}[w.Metric]
	return &sluicev1.Wants{MinBulkEss: w.MinBulkESS, MinTailEss: w.MinTailESS, MaxRhat: w.MaxRhat, MaxKsd: w.MaxKSD,
		Eps: w.Eps, Metric: m}
}

type runner struct {
	cfg      config
	eval     Evaluator
	stream   grpc.BidiStreamingClient[sluicev1.SessionRequest, sluicev1.SessionResponse]
	sum      *Summary
	batch    Batch
	draws    Draws
	nextSeq  uint64
	evalErr  error
	finished bool
	// registered is set once the current stream got Registered.
	registered bool
	// sendClosed is set once Send reported the stream closed by the
	// server.
	sendClosed bool
	out        []byte
	// held holds the points of the latest requests, which Draws frames
	// may refer to (heldRequests).
	held heldRequests
	// hand says the stream has the session codec: frames are received
	// into rx and Evaluations sent as ev (wireframes.go).
	hand bool
	rx   response
	ev   evalFrame
}

// recv receives the next frame (see response for how long it is valid).
func (r *runner) recv() (*sluicev1.SessionResponse, error) {
	if !r.hand {
		return r.stream.Recv()
	}
	if err := r.stream.RecvMsg(&r.rx); err != nil {
		return nil, err
	}
	return r.rx.message()
}

func (r *runner) loop(ctx context.Context) (*Summary, error) {
	defer r.rx.Release()
	for {
		f, err := r.recv()
		if errors.Is(err, io.EOF) {
			if !r.finished {
				return r.sum, errStreamEnded
			}
			return r.result(r.evalErr)
		}
		if err != nil {
			return r.sum, err
		}
		switch f := f.GetFrame().(type) {
		case *sluicev1.SessionResponse_Registered:
			g := f.Registered
			first := r.sum.Registered.SessionID == ""
			r.sum.Registered = Registered{SessionID: g.GetSessionId(), Seed: g.GetSeed(), Kernel: g.GetKernel(), Step: g.GetStep(),
				EvaluationsPerStep: g.GetEvaluationsPerStep(), MaxMessageBytes: g.GetMaxMessageBytes(), Names: g.GetNames(),
				PlannedSteps: g.GetPlannedSteps(), Token: g.GetResumeToken(), Resumed: g.GetResumed(),
				Metric: metricReportFromWire(g.GetMetric()), Tuning: tuningFromWire(g.GetTuning())}
			r.registered = true
			if !first {
				r.sum.Resumes++
			}
			if first && r.cfg.onRegistered != nil {
				r.cfg.onRegistered(&r.sum.Registered)
			}
		case *sluicev1.SessionResponse_Points:
			h, err := r.hold(f.Points)
			if err != nil {
				return r.result(err)
			}
			if r.evalErr == nil && !r.sendClosed { // else Stop already sent, or the server is finishing
				err = r.answer(ctx, f.Points, h)
				if errors.Is(err, io.EOF) {
					// The server ended the stream: Recv delivers what it
					// sent before (the Finished frame) and then its status.
					r.sendClosed = true
				} else if err != nil {
					return r.result(err)
				}
			}
			// Draws carried in the frame (Register.draws_in_points): as
			// a Draws frame right after it, handed on once the answer
			// is out, so that the server steps while the caller takes
			// them.
			if d := f.Points.GetDraws(); d != nil {
				if err := r.deliver(d); err != nil {
					return r.result(err)
				}
			}
		case *sluicev1.SessionResponse_Draws:
			if err := r.deliver(f.Draws); err != nil {
				return r.result(err)
			}
		case *sluicev1.SessionResponse_Progress:
			r.sum.Progress = progressFromWire(f.Progress)
			r.progress()
		case *sluicev1.SessionResponse_Finished:
			r.finish(f.Finished)
		}
	}
}

func (r *runner) result(err error) (*Summary, error) {
	_ = r.stream.CloseSend()
	return r.sum, err
}

func (r *runner) answer(ctx context.Context, p *sluicev1.Points, h *heldRequest) error {
	b := &r.batch
	b.Rows, b.Dim = int(p.GetRows()), int(p.GetDim())
	n := b.Rows * b.Dim
	// hold checked the frame's shape and decoded its points; the batch
	// gets a copy, so that an evaluator writing into it cannot change
	// the draws rebuilt from them.
	first := int(p.GetFirstRow()) * b.Dim
	b.Points = append(b.Points[:0], h.vals[first:first+n]...)
	b.Chains = b.Chains[:0]
	for _, c := range p.GetChains() {
		b.Chains = append(b.Chains, int(c))
	}
	b.WantGradient, b.WantLogDensity, b.WantHessian, b.WantHessianVector = false, false, false, false
	for _, q := range p.GetQuantities() {
		switch q {
		case sluicev1.Quantity_QUANTITY_GRADIENT:
			b.WantGradient = true
		case sluicev1.Quantity_QUANTITY_LOG_DENSITY:
			b.WantLogDensity = true
		case sluicev1.Quantity_QUANTITY_HESSIAN:
			b.WantHessian = true
		case sluicev1.Quantity_QUANTITY_HESSIAN_VECTOR:
			b.WantHessianVector = true
		}
	}
	b.Replicates = max(1, int(p.GetReplicates()))
	b.FullData = p.GetFullData()
	b.Groups = b.Groups[:0]
	for _, g := range p.GetMinibatchGroups() {
		b.Groups = append(b.Groups, int(g))
	}
	if len(p.GetMinibatchGroups()) == 0 {
		b.Groups = nil
	}
	b.Grad = resize(b.Grad, n*b.Replicates)
	b.LogDensity = resize(b.LogDensity, b.Rows)
	if b.WantHessian {
		b.Hessian = resize(b.Hessian, n*b.Dim)
	}
	if b.WantHessianVector {
		if len(p.GetVectors()) != 8*n {
			return fmt.Errorf("client: malformed points frame: %d bytes of vectors for %d×%d", len(p.GetVectors()), b.Rows, b.Dim)
		}
		b.Vectors = getFloats(b.Vectors[:0], p.GetVectors())
		b.HessVec = resize(b.HessVec, n)
	}
	if err := r.eval(ctx, b); err != nil {
		r.evalErr = err
		return r.stream.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Stop{Stop: &sluicev1.Stop{Reason: "evaluator failed: " + err.Error()}}})
	}
	if r.hand { // written straight from the batch (wireframes.go)
		r.ev = evalFrame{requestID: p.GetRequestId(), firstRow: p.GetFirstRow(), rows: p.GetRows(), dim: p.GetDim()}
		if b.WantGradient {
			r.ev.grad = b.Grad
		}
		if b.WantLogDensity {
			r.ev.logDens = b.LogDensity
		}
		if b.WantHessian {
			r.ev.hess = b.Hessian
		}
		if b.WantHessianVector {
			r.ev.hvecs = b.HessVec
		}
		return r.stream.SendMsg(&r.ev)
	}
	ev := &sluicev1.Evaluations{RequestId: p.GetRequestId(), FirstRow: p.GetFirstRow(), Rows: p.GetRows(), Dim: p.GetDim()}
	r.out = r.out[:0]
	if b.WantGradient {
		r.out = putFloats(r.out, b.Grad)
		ev.Gradients = r.out
	}
	if b.WantLogDensity {
		ev.LogDensities = putFloats(nil, b.LogDensity)
	}
	if b.WantHessian {
		ev.Hessians = putFloats(nil, b.Hessian)
	}
	if b.WantHessianVector {
		ev.HessianVectors = putFloats(nil, b.HessVec)
	}
	return r.stream.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{Evaluations: ev}})
}

// hold checks a Points frame's shape and decodes its points into the
// request it belongs to among those held, at their rows within the
// request.
func (r *runner) hold(p *sluicev1.Points) (*heldRequest, error) {
	rows, dim, first, total := int(p.GetRows()), int(p.GetDim()), int(p.GetFirstRow()), int(p.GetTotalRows())
	n := rows * dim
	pts := r.rx.pointsOf(p) // where the frame was received, or p's bytes
	if pts.size() != 8*n || len(p.GetChains()) != rows {
		return nil, fmt.Errorf("client: malformed points frame: %d bytes and %d chains for %d×%d", pts.size(), len(p.GetChains()), rows, dim)
	}
	if dim < 1 || first < 0 || first+rows > total && first > 0 {
		return nil, fmt.Errorf("client: malformed points frame: rows %d to %d of %d, dimension %d", first, first+rows, total, dim)
	}
	total = max(total, rows) // a frame without total_rows is a whole request
	firstChain := -1
	if first == 0 && rows > 0 {
		firstChain = int(p.GetChains()[0])
	}
	h := r.held.take(p.GetRequestId(), total, dim, firstChain)
	if _, err := pts.decode(h.vals[first*dim : first*dim]); err != nil {
		return nil, fmt.Errorf("client: malformed points frame: %w", err)
	}
	return h, nil
}

// heldRequest is the points of one request: rows×dim values, those of
// every part received so far.
type heldRequest struct {
	id         uint64
	rows, dim  int
	firstChain int // the chain of its first row; −1 until that part came
	vals       []float64
}

// heldRequests keeps the points of the latest request of each group of
// chains a server steps apart (Spec.ChainGroups): a request whose first
// row is of the same chain as an older one's replaces it, so at most one
// step's worth of points is held, and at most maxHeldRequests requests.
// Draws frames refer to rows of these.
type heldRequests struct {
	reqs  []*heldRequest
	spare []*heldRequest
}

const maxHeldRequests = 256

// find returns the held request id, or nil.
func (hs *heldRequests) find(id uint64) *heldRequest {
	for _, h := range hs.reqs {
		if h.id == id {
			return h
		}
	}
	return nil
}

// take returns the held request id of rows×dim points, making it (and
// dropping the one it replaces) if it is new.
func (hs *heldRequests) take(id uint64, rows, dim, firstChain int) *heldRequest {
	h := hs.find(id)
	if h == nil || h.rows != rows || h.dim != dim {
		if h != nil {
			hs.drop(h)
		}
		if len(hs.reqs) >= maxHeldRequests {
			hs.drop(hs.reqs[0])
		}
		if n := len(hs.spare); n > 0 {
			h, hs.spare = hs.spare[n-1], hs.spare[:n-1]
		} else {
			h = &heldRequest{}
		}
		h.id, h.rows, h.dim, h.firstChain = id, rows, dim, -1
		h.vals = resize(h.vals, rows*dim)
		hs.reqs = append(hs.reqs, h)
	}
	if firstChain >= 0 && h.firstChain < 0 {
		h.firstChain = firstChain
		for _, o := range hs.reqs {
			if o != h && o.firstChain == firstChain {
				hs.drop(o)
				break
			}
		}
	}
	return h
}

func (hs *heldRequests) drop(h *heldRequest) {
	for i, o := range hs.reqs {
		if o == h {
			hs.reqs = append(hs.reqs[:i], hs.reqs[i+1:]...)
			hs.spare = append(hs.spare, h)
			return
		}
	}
}

// deliver checks a Draws frame and hands its draws on, rebuilding those
// sent by reference from the points held.
func (r *runner) deliver(w *sluicev1.Draws) error {
	d := &r.draws
	d.Seq, d.Rows, d.Dim = w.GetSeq(), int(w.GetRows()), int(w.GetDim())
	if d.Seq != r.nextSeq {
		return fmt.Errorf("%w: got sequence %d, expected %d", ErrDrawsLost, d.Seq, r.nextSeq)
	}
	sent := d.Rows // rows whose values are in the frame
	var h *heldRequest
	if pr := w.GetPointRows(); len(pr) > 0 {
		h = r.held.find(w.GetFromRequestId())
		if len(pr) != d.Rows || h == nil || d.Dim != h.dim {
			return fmt.Errorf("client: draws frame at sequence %d refers to request %d (dimension %d), which is not among the requests whose points are held",
				d.Seq, w.GetFromRequestId(), d.Dim)
		}
		sent = 0
		for _, row := range pr {
			switch {
			case row < 0:
				sent++
			case int(row) >= h.rows:
				return fmt.Errorf("client: draws frame at sequence %d refers to row %d of a request of %d rows", d.Seq, row, h.rows)
			}
		}
	}
	if len(w.GetValues()) != 8*sent*d.Dim || len(w.GetChains()) != d.Rows || len(w.GetIterations()) != d.Rows {
		return fmt.Errorf("client: malformed draws frame at sequence %d", d.Seq)
	}
	r.nextSeq += uint64(d.Rows)
	r.sum.NextSeq = r.nextSeq
	r.sum.DrawsReceived += int64(d.Rows)
	if r.cfg.onDraws == nil && r.sum.Draws == nil && r.cfg.drawsOut == nil {
		return nil
	}
	if pr := w.GetPointRows(); len(pr) > 0 {
		d.Values = rebuild(d.Values, h, pr, w.GetValues())
	} else {
		d.Values = getFloats(d.Values[:0], w.GetValues())
	}
	d.Chains = d.Chains[:0]
	for _, c := range w.GetChains() {
		d.Chains = append(d.Chains, int(c))
	}
	d.Iterations = append(d.Iterations[:0], w.GetIterations()...)
	r.sum.Draws.add(d)
	if w := r.cfg.drawsOut; w != nil {
		for row := range d.Rows {
			w.Row(d.Chains[row], d.Iterations[row], d.Values[row*d.Dim:(row+1)*d.Dim])
		}
	}
	if r.cfg.onDraws != nil {
		r.cfg.onDraws(d)
	}
	return nil
}

// rebuild returns dst filled with the draws of a frame sent by reference:
// row i is row pr[i] of the points of h, or the next row of vals when
// pr[i] is −1 (deliver checked the rows and the length of vals).
func rebuild(dst []float64, h *heldRequest, pr []int32, vals []byte) []float64 {
	dim := h.dim
	dst = resize(dst, len(pr)*dim)
	for i, row := range pr {
		out := dst[i*dim : (i+1)*dim]
		if row >= 0 {
			copy(out, h.vals[int(row)*dim:(int(row)+1)*dim])
			continue
		}
		_, _ = wire.DecodeFloats(out[:0], vals[:8*dim])
		vals = vals[8*dim:]
	}
	return dst
}

var reasonFromWire = map[sluicev1.FinishReason]Reason{
	sluicev1.FinishReason_FINISH_REASON_BUDGET_SPENT:    BudgetSpent,
	sluicev1.FinishReason_FINISH_REASON_TIME_SPENT:      TimeSpent,
	sluicev1.FinishReason_FINISH_REASON_STOPPED:         Stopped,
	sluicev1.FinishReason_FINISH_REASON_DRAWS_COLLECTED: DrawsCollected,
	sluicev1.FinishReason_FINISH_REASON_FAILED:          Failed,
	sluicev1.FinishReason_FINISH_REASON_SHUTDOWN:        Shutdown,
	sluicev1.FinishReason_FINISH_REASON_TARGET_MET:      TargetMet,
	sluicev1.FinishReason_FINISH_REASON_CHECK_FAILED:    CheckFailed,
}

var checkStatusFromWire = map[sluicev1.CheckStatus]CheckStatus{
	sluicev1.CheckStatus_CHECK_STATUS_PASS: CheckPass,
	sluicev1.CheckStatus_CHECK_STATUS_WARN: CheckWarn,
	sluicev1.CheckStatus_CHECK_STATUS_FAIL: CheckFail,
}

func checksFromWire(cs []*sluicev1.Check) []Check {
	var out []Check
	for _, c := range cs {
		out = append(out, Check{Name: c.GetName(), Status: checkStatusFromWire[c.GetStatus()], Figure: c.GetFigure(), Message: c.GetMessage()})
	}
	return out
}

func (r *runner) finish(f *sluicev1.Finished) {
	r.finished = true
	r.sum.Reason = reasonFromWire[f.GetReason()]
	r.sum.Message = f.GetMessage()
	r.sum.Progress = progressFromWire(f.GetProgress())
	r.sum.ParametersOmitted = int(f.GetParametersOmitted())
	r.sum.Checks = checksFromWire(f.GetChecks())
	r.sum.Parameters = make([]Parameter, len(f.GetParameters()))
	for i, p := range f.GetParameters() {
		r.sum.Parameters[i] = Parameter{Name: p.GetName(), Mean: p.GetMean(), SD: p.GetSd(), Count: p.GetCount()}
	}
	if r.cfg.history != nil {
		_ = r.cfg.history.Write(FinishRecord(r.sum))
	}
}

var stateFromWire = map[sluicev1.State]State{
	sluicev1.State_STATE_BURN_IN:  BurnIn,
	sluicev1.State_STATE_SAMPLING: Sampling,
	sluicev1.State_STATE_FINISHED: Finished,
}

func progressFromWire(p *sluicev1.Progress) Progress {
	sec := func(s float64) time.Duration {
		if s < 0 {
			return -1
		}
		return time.Duration(s * float64(time.Second))
	}
	out := Progress{State: stateFromWire[p.GetState()], Steps: p.GetSteps(), EvaluationsUsed: p.GetEvaluationsUsed(),
		EvaluationsLeft: p.GetEvaluationsLeft(), Elapsed: sec(p.GetSecondsUsed()), TimeLeft: sec(p.GetSecondsLeft()),
		DrawsSent: p.GetDrawsSent(), EvaluationsPerSecond: p.GetEvaluationsPerSecond(), KSD: p.GetKsd()}
	if c := p.GetCurvature(); c != nil {
		out.Curvature = CurvatureEstimate{Pairs: c.GetPairs(), SmoothnessAtLeast: c.GetSmoothnessAtLeast(),
			StrongConvexityAtMost: c.GetStrongConvexityAtMost(), NotConvex: c.GetNotConvex(),
			ProbedSmoothness: c.GetProbedSmoothness(), ProbedConvexity: c.GetProbedStrongConvexity(), ProbeEvaluations: c.GetProbeEvaluations()}
	}
	if b := p.GetBound(); b != nil {
		out.Bound = &Bound{Metric: map[sluicev1.Metric]Metric{sluicev1.Metric_METRIC_TV: TV, sluicev1.Metric_METRIC_W2: W2}[b.GetMetric()],
			Value: b.GetValue(), Guaranteed: b.GetSource() == sluicev1.BoundSource_BOUND_SOURCE_DECLARED, Label: b.GetLabel(),
			Start: b.GetStartTerm(), Discretisation: b.GetDiscretisationTerm(), Noise: b.GetNoiseTerm(), Bias: b.GetBiasTerm()}
	}
	for _, d := range p.GetParameters() {
		out.Parameters = append(out.Parameters, Diagnostics{Name: d.GetName(), Mean: d.GetMean(), SD: d.GetSd(), Rhat: d.GetRhat(),
			BulkESS: d.GetBulkEss(), TailESS: d.GetTailEss(), MCSE: d.GetMcseMean()})
	}
	if n := p.GetNoise(); n != nil {
		out.Noise = &NoiseEstimate{Variance: n.GetVariance(), SE: n.GetVarianceSe(), Requests: n.GetRequests(),
			Declared: n.GetDeclared(), Epochs: n.GetEpochs(), Warning: n.GetWarning()}
	}
	if k := p.GetKernel(); k != nil {
		out.Kernel = KernelReport{Step: k.GetStep(), Adapting: k.GetAdapting(), AcceptanceRates: k.GetAcceptanceRates(),
			KrylovIterations: int(k.GetKrylovIterations()), KrylovErrorEstimate: k.GetKrylovErrorEstimate(),
			KrylovUnconverged: int(k.GetKrylovUnconverged()), EvaluationsPerStepMean: k.GetEvaluationsPerStepMean(),
			AcceptanceRate: k.GetAcceptanceRate()}
	}
	out.ParametersOmitted = int(p.GetParametersOmitted())
	out.RowsReissued, out.AnswersLate = p.GetRowsReissued(), p.GetAnswersLate()
	for _, w := range p.GetWorkers() {
		out.Workers = append(out.Workers, WorkerReport{Name: w.GetName(), Owner: w.GetOwner(), RowsPerSecond: w.GetRowsPerSecond(),
			Rows: w.GetRows(), RowsReissued: w.GetRowsReissued(), AnswersLate: w.GetAnswersLate()})
	}
	out.Metric, out.Tuning, out.TuningEvaluations = metricReportFromWire(p.GetMetric()), tuningFromWire(p.GetTuning()), p.GetTuningEvaluations()
	for _, t := range p.GetTargets() {
		out.Targets = append(out.Targets, TargetStatus{Name: t.GetName(), Want: t.GetWant(), Current: t.GetCurrent(), Met: t.GetMet(),
			ProjectedEvaluations: t.GetProjectedEvaluations()})
	}
	if st := p.GetStein(); st != nil {
		out.Stein = &SteinAssessment{KSD: st.GetKsd(), U: st.GetUStatistic(), SE: st.GetSe(), Upper95: st.GetUpper95(),
			PValue: st.GetPValue(), Draws: st.GetDraws(), State: st.GetStateText()}
		if out.Stein.State == "" {
			out.Stein.State = st.GetState().String()
		}
	}
	out.Checks = checksFromWire(p.GetChecks())
	return out
}

// recvStatus returns the stream's real status after a failed Send (gRPC
// reports io.EOF from Send and the cause from Recv).
func recvStatus(s grpc.BidiStreamingClient[sluicev1.SessionRequest, sluicev1.SessionResponse], err error) error {
	if errors.Is(err, io.EOF) {
		if _, rerr := s.Recv(); rerr != nil && !errors.Is(rerr, io.EOF) {
			return rerr
		}
	}
	return err
}

func resize(s []float64, n int) []float64 {
	if cap(s) < n {
		return make([]float64, n)
	}
	return s[:n]
}

// putFloats appends v to dst in the wire's array layout.
func putFloats(dst []byte, v []float64) []byte { return wire.AppendFloats(dst, v) }

// getFloats appends the float64 values of the wire array b to dst; a
// trailing partial value is ignored.
func getFloats(dst []float64, b []byte) []float64 {
	out, _ := wire.DecodeFloats(dst, b[:len(b)/8*8])
	return out
}
