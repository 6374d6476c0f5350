package server

import (
	"unicode/utf8"

	"sluice/internal/wire"
	"sluice/kernels"
	"sluice/kernels/diag"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
)

// specFromWire turns a Register frame into an engine Spec. Only decoding
// happens here; the engine validates the values.
func specFromWire(r *sluicev1.Register) (session.Spec, error) {
	start, err := floats("register.start", r.GetStart())
	if err != nil {
		return session.Spec{}, err
	}
	maxTime, err := session.ParseSeconds("register.max_seconds", r.GetMaxSeconds())
	if err != nil {
		return session.Spec{}, err
	}
	interval, err := session.ParseSeconds("register.progress_interval_seconds", r.GetProgressIntervalSeconds())
	if err != nil {
		return session.Spec{}, err
	}
	var curv *session.Curvature
	if c := r.GetCurvature(); c != nil {
		centre, err := floats("register.curvature.penalty_centre", c.GetPenaltyCentre())
		if err != nil {
			return session.Spec{}, err
		}
		curv = &session.Curvature{StrongConvexity: c.GetStrongConvexity(), Smoothness: c.GetSmoothness(),
			StartDistance: c.GetStartDistance(), SecondMoment: c.GetSecondMoment(), PenaltyCentre: centre}
	}
	w := r.GetWants()
	wants := session.Wants{MinBulkESS: w.GetMinBulkEss(), MinTailESS: w.GetMinTailEss(), MaxRhat: w.GetMaxRhat(),
		MaxKSD: w.GetMaxKsd(), Eps: w.GetEps(), Metric: metricFromWire[w.GetMetric()]}
	metric, err := floats("register.metric", r.GetMetric())
	if err != nil {
		return session.Spec{}, err
	}
	var env *session.Envelope
	if e := r.GetEnvelope(); e != nil {
		mean, err := floats("register.envelope.mean", e.GetMean())
		if err != nil {
			return session.Spec{}, err
		}
		env = &session.Envelope{Mean: mean, Scale: e.GetScale(), LogBound: e.GetLogBound()}
	}
	return session.Spec{
		Envelope:             env,
		Curvature:            curv,
		Friction:             r.GetFriction(),
		KrylovTolerance:      r.GetKrylovTolerance(),
		Schedule:             scheduleFromWire(r.GetSchedule()),
		AnchorEvery:          int(r.GetAnchorEvery()),
		CurvatureProbe:       int(r.GetCurvatureProbeIterations()),
		GradientCheckPoints:  int(r.GetGradientCheckPoints()),
		ChainGroups:          int(r.GetChainGroups()),
		SliceWidth:           r.GetSliceWidth(),
		SliceMaxExpansions:   int(r.GetSliceMaxExpansions()),
		FixedPointTolerance:  r.GetFixedPointTolerance(),
		FixedPointIterations: int(r.GetFixedPointIterations()),
		KrylovMaxIterations:  int(r.GetKrylovMaxIterations()),
		WorkersOnly:          r.OwnerEvaluates != nil && !r.GetOwnerEvaluates(),
		Noise: session.Noise{Stochastic: r.GetNoise().GetKind() == sluicev1.GradientKind_GRADIENT_KIND_STOCHASTIC,
			Variance: r.GetNoise().GetVariance(), Bias: r.GetNoise().GetBias(), DataSize: r.GetNoise().GetDataSize(),
			MinibatchSize: r.GetNoise().GetMinibatchSize(), Replicates: int(r.GetNoise().GetReplicates())},
		InverseMass:        r.GetInverseMass(),
		Wants:              wants,
		Dim:                int(r.GetDim()),
		Chains:             int(r.GetChains()),
		Kernel:             r.GetKernel(),
		Start:              start,
		StartRows:          int(r.GetStartRows()),
		Step:               r.GetStep(),
		BurnIn:             r.GetBurnIn(),
		KeepEvery:          r.GetKeepEvery(),
		DrawsPerChain:      r.GetDrawsPerChain(),
		DrawReferences:     r.GetAcceptsDrawReferences(),
		DrawsInPoints:      r.GetDrawsInPoints(),
		MaxEvaluations:     r.GetMaxEvaluations(),
		MaxTime:            maxTime,
		ProgressEverySteps: r.GetProgressEverySteps(), CheckpointEverySteps: r.GetCheckpointEverySteps(),
		ProgressInterval: interval,
		Seed:             r.GetSeed(),
		Names:            r.GetNames(),
		MaxMessageBytes:  r.GetMaxMessageBytes(),
		Metric:           metric,
		MetricForm:       session.MetricForm(r.GetMetricForm()),
	}, nil
}

