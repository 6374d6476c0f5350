package session

import (
	"context"
	"crypto/rand"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"time"

	"sluice/kernels"
	"sluice/kernels/bound"
)

// Session is one validated session, ready to Run once.
type Session struct {
	id     string
	spec   Spec
	lim    Limits
	kernel kernels.Kernel

	msgBytes    int64 // negotiated message limit
	rowsPerPart int   // rows per Points frame of the current request
	answer      *kernels.Answer
	answered    []bool // per part of the current request

	start        time.Time
	requestID    uint64
	used         int64 // evaluated points
	seq          uint64
	kept         int64 // kept draws per chain
	lastProgress time.Time

	// Running mean and sum of squared deviations per coordinate over all
	// kept draws (Welford).
	count int64
	mean  []float64
	m2    []float64

	guarantee  *guarantee // nil when no bound applies
	mon        *monitor
	probe      *probing // the opt-in curvature probe, nil when not asked
	noise      noiseMeter
	epsSteps   int      // steps at which the bound meets Wants.Eps; −1 if never or not asked
	log        *DrawLog // nil when followers are not served
	draws      Draws    // reused frame
	stepMean   []float64
	stepM2     []float64
	drawChains []int
	drawIters  []int64
}

// Result is what Run reports when it returns.
type Result struct {
	Finished Finished
	// Kernel is the kernel after the last completed step.
	Kernel kernels.Kernel
}

// New validates spec against the server's limits and builds the session.
// Errors are *Error values naming the offending field.
func New(id string, spec Spec, lim Limits) (*Session, error) {
	lim = lim.withDefaults()
	if err := spec.validate(lim); err != nil {
		return nil, err
	}
	if spec.Seed == 0 {
		var b [8]byte
		_, _ = rand.Read(b[:])
		spec.Seed = binary.LittleEndian.Uint64(b[:]) | 1
	}
	g, err := newGuarantee(&spec)
	if err != nil {
		return nil, err
	}
	s := &Session{id: id, spec: spec, lim: lim, guarantee: g, epsSteps: -1}
	if g != nil && spec.Wants.Eps > 0 {
		s.epsSteps = g.stepsTo(spec.Wants.Eps, 0)
	}
	s.msgBytes = lim.MaxMessageBytes
	if c := spec.MaxMessageBytes; c == 0 && s.msgBytes > defaultMessageBytes {
		s.msgBytes = defaultMessageBytes
	} else if c > 0 && c < s.msgBytes {
		s.msgBytes = c
	}
	src := kernels.NewSource(spec.Seed)
	u := spec.InverseMass
	if u == 0 && spec.Curvature != nil {
		u = 1 / spec.Curvature.Smoothness
	}
	switch spec.Kernel {
	case "lmc":
		s.kernel = kernels.NewLMC(spec.Dim, spec.Chains, spec.Step, spec.Start, src)
	case "kinetic":
		s.kernel = kernels.NewKinetic(spec.Dim, spec.Chains, spec.Step, spec.Friction, u, spec.Start, nil, src)
	case "midpoint":
		s.kernel = kernels.NewMidpoint(spec.Dim, spec.Chains, spec.Step, u, spec.Start, nil, src)
	case "midpoint-overdamped":
		s.kernel = kernels.NewOverdampedMidpoint(spec.Dim, spec.Chains, spec.Step, spec.Start, src)
	case "mala":
		// Adaptation ends with burn-in, so no kept draw comes from it.
		s.kernel = kernels.NewMALA(spec.Dim, spec.Chains, spec.Step, int(min(spec.BurnIn, math.MaxInt32)), spec.Start, src)
	case "ozaki":
		s.kernel = kernels.NewOzaki(spec.Dim, spec.Chains, spec.Step, spec.Start, src)
	case "ozaki-krylov":
		tol, iters := spec.KrylovTolerance, spec.KrylovMaxIterations
		if tol == 0 {
			tol = 1e-8
		}
		if iters == 0 {
			iters = min(spec.Dim, 64)
		}
		s.kernel = kernels.NewOzakiKrylov(spec.Dim, spec.Chains, spec.Step, spec.Start, tol, iters, src)
	case "hit-and-run":
		s.kernel = kernels.NewHitAndRun(spec.Dim, spec.Chains, spec.Start,
			kernels.HitAndRunOptions{Width: spec.SliceWidth, MaxExpansions: spec.SliceMaxExpansions}, src)
	case "rejection":
		e := spec.Envelope
		s.kernel = kernels.NewRejection(spec.Dim, spec.Chains, e.Mean, e.Scale, e.LogBound, src)
	case "sgld":
		var sched kernels.SGLDSchedule
		if spec.Schedule != nil {
			sched = *spec.Schedule
		}
		s.kernel = kernels.NewSGLD(spec.Dim, spec.Chains, spec.Step, sched, spec.Start, src)
	case "sgld-cv":
		s.kernel = kernels.NewSGLDCV(spec.Dim, spec.Chains, spec.Step,
			kernels.SGLDCVOptions{Tol: spec.FixedPointTolerance, MaxIter: spec.FixedPointIterations}, spec.Start, src)
	case "svrg":
		every := spec.AnchorEvery
		if every == 0 {
			every = 10
		}
		s.kernel = kernels.NewSVRG(spec.Dim, spec.Chains, spec.Step, every, spec.Start, src)
	default:
		return nil, BadField("register.kernel", "unknown kernel %q", spec.Kernel)
	}
	if s.partRows(s.kernel.Next().Need) < 1 {
		return nil, &Error{Kind: TooLarge, Field: "register.dim", Chain: -1, Coord: -1,
			Reason: fmt.Sprintf("one point of dimension %d with its answer (%d bytes for kernel %s) does not fit the message limit of %d bytes",
				spec.Dim, rowBytes(s.kernel.Next().Need, spec.Dim, s.replicates(s.kernel.Next().Need)), spec.Kernel, s.msgBytes)}
	}
	if lim.FollowBuffer > 0 {
		s.log = NewDrawLog(spec.Dim, min(lim.FollowBuffer, max(1, maxFollowBytes/(8*spec.Dim))))
	}
	s.mon = newMonitor(spec.Dim, spec.Chains, spec.Names)
	s.mon.stochastic = spec.Noise.Stochastic
	s.mon.share = lim.DiagnosticsShare
	s.answer = kernels.NewAnswer(spec.Chains, spec.Dim)
	s.mean = make([]float64, spec.Dim)
	s.m2 = make([]float64, spec.Dim)
	return s, nil
}