func scheduleFromWire(s *sluicev1.StepSchedule) *kernels.SGLDSchedule {
	if s == nil {
		return nil
	}
	return &kernels.SGLDSchedule{A: s.GetA(), B: s.GetB(), Gamma: s.GetGamma()}
}

// MaxStopReasonBytes caps the reason a client gives with Stop (it is
// echoed in the Finished frame and the log).
const MaxStopReasonBytes = 1024

// messageFromWire turns one received frame into an engine Message.
// Gradients are decoded into *gradBuf (grown as needed), which the caller
// owns and must not reuse while the engine may still read the message.
func messageFromWire(f *sluicev1.SessionRequest, gradBuf *[]float64) session.Message {
	switch f := f.GetFrame().(type) {
	case *sluicev1.SessionRequest_Evaluations:
		e := f.Evaluations
		return evaluationsMessage(e.GetRequestId(), e.GetFirstRow(), e.GetRows(), e.GetDim(), answerArrays{
			grad: wireFloats{b: e.GetGradients()}, logDens: wireFloats{b: e.GetLogDensities()},
			hess: wireFloats{b: e.GetHessians()}, hessVec: wireFloats{b: e.GetHessianVectors()}}, gradBuf)
	case *sluicev1.SessionRequest_Stop:
		if n := len(f.Stop.GetReason()); n > MaxStopReasonBytes {
			return session.Message{Err: session.BadField("stop.reason", "is %d bytes long, the limit is %d", n, MaxStopReasonBytes)}
		}
		return session.Message{Stop: true, StopReason: f.Stop.GetReason()}
	case *sluicev1.SessionRequest_Register:
		return session.Message{Err: session.BadField("register", "sent twice: a session registers once")}
	case *sluicev1.SessionRequest_Resume:
		return session.Message{Err: session.BadField("resume", "only as the first frame of a stream")}
	default:
		return session.Message{Err: session.BadField("frame", "empty frame")}
	}
}

// answerArrays are an Evaluations frame's arrays, as received.
type answerArrays struct{ grad, logDens, hess, hessVec wireFloats }

// evaluationsMessage turns an Evaluations frame into an engine Message:
// gradients are decoded into *gradBuf (grown as needed, see
// messageFromWire), the other arrays into new slices.
func evaluationsMessage(requestID uint64, firstRow, rows, dim int32, a answerArrays, gradBuf *[]float64) session.Message {
	grad, err := a.grad.into(*gradBuf, "evaluations.gradients")
	if err != nil {
		return session.Message{Err: err}
	}
	*gradBuf = grad
	ld, err := a.logDens.fresh("evaluations.log_densities")
	if err != nil {
		return session.Message{Err: err}
	}
	hess, err := a.hess.fresh("evaluations.hessians")
	if err != nil {
		return session.Message{Err: err}
	}
	hv, err := a.hessVec.fresh("evaluations.hessian_vectors")
	if err != nil {
		return session.Message{Err: err}
	}
	return session.Message{Evaluations: &session.Evaluations{RequestID: requestID, FirstRow: int(firstRow),
		Rows: int(rows), Dim: int(dim), Grad: grad, LogDensity: ld, Hessian: hess, HessVec: hv}}
}

// encoder turns engine frames into wire frames, reusing its buffers: a
// frame is fully serialised by Send before the next one is built.
type encoder struct {
	buf []byte
	i32 []int32
	// dbuf, dchains and rows hold a Draws frame's values, chains and
	// point rows.
	dbuf    []byte
	dchains []int32
	rows    []int32
	// handPoints and handDraws send the hot frames by hand (message).
	handPoints pointsFrame
	handDraws  drawsFrame
	// maxParams is how many per-parameter entries a Progress or Finished
	// frame may carry within the message limit (0: no cap).
	maxParams int
	// maxText is how many bytes the checks of one frame, and a Finished
	// frame's message, may take each (0: no cap): an eighth of the
	// message limit, so that with the parameters' half the frame fits.
	maxText int
}