// MessageLimit is the negotiated message size limit in bytes: the
// smaller of the server's and the client's.
func (s *Session) MessageLimit() int64 { return s.msgBytes }

// DrawLog is the log followers read the session's draws from; nil when
// Limits.FollowBuffer is 0.
func (s *Session) DrawLog() *DrawLog { return s.log }

// ID is the session's identifier.
func (s *Session) ID() string { return s.id }

// Spec is the validated spec, with defaults filled in (kernel, seed,
// names, keep_every).
func (s *Session) Spec() Spec { return s.spec }

// Run drives the session to its end. It reads the client's messages from
// in, and calls send for every frame, always from the calling goroutine.
// The reader feeding in must stop when ctx is done or when Run returns.
//
// Run returns a nil error when the session finished for a reason the
// protocol foresees (budget, time, stop, draws collected): the Finished
// frame has then been sent. It returns an *Error when the client sent bad
// data or timed out (a Finished frame with reason Failed was attempted
// first), ErrClientGone when the stream ended early, or the error of a
// failed send.
func (s *Session) Run(ctx context.Context, in <-chan Message, send func(Frame) error) (Result, error) {
	s.start = time.Now()
	s.lastProgress = s.start
	maxTime := s.spec.MaxTime
	if s.lim.MaxTime > 0 && (maxTime == 0 || s.lim.MaxTime < maxTime) {
		maxTime = s.lim.MaxTime
	}
	var deadline <-chan time.Time
	if maxTime > 0 {
		t := time.NewTimer(maxTime)
		defer t.Stop()
		deadline = t.C
	}
	if err := send(&Registered{SessionID: s.id, Seed: s.spec.Seed, Kernel: s.spec.Kernel, Step: s.spec.Step,
		EvaluationsPerStep: s.kernel.EvaluationsPerStep(), MaxMessageBytes: s.msgBytes, Names: s.spec.Names,
		PlannedSteps: s.plannedSteps()}); err != nil {
		return s.result(Failed, err.Error()), err
	}
	answerTimer := time.NewTimer(s.lim.AnswerTimeout)
	defer answerTimer.Stop()
	if s.spec.CurvatureProbe > 0 {
		s.probe = newProbing(s.kernel, s.spec.CurvatureProbe)
		s.kernel = s.probe
	}
	// pending is set when a completed step's draws and progress are still
	// to be sent: they go out right after the next Points frame, so their
	// transfer overlaps the client's evaluation instead of delaying it.
	pending := false
	flush := func() error {
		if !pending {
			return nil
		}
		pending = false
		return s.afterStep(send)
	}
	end := func(r Reason, msg string) (Result, error) {
		if err := flush(); err != nil {
			return s.result(Failed, err.Error()), err
		}
		return s.finish(r, msg, send)
	}
	for {
		if maxTime > 0 && time.Since(s.start) >= maxTime {
			return end(TimeSpent, "")
		}
		if d := s.spec.DrawsPerChain; d > 0 && s.kept >= d {
			return end(DrawsCollected, "")
		}
		if s.targetsMet() {
			return end(TargetMet, "")
		}
		req := s.kernel.Next()
		if m := s.spec.MaxEvaluations; m > 0 && s.used+s.cost(req.Need, req.Rows) > m {
			return end(BudgetSpent, fmt.Sprintf("the next request needs %d evaluations, %d left", s.cost(req.Need, req.Rows), m-s.used))
		}
		s.requestID++
		if err := s.sendPoints(req, send); err != nil {
			return s.result(Failed, err.Error()), err
		}
		if err := flush(); err != nil {
			return s.result(Failed, err.Error()), err
		}
		if prep, ok := s.kernel.(kernels.Preparer); ok {
			prep.Prepare()
		}
		answerTimer.Reset(s.lim.AnswerTimeout)
		for left := s.parts(req.Rows); left > 0; {
			var msg Message
			select {
			case <-ctx.Done():
				return s.result(Failed, ErrClientGone.Error()), ErrClientGone
			case <-deadline:
				return s.finish(TimeSpent, "", send)
			case <-answerTimer.C:
				return s.fail(&Error{Kind: Timeout, Field: "evaluations", Chain: -1, Coord: -1,
					Reason: fmt.Sprintf("no answer to request %d within %v", s.requestID, s.lim.AnswerTimeout)}, send)
			case msg = <-in:
			}
			switch {
			case msg.Err != nil:
				if e, ok := AsError(msg.Err); ok {
					return s.fail(e, send)
				}
				if errors.Is(msg.Err, io.EOF) {
					return s.result(Failed, "client closed the stream"), ErrClientGone
				}
				return s.result(Failed, msg.Err.Error()), fmt.Errorf("%w: %v", ErrClientGone, msg.Err)
			case msg.Stop && msg.Shutdown:
				return s.finish(Shutdown, msg.StopReason, send)
			case msg.Stop:
				return s.finish(Stopped, msg.StopReason, send)
			case msg.Evaluations == nil:
				return s.fail(BadField("frame", "expected evaluations or stop"), send)
			}
			if err := s.accept(req, msg.Evaluations); err != nil {
				return s.fail(err, send)
			}
			left--
		}
		s.used += s.cost(req.Need, req.Rows)
		s.noise.request(req, s.spec.Noise)
		s.guarantee.penalise(req, s.answer, s.spec.Dim)
		s.mon.answered(req, s.answer)
		if s.probe != nil && s.kernel == kernels.Kernel(s.probe) {
			s.probe.Tell(s.answer)
			if s.probe.done {
				s.kernel = s.probe.inner
			}
			continue
		}
		done := s.kernel.Tell(s.answer)
		if done {
			if err := s.diverged(); err != nil {
				return s.fail(err, send)
			}
		}
		if r, ok := s.kernel.(*kernels.Rejection); ok && r.Violation() != nil {
			return s.fail(BadField("register.envelope.log_bound", "the declared envelope bound is violated: %v", r.Violation()), send)
		}
		if done {
			pending = true
			if s.keeps(int64(s.kernel.Steps())) {
				s.kept++
				s.mon.kept(s.kernel)
			}
		}
	}
}

// diverged reports a chain whose position stopped being finite: the step
// is too large for the target (LMC is stable only below 2/M, THEORY.md
// §11a), and going on would only send the client points it cannot
// evaluate.
func (s *Session) diverged() *Error {
	x, d := s.kernel.Positions(), s.spec.Dim
	for i, v := range x {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return badValue("register.step", i/d, i%d, "the chain diverged at step %d (position %v): the step %v is too large for this target",
				s.kernel.Steps(), v, s.spec.Step)
		}
	}
	return nil
}

// keeps reports whether the draws after step are kept (burn-in, then
// every KeepEvery-th step).
func (s *Session) keeps(step int64) bool {
	return step > s.spec.BurnIn && (step-s.spec.BurnIn)%s.spec.KeepEvery == 0
}

// rowBytes bounds the bytes one row costs in the larger of a Points frame
// and its answer: the values, plus a few bytes of varint chain index and
// framing.
func rowBytes(need kernels.Need, dim, reps int) int64 {
	out := int64(8 * dim) // the point
	back := int64(8 * (dim*reps + 1))
	if need.Has(kernels.NeedHessian) {
		back += int64(8 * dim * dim)
	}
	if need.Has(kernels.NeedHessianVector) {
		out += int64(8 * dim)
		back += int64(8 * dim)
	}
	return max(out, back) + 16
}