// textCap returns the byte budget of a frame's checks and of a message.
func textCap(limit int64) int { return int(max(64, limit/8)) }

// clip shortens s to at most n bytes, at a rune boundary, marking the cut.
func clip(s string, n int) string {
	if n <= 0 || len(s) <= n {
		return s
	}
	const mark = "…"
	cut := max(0, n-len(mark))
	for cut > 0 && !utf8.RuneStart(s[cut]) {
		cut--
	}
	return s[:cut] + mark
}

// paramCap returns how many per-parameter entries fit in half of a
// message of limit bytes: an entry with a name of up to 64 bytes and its
// numbers takes at most 128.
func paramCap(limit int64) int { return int(max(1, limit/2/128)) }

func (e *encoder) floats(v []float64) []byte {
	e.buf = wire.AppendFloats(e.buf[:0], v)
	return e.buf
}

// draws is a Draws frame on the wire, in buffers of its own (it may ride
// in a Points frame, whose points and chains use e.buf and e.i32).
func (e *encoder) draws(f *session.Draws) *sluicev1.Draws {
	e.dbuf = wire.AppendFloats(e.dbuf[:0], f.Values)
	e.dchains = appendInt32(e.dchains[:0], f.Chains)
	d := &sluicev1.Draws{Seq: f.Seq, Rows: int32(f.Rows), Dim: int32(f.Dim), Values: e.dbuf,
		Chains: e.dchains, Iterations: f.Iterations}
	if f.PointRows != nil {
		e.rows = appendInt32(e.rows[:0], f.PointRows)
		d.FromRequestId, d.PointRows = f.FromRequestID, e.rows
	}
	return d
}

func (e *encoder) ints(v []int) []int32 {
	e.i32 = appendInt32(e.i32[:0], v)
	return e.i32
}

// appendInt32 appends v to dst as int32 values.
func appendInt32(dst []int32, v []int) []int32 {
	for _, x := range v {
		dst = append(dst, int32(x))
	}
	return dst
}

func (e *encoder) frame(f session.Frame) *sluicev1.SessionResponse {
	switch f := f.(type) {
	case *session.Registered:
		return &sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Registered{Registered: &sluicev1.Registered{
			SessionId: f.SessionID, Seed: f.Seed, Kernel: f.Kernel, Step: f.Step,
			EvaluationsPerStep: int64(f.EvaluationsPerStep), MaxMessageBytes: f.MaxMessageBytes, Names: f.Names,
			PlannedSteps: int64(f.PlannedSteps), ResumeToken: f.Token, Resumed: f.Resumed,
			Metric: metricReportToWire(f.Metric), Tuning: tuningToWire(f.Tuning)}}}
	case *session.Points:
		p := &sluicev1.Points{RequestId: f.RequestID, FirstRow: int32(f.FirstRow), Rows: int32(f.Rows), Dim: int32(f.Dim),
			Points: e.floats(f.Points), Chains: e.ints(f.Chains), TotalRows: int32(f.TotalRows),
			Quantities: quantities([]sluicev1.Quantity(nil), f.Need)}
		if f.Need.Has(kernels.NeedHessianVector) {
			p.Vectors = wire.AppendFloats(nil, f.Vectors)
		}
		if f.Groups != nil {
			p.MinibatchGroups = make([]int32, len(f.Groups))
			for i, g := range f.Groups {
				p.MinibatchGroups[i] = int32(g)
			}
		}
		p.FullData, p.Replicates = f.FullData, int32(f.Replicates)
		if f.Draws != nil {
			p.Draws = e.draws(f.Draws)
		}
		return &sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Points{Points: p}}
	case *session.Draws:
		return &sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Draws{Draws: e.draws(f)}}
	case *session.Progress:
		return &sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Progress{Progress: e.progress(f)}}
	case *session.Finished:
		params, omitted := f.Parameters, 0
		if e.maxParams > 0 && len(params) > e.maxParams {
			params, omitted = params[:e.maxParams], len(params)-e.maxParams
		}
		ps := make([]*sluicev1.ParameterSummary, len(params))
		for i, p := range params {
			ps[i] = &sluicev1.ParameterSummary{Name: p.Name, Mean: p.Mean, Sd: p.SD, Count: p.Count}
		}
		return &sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Finished{Finished: &sluicev1.Finished{
			Reason: reasonToWire[f.Reason], Message: clip(f.Message, e.maxText), Progress: e.progress(&f.Progress), Parameters: ps,
			ParametersOmitted: int32(omitted), Checks: checksToWire(f.Checks, e.maxText)}}}
	}
	panic("server: unknown frame type")
}