// replicates is the gradient replicates per row a request needing need
// gets back: the registered number, except for full-data requests.
func (s *Session) replicates(need kernels.Need) int {
	if need.Has(kernels.NeedFullData) || !s.spec.Noise.Stochastic {
		return 1
	}
	return s.spec.Noise.Replicates
}

// cost is the evaluations a request of rows rows costs: each replicate
// counts, and a full-data point counts N/n when both are declared.
func (s *Session) cost(need kernels.Need, rows int) int64 {
	n := s.spec.Noise
	if need.Has(kernels.NeedFullData) && n.Stochastic && n.DataSize > 0 && n.MinibatchSize > 0 {
		return int64(rows) * ((n.DataSize + n.MinibatchSize - 1) / n.MinibatchSize)
	}
	return int64(rows) * int64(s.replicates(need))
}

// partRows is how many rows fit one message for a request needing need.
func (s *Session) partRows(need kernels.Need) int {
	const overhead = 1024
	return int((s.msgBytes - overhead) / rowBytes(need, s.spec.Dim, s.replicates(need)))
}

// parts is the number of Points frames a request of rows rows takes.
func (s *Session) parts(rows int) int { return (rows + s.rowsPerPart - 1) / s.rowsPerPart }

func (s *Session) sendPoints(req *kernels.Request, send func(Frame) error) error {
	s.rowsPerPart = s.partRows(req.Need)
	if s.rowsPerPart < 1 {
		return &Error{Kind: Internal, Field: "points", Chain: -1, Coord: -1, Reason: "one row exceeds the message limit"}
	}
	n := s.parts(req.Rows)
	if cap(s.answered) < n {
		s.answered = make([]bool, n)
	}
	s.answered = s.answered[:n]
	clear(s.answered)
	s.answer.Reserve(req.Need, req.Rows, s.spec.Dim)
	dim := s.spec.Dim
	for p := range n {
		lo := p * s.rowsPerPart
		hi := min(lo+s.rowsPerPart, req.Rows)
		f := &Points{RequestID: s.requestID, FirstRow: lo, Rows: hi - lo, TotalRows: req.Rows, Dim: dim,
			Points: req.Points[lo*dim : hi*dim], Chains: req.Chain[lo:hi], Need: req.Need}
		if req.Need.Has(kernels.NeedHessianVector) {
			f.Vectors = req.Vectors[lo*dim : hi*dim]
		}
		if req.Group != nil {
			f.Groups = req.Group[lo:hi]
		}
		f.FullData = req.Need.Has(kernels.NeedFullData)
		f.Replicates = s.replicates(req.Need)
		if err := send(f); err != nil {
			return err
		}
	}
	return nil
}