// message returns what a session stream sends for f: the hot frames
// (Points, Draws) as codec.Senders written straight from f, the others
// as the messages of frame. It is valid while f is.
func (e *encoder) message(f session.Frame) any {
	switch f := f.(type) {
	case *session.Points:
		e.handPoints.set(f)
		return &e.handPoints
	case *session.Draws:
		e.handDraws.set(f)
		return &e.handDraws
	}
	return e.frame(f)
}

var stateToWire = map[session.State]sluicev1.State{
	session.BurnIn:   sluicev1.State_STATE_BURN_IN,
	session.Sampling: sluicev1.State_STATE_SAMPLING,
	session.Done:     sluicev1.State_STATE_FINISHED,
}

var reasonToWire = map[session.Reason]sluicev1.FinishReason{
	session.BudgetSpent:    sluicev1.FinishReason_FINISH_REASON_BUDGET_SPENT,
	session.TimeSpent:      sluicev1.FinishReason_FINISH_REASON_TIME_SPENT,
	session.Stopped:        sluicev1.FinishReason_FINISH_REASON_STOPPED,
	session.DrawsCollected: sluicev1.FinishReason_FINISH_REASON_DRAWS_COLLECTED,
	session.Failed:         sluicev1.FinishReason_FINISH_REASON_FAILED,
	session.Shutdown:       sluicev1.FinishReason_FINISH_REASON_SHUTDOWN,
	session.TargetMet:      sluicev1.FinishReason_FINISH_REASON_TARGET_MET,
	session.CheckFailed:    sluicev1.FinishReason_FINISH_REASON_CHECK_FAILED,
}

var checkStatusToWire = map[session.CheckStatus]sluicev1.CheckStatus{
	session.CheckPass: sluicev1.CheckStatus_CHECK_STATUS_PASS,
	session.CheckWarn: sluicev1.CheckStatus_CHECK_STATUS_WARN,
	session.CheckFail: sluicev1.CheckStatus_CHECK_STATUS_FAIL,
}

var steinStateToWire = map[diag.SteinState]sluicev1.SteinState{
	diag.SteinUndefined:         sluicev1.SteinState_STEIN_STATE_UNDEFINED,
	diag.SteinIndistinguishable: sluicev1.SteinState_STEIN_STATE_INDISTINGUISHABLE,
	diag.SteinSignificant:       sluicev1.SteinState_STEIN_STATE_SIGNIFICANT,
}

// checksToWire converts the checks, their messages clipped so that all
// of them take at most budget bytes (0: no cap); each check's name,
// status and figure take about 32 bytes on the wire.
func checksToWire(cs []session.Check, budget int) []*sluicev1.Check {
	out := make([]*sluicev1.Check, len(cs))
	each := 0
	if budget > 0 && len(cs) > 0 {
		each = max(1, budget/len(cs)-32)
	}
	for i, c := range cs {
		out[i] = &sluicev1.Check{Name: c.Name, Status: checkStatusToWire[c.Status], Figure: c.Figure, Message: clip(c.Message, each)}
	}
	return out
}

// progress converts p, keeping the per-parameter list within the cap.
func (e *encoder) progress(p *session.Progress) *sluicev1.Progress {
	var w *sluicev1.Progress
	if e.maxParams > 0 && len(p.Parameters) > e.maxParams {
		q := *p
		q.Parameters = p.Parameters[:e.maxParams]
		w = progressToWire(&q)
		w.ParametersOmitted = int32(len(p.Parameters) - e.maxParams)
	} else {
		w = progressToWire(p)
	}
	if e.maxText > 0 {
		w.Checks = checksToWire(p.Checks, e.maxText)
	}
	return w
}