// accept validates one answer part and copies it into s.answer.
func (s *Session) accept(req *kernels.Request, ev *Evaluations) *Error {
	if ev.RequestID != s.requestID {
		return BadField("evaluations.request_id", "answers request %d, but the current request is %d", ev.RequestID, s.requestID)
	}
	if ev.FirstRow < 0 || ev.FirstRow >= req.Rows || ev.FirstRow%s.rowsPerPart != 0 {
		return BadField("evaluations.first_row", "%d is not the first row of a part of request %d", ev.FirstRow, s.requestID)
	}
	part := ev.FirstRow / s.rowsPerPart
	if s.answered[part] {
		return BadField("evaluations.first_row", "part starting at row %d of request %d was already answered", ev.FirstRow, s.requestID)
	}
	rows := min(s.rowsPerPart, req.Rows-ev.FirstRow)
	if ev.Rows != rows {
		return BadField("evaluations.rows", "is %d, the part has %d rows", ev.Rows, rows)
	}
	dim := s.spec.Dim
	if ev.Dim != dim {
		return BadField("evaluations.dim", "is %d, the session's dimension is %d", ev.Dim, dim)
	}
	if req.Need.Has(kernels.NeedGradient) {
		reps := s.replicates(req.Need)
		if len(ev.Grad) != rows*reps*dim {
			return BadField("evaluations.gradients", "has %d values, want rows × replicates × dim = %d", len(ev.Grad), rows*reps*dim)
		}
		if reps == 1 {
			// Check and copy in one pass; on a bad value the session fails,
			// so a partial copy does not matter.
			dst := s.answer.Grad[ev.FirstRow*dim : (ev.FirstRow+rows)*dim]
			for i, v := range ev.Grad {
				if math.IsNaN(v) || math.IsInf(v, 0) {
					return badValue("evaluations.gradients", req.Chain[ev.FirstRow+i/dim], i%dim, "value %v is not finite", v)
				}
				dst[i] = v
			}
		} else {
			for i, v := range ev.Grad {
				if math.IsNaN(v) || math.IsInf(v, 0) {
					return badValue("evaluations.gradients", req.Chain[ev.FirstRow+i/(dim*reps)], i%dim, "value %v is not finite", v)
				}
			}
			s.noise.replicates(s.answer.Grad[ev.FirstRow*dim:(ev.FirstRow+rows)*dim], ev.Grad, rows, reps, dim)
		}
	} else if len(ev.Grad) != 0 {
		return BadField("evaluations.gradients", "must be empty: gradients were not asked for")
	}
	if req.Need.Has(kernels.NeedLogDensity) {
		if len(ev.LogDensity) != rows {
			return BadField("evaluations.log_densities", "has %d values, want rows = %d", len(ev.LogDensity), rows)
		}
		for i, v := range ev.LogDensity {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return badValue("evaluations.log_densities", req.Chain[ev.FirstRow+i], -1, "value %v is not finite", v)
			}
		}
		copy(s.answer.LogDensity[ev.FirstRow:], ev.LogDensity)
	} else if len(ev.LogDensity) != 0 {
		return BadField("evaluations.log_densities", "must be empty: log densities were not asked for")
	}
	if req.Need.Has(kernels.NeedHessian) {
		if err := checkHessians(ev.Hessian, rows, dim, req.Chain[ev.FirstRow:]); err != nil {
			return err
		}
		copy(s.answer.Hessian[ev.FirstRow*dim*dim:], ev.Hessian)
	} else if len(ev.Hessian) != 0 {
		return BadField("evaluations.hessians", "must be empty: Hessians were not asked for")
	}
	if req.Need.Has(kernels.NeedHessianVector) {
		if len(ev.HessVec) != rows*dim {
			return BadField("evaluations.hessian_vectors", "has %d values, want rows × dim = %d", len(ev.HessVec), rows*dim)
		}
		for i, v := range ev.HessVec {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				return badValue("evaluations.hessian_vectors", req.Chain[ev.FirstRow+i/dim], i%dim, "value %v is not finite", v)
			}
		}
		copy(s.answer.HessVec[ev.FirstRow*dim:], ev.HessVec)
	} else if len(ev.HessVec) != 0 {
		return BadField("evaluations.hessian_vectors", "must be empty: Hessian-vector products were not asked for")
	}
	s.answered[part] = true
	return nil
}