func progressToWire(p *session.Progress) *sluicev1.Progress {
	left := -1.0
	if p.TimeLeft >= 0 {
		left = p.TimeLeft.Seconds()
	}
	w := &sluicev1.Progress{State: stateToWire[p.State], Steps: p.Steps, EvaluationsUsed: p.EvaluationsUsed,
		EvaluationsLeft: p.EvaluationsLeft, SecondsUsed: p.Elapsed.Seconds(), SecondsLeft: left,
		DrawsSent: p.DrawsSent, EvaluationsPerSecond: p.EvaluationsPerSecond, Ksd: p.KSD,
		Curvature: &sluicev1.CurvatureEstimate{Pairs: p.Curvature.Pairs, SmoothnessAtLeast: p.Curvature.SmoothnessAtLeast,
			StrongConvexityAtMost: p.Curvature.StrongConvexityAtMost, NotConvex: p.Curvature.NotConvex,
			ProbedSmoothness: p.Curvature.ProbedSmoothness, ProbedStrongConvexity: p.Curvature.ProbedConvexity,
			ProbeEvaluations: p.Curvature.ProbeEvaluations}}
	if p.Bound != nil {
		w.Bound = boundToWire(*p.Bound)
		w.Bound.Label = p.BoundLabel
	}
	for _, d := range p.Parameters {
		w.Parameters = append(w.Parameters, &sluicev1.ParameterDiagnostics{Name: d.Name, Mean: d.Mean, Sd: d.SD,
			Rhat: d.Rhat, BulkEss: d.BulkESS, TailEss: d.TailESS, McseMean: d.MCSE})
	}
	k := p.Kernel
	w.Kernel = &sluicev1.KernelReport{Step: k.Step, Adapting: k.Adapting, AcceptanceRates: k.AcceptanceRates,
		KrylovIterations: int32(k.Krylov.MaxIterations), KrylovErrorEstimate: k.Krylov.MaxEstimate, KrylovUnconverged: int32(k.Krylov.Unconverged),
		EvaluationsPerStepMean: k.EvaluationsPerStepMean, AcceptanceRate: k.AcceptanceRate}
	if n := p.Noise; n != nil {
		w.Noise = &sluicev1.NoiseEstimate{Variance: n.Variance, VarianceSe: n.SE, Requests: n.Requests, Declared: n.Declared,
			Epochs: n.Epochs, Warning: n.Warning}
	}
	for _, t := range p.Targets {
		w.Targets = append(w.Targets, &sluicev1.TargetStatus{Name: t.Name, Want: t.Want, Current: t.Current, Met: t.Met,
			ProjectedEvaluations: t.ProjectedEvaluations})
	}
	poolToWire(w, &p.Pool)
	w.Metric, w.Tuning, w.TuningEvaluations = metricReportToWire(p.Metric), tuningToWire(p.Tuning), p.TuningEvaluations
	if r := p.Stein; r != nil {
		w.Stein = &sluicev1.SteinAssessment{Ksd: r.KSD, UStatistic: r.U2, Se: r.SE, Upper95: r.Upper95, PValue: r.PValue,
			Draws: int64(r.Draws), State: steinStateToWire[r.State], StateText: r.State.String()}
	}
	w.Checks = checksToWire(p.Checks, 0)
	return w
}

func metricReportToWire(m session.MetricReport) *sluicev1.MetricReport {
	return &sluicev1.MetricReport{Kind: m.Kind, Source: m.Source, Adapting: m.Adapting, Condition: m.Condition,
		UpdatedAtStep: m.UpdatedAtStep, Updates: int32(m.Updates), Shrinkage: m.Shrinkage, WindowEnds: m.WindowEnds}
}

func tuningToWire(cs []session.Choice) []*sluicev1.TuningChoice {
	out := make([]*sluicev1.TuningChoice, len(cs))
	for i, c := range cs {
		out[i] = &sluicev1.TuningChoice{Setting: c.Setting, Value: c.Value, Reason: c.Reason}
	}
	return out
}