// checkHessians validates rows dim×dim blocks: the count, finiteness and
// symmetry up to rounding (|H_ij − H_ji| ≤ 1e-8·max(|H_ij|, |H_ji|, 1)).
func checkHessians(h []float64, rows, dim int, chains []int) *Error {
	if len(h) != rows*dim*dim {
		return BadField("evaluations.hessians", "has %d values, want rows × dim × dim = %d", len(h), rows*dim*dim)
	}
	for r := range rows {
		m := h[r*dim*dim : (r+1)*dim*dim]
		for i := range dim {
			for j := range dim {
				v := m[i*dim+j]
				if math.IsNaN(v) || math.IsInf(v, 0) {
					return badValue("evaluations.hessians", chains[r], i, "entry (%d, %d) is %v, not finite", i, j, v)
				}
				if j > i {
					w := m[j*dim+i]
					if math.Abs(v-w) > 1e-8*max(math.Abs(v), math.Abs(w), 1) {
						return badValue("evaluations.hessians", chains[r], i, "not symmetric: entry (%d, %d) is %v, entry (%d, %d) is %v", i, j, v, j, i, w)
					}
				}
			}
		}
	}
	return nil
}

// afterStep keeps draws and sends progress after a completed step.
func (s *Session) afterStep(send func(Frame) error) error {
	step := int64(s.kernel.Steps())
	if s.keeps(step) {
		if err := s.sendDraws(step, send); err != nil {
			return err
		}
	}
	now := time.Now()
	due := now.Sub(s.lastProgress) >= s.progressInterval()
	if e := s.spec.ProgressEverySteps; e > 0 {
		due = step%e == 0
	}
	if due {
		s.lastProgress = now
		p := s.progress(now, false)
		return send(&p)
	}
	return nil
}

func (s *Session) progressInterval() time.Duration {
	if s.spec.ProgressInterval > 0 {
		return s.spec.ProgressInterval
	}
	return s.lim.ProgressInterval
}

func (s *Session) sendDraws(step int64, send func(Frame) error) error {
	x := s.kernel.Positions()
	dim, chains := s.spec.Dim, s.spec.Chains
	s.accumulate(x, dim, chains)
	if s.drawChains == nil {
		s.drawChains = make([]int, chains)
		s.drawIters = make([]int64, chains)
		for c := range s.drawChains {
			s.drawChains[c] = c
		}
	}
	for c := range chains {
		s.drawIters[c] = step
	}
	// A draw row costs its values plus varint chain and iteration.
	per := max(1, int((s.msgBytes-1024)/int64(8*dim+24)))
	for lo := 0; lo < chains; lo += per {
		hi := min(lo+per, chains)
		s.draws = Draws{Seq: s.seq, Rows: hi - lo, Dim: dim, Values: x[lo*dim : hi*dim],
			Chains: s.drawChains[lo:hi], Iterations: s.drawIters[lo:hi]}
		if s.log != nil {
			s.log.append(&s.draws)
		}
		if err := send(&s.draws); err != nil {
			return err
		}
		s.seq += uint64(hi - lo)
	}
	return nil
}

func (s *Session) plannedSteps() int {
	if s.guarantee == nil {
		return 0
	}
	return s.guarantee.planned
}

// targetsMet reports whether every requested target holds. Targets on
// measured accuracy are judged at the last progress report.
func (s *Session) targetsMet() bool {
	w := s.spec.Wants
	if !w.any() {
		return false
	}
	if w.Eps > 0 && (s.epsSteps < 0 || s.kernel.Steps() < s.epsSteps) {
		return false
	}
	if w.MinBulkESS > 0 || w.MinTailESS > 0 || w.MaxRhat > 0 {
		if !s.mon.measured {
			return false
		}
		bulk, tail, rhat := s.mon.worst()
		if (w.MinBulkESS > 0 && !(bulk >= w.MinBulkESS)) || (w.MinTailESS > 0 && !(tail >= w.MinTailESS)) ||
			(w.MaxRhat > 0 && !(rhat <= w.MaxRhat)) {
			return false
		}
	}
	if w.MaxKSD > 0 && !(s.mon.lastKSD >= 0 && s.mon.lastKSD <= w.MaxKSD) {
		return false
	}
	return true
}

// targets reports each requested target at the current state.
func (s *Session) targets(b *bound.Bound) []TargetStatus {
	w := s.spec.Wants
	var out []TargetStatus
	if w.Eps > 0 {
		t := TargetStatus{Name: "eps", Want: w.Eps, Current: math.Inf(1), ProjectedEvaluations: -1}
		if b != nil {
			t.Current = b.Total
		}
		k := s.kernel.Steps()
		t.Met = s.epsSteps >= 0 && k >= s.epsSteps
		if s.epsSteps >= 0 {
			t.ProjectedEvaluations = int64(max(0, s.epsSteps-k)) * int64(s.kernel.EvaluationsPerStep())
		}
		out = append(out, t)
	}
	if !w.any() {
		return out
	}
	bulk, tail, rhat := s.mon.worst()
	// Effective sample sizes grow in proportion to the evaluations spent
	// after burn-in: project at that rate.
	since := s.used - s.burnInCost()
	grow := func(name string, want, cur float64) {
		t := TargetStatus{Name: name, Want: want, Current: cur, Met: cur >= want, ProjectedEvaluations: -1}
		if t.Met {
			t.ProjectedEvaluations = 0
		} else if cur > 0 && since > 0 && !math.IsInf(cur, 0) {
			t.ProjectedEvaluations = int64(math.Ceil((want/cur - 1) * float64(since)))
		}
		out = append(out, t)
	}
	if w.MinBulkESS > 0 {
		grow("min_bulk_ess", w.MinBulkESS, bulk)
	}
	if w.MinTailESS > 0 {
		grow("min_tail_ess", w.MinTailESS, tail)
	}
	if w.MaxRhat > 0 {
		out = append(out, TargetStatus{Name: "max_rhat", Want: w.MaxRhat, Current: rhat, Met: rhat <= w.MaxRhat, ProjectedEvaluations: -1})
	}
	if w.MaxKSD > 0 {
		k := s.mon.lastKSD
		out = append(out, TargetStatus{Name: "max_ksd", Want: w.MaxKSD, Current: k, Met: k >= 0 && k <= w.MaxKSD, ProjectedEvaluations: -1})
	}
	return out
}

// burnInCost is the evaluations the burn-in steps took (per-step cost
// times burn-in, capped at what was used).
func (s *Session) burnInCost() int64 {
	return min(s.used, s.spec.BurnIn*int64(s.kernel.EvaluationsPerStep()))
}

// estimatedBound is the W2 bound of an lmc session that declared no
// curvature, computed from the certificates as if they were m and M. The
// certificates are one-sided the wrong way for a guarantee (m ≤ the upper
// bound used, M ≥ the lower bound used), so the figure is optimistic:
// it is labelled "estimated, not guaranteed" (bound.Estimated).
func (s *Session) estimatedBound(c CurvatureEstimate) (bound.Bound, bool) {
	if s.spec.Kernel != "lmc" || s.spec.Curvature != nil || (c.Pairs < int64(2*s.spec.Dim) && c.ProbedSmoothness == 0) || c.NotConvex {
		return bound.Bound{}, false
	}
	m, bigM := c.StrongConvexityAtMost, c.SmoothnessAtLeast
	if c.ProbedSmoothness > 0 {
		// THEORY.md §12's recipe: a safety factor on the larger of the
		// probe and the certificates for M; the smaller for m.
		bigM = 1.1 * math.Max(bigM, c.ProbedSmoothness)
		if c.ProbedConvexity > 0 {
			m = math.Min(m, c.ProbedConvexity)
		}
	}
	if !(m > 0) || !(bigM >= m) || math.IsInf(bigM, 0) {
		return bound.Bound{}, false
	}
	set := bound.Setting{Convexity: m, Smoothness: bigM, Dim: s.spec.Dim, Source: bound.Estimated}
	if s.spec.Noise.Stochastic {
		if e := s.noise.estimate(s.spec.Noise); e.Variance > 0 {
			set.Noise = math.Sqrt(e.Variance / float64(s.spec.Noise.Replicates))
		}
		set.Bias = s.spec.Noise.Bias
	}
	b, err := bound.W2Bound(set, s.spec.Step, s.kernel.Steps())
	return b, err == nil
}

// accumulate folds one step's rows into the running per-coordinate mean
// and sum of squared deviations: the step's own mean and deviations
// first, then the pairwise update of Chan, Golub & LeVeque (1979), so the
// inner loops have no division.
func (s *Session) accumulate(x []float64, dim, chains int) {
	if cap(s.stepMean) < dim {
		s.stepMean, s.stepM2 = make([]float64, dim), make([]float64, dim)
	}
	sm, s2 := s.stepMean[:dim], s.stepM2[:dim]
	clear(sm)
	clear(s2)
	for c := range chains {
		row := x[c*dim : (c+1)*dim]
		for i, v := range row {
			sm[i] += v
		}
	}
	inv := 1 / float64(chains)
	for i := range sm {
		sm[i] *= inv
	}
	for c := range chains {
		row := x[c*dim : (c+1)*dim]
		for i, v := range row {
			d := v - sm[i]
			s2[i] += d * d
		}
	}
	na, nb := float64(s.count), float64(chains)
	n := na + nb
	wb, wab := nb/n, na*nb/n
	for i := range sm {
		d := sm[i] - s.mean[i]
		s.mean[i] += d * wb
		s.m2[i] += s2[i] + d*d*wab
	}
	s.count += int64(chains)
}

func (s *Session) progress(now time.Time, final bool) Progress {
	elapsed := now.Sub(s.start)
	p := Progress{State: Sampling, Steps: int64(s.kernel.Steps()), EvaluationsUsed: s.used,
		EvaluationsLeft: -1, Elapsed: elapsed, TimeLeft: -1, DrawsSent: int64(s.seq)}
	if int64(s.kernel.Steps()) < s.spec.BurnIn {
		p.State = BurnIn
	}
	if m := s.spec.MaxEvaluations; m > 0 {
		p.EvaluationsLeft = m - s.used
	}
	maxTime := s.spec.MaxTime
	if s.lim.MaxTime > 0 && (maxTime == 0 || s.lim.MaxTime < maxTime) {
		maxTime = s.lim.MaxTime
	}
	if maxTime > 0 {
		p.TimeLeft = max(0, maxTime-elapsed)
	}
	if sec := elapsed.Seconds(); sec > 0 {
		p.EvaluationsPerSecond = float64(s.used) / sec
	}
	s.mon.measure(&p, final)
	if s.probe != nil {
		p.Curvature.ProbedSmoothness, p.Curvature.ProbedConvexity = s.probe.bigM, s.probe.m
		p.Curvature.ProbeEvaluations = int64(s.probe.evaluations)
	}
	p.Kernel = kernelReport(s.kernel)
	if s.spec.Noise.Stochastic {
		n := s.noise.estimate(s.spec.Noise)
		p.Noise = &n
		s.updateNoise(n)
	}
	if s.guarantee != nil {
		if b, err := s.guarantee.at(s.kernel.Steps()); err == nil {
			p.Bound = &b
			p.BoundLabel = b.Source.String()
			if s.spec.Noise.Stochastic && s.spec.Noise.Variance == 0 && s.guarantee.setting.Noise > 0 {
				p.BoundLabel += "; gradient noise measured, not declared"
			}
		}
	} else if b, ok := s.estimatedBound(p.Curvature); ok {
		p.Bound = &b
		p.BoundLabel = b.Source.String()
	}
	p.Targets = s.targets(p.Bound)
	return p
}

func (s *Session) result(r Reason, msg string) Result {
	p := s.progress(time.Now(), true)
	p.State = Done
	f := Finished{Reason: r, Message: msg, Progress: p, Parameters: make([]ParameterSummary, s.spec.Dim)}
	for i := range f.Parameters {
		ps := ParameterSummary{Name: s.spec.Names[i], Count: s.count}
		if s.count > 0 {
			ps.Mean = s.mean[i]
		}
		if s.count > 1 {
			ps.SD = math.Sqrt(s.m2[i] / float64(s.count-1))
		}
		f.Parameters[i] = ps
	}
	if s.log != nil {
		s.log.close(f)
	}
	return Result{Finished: f, Kernel: s.kernel}
}

func (s *Session) finish(r Reason, msg string, send func(Frame) error) (Result, error) {
	res := s.result(r, msg)
	if err := send(&res.Finished); err != nil {
		return res, err
	}
	return res, nil
}

// fail sends a Finished frame with reason Failed (best effort: the stream
// may be gone) and returns the error.
func (s *Session) fail(e *Error, send func(Frame) error) (Result, error) {
	res := s.result(Failed, e.Error())
	_ = send(&res.Finished) // best effort; e is what the caller reports
	return res, e
}
