package session

import (
	"context"
	"crypto/rand"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"slices"
	"time"

	"sluice/internal/wire"
	"sluice/kernels"
	"sluice/kernels/bound"
	"sluice/kernels/diag"
)

// Session is one validated session, ready to Run once.
type Session struct {
	id     string
	spec   Spec
	lim    Limits
	entry  *kernelEntry // the kernel's registry entry
	kernel kernels.Kernel
	phases []Phase // run in order before sampling
	tune   *tuner  // the metric and the automatic settings (adapt.go, tune.go)
	phase  int     // index of the running phase; len(phases) once sampling

	msgBytes    int64 // negotiated message limit
	rowsPerPart int   // most rows per Points frame of the current request
	answer      *kernels.Answer
	pool        *pool // the evaluators and the current request's parts (pool.go)

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
	noise      noiseMeter
	epsSteps   int      // steps at which the bound meets Wants.Eps; −1 if never or not asked
	log        *DrawLog // nil when followers are not served
	draws      Draws    // reused frame
	points     Points   // reused frame
	stepMean   []float64
	stepM2     []float64
	drawChains []int
	drawIters  []int64
	persist    persist   // checkpoints (checkpoint.go)
	budget     Budget    // the most memory the session may need
	pointRow   []int     // per chain: the row of the last request holding its draw, or −1
	refValues  []float64 // the draws not sent by reference
	srcs       []drawSource
	carry      carrier // a burst of frames held to carry draws in a Points frame (carry.go)
	// ownerBase is the run's send; ownerOut is where the owner's Points
	// frames go (ownerBase, or a held burst's send while assign issues a
	// request).
	ownerBase, ownerOut func(Frame) error
	trimmed             Draws // a resumed client's first draws, less those it has (skipSent)

	// The verdict's state, in plain fields: the divergence watch, the
	// step at which the figures are next judged (stepped), and the
	// gradient check phase (nil when none runs).
	div       *divergence
	judgeNext int
	steinNext int
	judgedAt  int // the step of the latest judgement
	// judgedTime is when the latest judgement started (or the sampling,
	// before the first); zero until then.
	judgedTime time.Time
	// judgeClock reads the wall time the judgement cadence counts
	// (paidFor); nil reads time.Now. Tests that count a step's
	// allocations freeze it, so that a slow machine does not start a
	// judgement inside a measured step.
	judgeClock func() time.Time
	gradCheck  *gradientCheckPhase
	// mode is the mode search that starts a TV guarantee's chains
	// (modesearch.go); nil when none runs.
	mode *modeSearchPhase
	grp  groups // pipelined chain groups (groups.go)
}

// Result is what Run reports when it returns.
type Result struct {
	Finished Finished
	// Kernel is the kernel after the last completed step.
	Kernel kernels.Kernel
}

// New validates spec against the server's limits and builds the session:
// validation, seeding, planning, construction, sizing. Errors are *Error
// values naming the offending field.
func New(id string, spec Spec, lim Limits) (*Session, error) {
	lim = lim.withDefaults()
	orig := spec
	entry, err := spec.validate(lim)
	if err != nil {
		return nil, err
	}
	spec.seed()
	orig.Seed = spec.Seed
	tn, err := newTuner(&spec, entry)
	if err != nil {
		return nil, err
	}
	var declared *settings
	if tn.auto && spec.Curvature != nil {
		// Declared m and M, read in the declared metric's units, choose
		// the first settings without a probe.
		c := spec.Curvature
		set, _ := choose(tn.rule, c.StrongConvexity, c.Smoothness/probeSafety, 0, 0, tn.tolerance(),
			settings{friction: spec.Friction, inverseMass: spec.InverseMass})
		spec.Step, declared = set.step, &set
	}
	g, err := newGuarantee(&spec, entry)
	if err != nil {
		return nil, err
	}
	budget := budgetOf(&spec, entry, lim)
	if err := checkBudget(budget, lim); err != nil {
		return nil, err
	}
	s := &Session{id: id, spec: spec, lim: lim, entry: entry, guarantee: g, epsSteps: -1, budget: budget, tune: tn,
		msgBytes: negotiate(lim.MaxMessageBytes, spec.MaxMessageBytes), pool: newPool(lim.Pool)}
	if g != nil && spec.Wants.Eps > 0 {
		s.epsSteps = g.stepsTo(spec.Wants.Eps, 0)
	}
	s.persist.orig = orig
	build := s.spec
	if build.Step == 0 && tn.auto {
		build.Step = 1 // a placeholder: the probe's choice replaces it before the first step
	}
	s.kernel = entry.buildKernel(&build)
	if tn.metric != nil {
		s.kernel.(kernels.MetricUser).SetMetric(tn.metric)
	}
	if declared != nil {
		c := spec.Curvature
		tn.apply(s.kernel, &s.spec, c.StrongConvexity, c.Smoothness/probeSafety, "declared curvature")
	}
	s.div = newDivergence(&s.spec)
	if err := s.size(); err != nil {
		return nil, err
	}
	s.alloc()
	return s, nil
}

// seed draws a seed when the client left it to the server.
func (s *Spec) seed() {
	if s.Seed == 0 {
		var b [8]byte
		_, _ = rand.Read(b[:])
		s.Seed = binary.LittleEndian.Uint64(b[:]) | 1
	}
}

// negotiate returns the message limit of a session: the smaller of the
// server's and the client's, where a client that names none gets the
// default.
func negotiate(server, client int64) int64 {
	switch {
	case client == 0 && server > defaultMessageBytes:
		return defaultMessageBytes
	case client > 0 && client < server:
		return client
	}
	return server
}

// shapes lists every kind of request the session may send: its phases'
// and its kernel's.
func (s *Session) shapes() []requestShape {
	out := s.entry.requests
	if s.spec.CurvatureProbe > 0 {
		out = append(slices.Clip(probeShapes), out...)
	}
	if gradientCheckPoints(&s.spec, s.entry) > 0 {
		out = append(slices.Clip(out), gradCheckShape)
	}
	if wantsModeSearch(s.guarantee) {
		out = append(slices.Clip(out), modeSearchShapes...)
	}
	return out
}

// size checks that one row of every kind of request the session may send
// fits a message with its answer.
func (s *Session) size() error {
	for _, r := range s.shapes() {
		if s.partRows(r.need) < 1 {
			return &Error{Kind: TooLarge, Field: "register.dim", Chain: -1, Coord: -1,
				Reason: fmt.Sprintf("one point of dimension %d with its answer (%d bytes for kernel %s) does not fit the message limit of %d bytes",
					s.spec.Dim, s.rowBytes(r.need), s.spec.Kernel, s.msgBytes)}
		}
	}
	return nil
}

// alloc makes the session's buffers.
func (s *Session) alloc() {
	spec := s.spec
	if rows := followCap(s.lim.FollowBuffer, spec.Dim); rows > 0 {
		s.log = NewDrawLog(spec.Dim, rows)
		s.log.head = s.header()
	}
	s.mon = newMonitor(spec.Dim, spec.Chains, spec.Names)
	s.mon.stochastic = spec.Noise.Stochastic
	s.mon.share = s.lim.DiagnosticsShare
	s.mon.metric = s.declaredMetric()
	s.answer = kernels.NewAnswer(spec.Chains, spec.Dim)
	s.mean = make([]float64, spec.Dim)
	s.m2 = make([]float64, spec.Dim)
}

// MessageLimit is the negotiated message size limit in bytes: the
// smaller of the server's and the client's.
func (s *Session) MessageLimit() int64 { return s.msgBytes }

// DrawLog is the log followers read the session's draws from; nil when
// Limits.FollowBuffer is 0.
func (s *Session) DrawLog() *DrawLog { return s.log }

// Budget is the most memory the session may need, as registration
// computed it.
func (s *Session) Budget() Budget { return s.budget }

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
// first), ErrClientGone when the stream ended early, ErrSilent (wrapping
// the Timeout *Error) when the client of a checkpointed session stopped
// answering and the session was suspended, ErrSuspended when a shutdown
// suspended it, or the error of a failed send.
func (s *Session) Run(ctx context.Context, in <-chan Message, send func(Frame) error) (Result, error) {
	r := s.begin(ctx, in, send)
	defer r.stop()
	defer s.pool.close()
	return s.end(r, s.loop(r))
}

// loop is the session's life: registration, then requests until one of
// the parts decides the session ends.
func (s *Session) loop(r *run) outcome {
	if err := r.send(&Registered{SessionID: s.id, Seed: s.spec.Seed, Kernel: s.spec.Kernel, Step: s.spec.Step,
		EvaluationsPerStep: s.kernel.EvaluationsPerStep(), MaxMessageBytes: s.msgBytes, Names: s.spec.Names,
		PlannedSteps: s.plannedSteps(), Token: s.persist.token, Resumed: s.persist.resumed,
		Metric: s.tune.report(), Tuning: s.tune.registered(&s.spec)}); err != nil {
		return broken(err)
	}
	if err := s.replay(r); err != nil {
		return broken(err)
	}
	if s.persist.final != nil {
		return outcome{final: s.persist.final}
	}
	if err := s.restorePhases(); err != nil {
		return broken(err)
	}
	for {
		if o, stop := s.checkpointDue(r); stop {
			return o
		}
		if o, stop := s.shouldStop(r); stop {
			return o
		}
		if n := s.groupsFor(); n > 1 {
			if o, stop := s.pipeline(r, n); stop {
				return o
			}
		}
		req := s.next()
		if o, stop := s.overBudget(req); stop {
			return o
		}
		if err := s.request(r, req); err != nil {
			if e, ok := err.(*Error); ok {
				return failed(e) // refused before anything was sent
			}
			return broken(err)
		}
		if o, stop := s.await(r, req); stop {
			return o
		}
		if err := s.complete(r, req); err != nil {
			return failed(err)
		}
	}
}

// run is the state of one call to Run.
type run struct {
	ctx     context.Context
	in      <-chan Message
	send    func(Frame) error
	maxTime time.Duration
	// deadline fires at maxTime (nil when there is none).
	deadline    <-chan time.Time
	timer       *time.Timer // the session's wall-time limit, nil when none
	answerTimer *time.Timer
	// pending is set when a completed step's draws and progress are still
	// to be sent: they go out right after the next Points frame, so their
	// transfer overlaps the client's evaluation instead of delaying it.
	pending bool
	// stepDone is set when the last request completed a kernel step (a
	// checkpoint may follow); suspend when the server asked the session
	// to stop at its next checkpoint.
	stepDone, suspend bool
	// hold is Session.hold, bound once: the send function of a burst of
	// frames held to carry draws in a Points frame (carry.go).
	hold func(Frame) error
}

// outcome is how a session ends.
type outcome struct {
	reason Reason
	msg    string
	// err is nil for an ending the protocol foresees; otherwise what Run
	// returns.
	err error
	// quiet is set when the stream is gone or broken: nothing more is
	// sent.
	quiet bool
	// final is the Finished frame of a restored finished session, sent
	// again as it was.
	final *Finished
}

// failed is the outcome of a client's bad data or silence: a Finished
// frame with reason Failed is attempted, and e returned.
func failed(e *Error) outcome { return outcome{reason: Failed, msg: e.Error(), err: e} }

// broken is the outcome of a failed send: nothing more is sent.
func broken(err error) outcome {
	return outcome{reason: Failed, msg: err.Error(), err: err, quiet: true}
}

func (s *Session) begin(ctx context.Context, in <-chan Message, send func(Frame) error) *run {
	s.start = time.Now()
	s.lastProgress = s.start
	s.judgedTime = s.judgeNow()
	var before time.Duration // wall time spent before a restore
	if st := s.persist.restored; st != nil {
		before = st.Elapsed
		s.start = s.start.Add(-before)
		s.lastProgress = s.start.Add(st.LastProgress)
	}
	s.persist.lastSave = time.Now()
	s.ownerBase, s.ownerOut = send, send
	r := &run{ctx: ctx, in: in, send: send, maxTime: s.maxTime(), answerTimer: time.NewTimer(s.lim.AnswerTimeout), hold: s.hold}
	if r.maxTime > 0 {
		r.timer = time.NewTimer(max(0, r.maxTime-before))
		r.deadline = r.timer.C
	}
	s.phases = s.phases[:0]
	if n := gradientCheckPoints(&s.spec, s.entry); n > 0 {
		s.gradCheck = newGradientCheck(&s.spec, n)
		s.phases = append(s.phases, s.gradCheck)
	}
	if s.spec.CurvatureProbe > 0 {
		s.phases = append(s.phases, newCurvatureProbe(s.kernel.Positions(), s.spec.Dim, s.spec.CurvatureProbe))
	}
	if wantsModeSearch(s.guarantee) {
		s.mode = newModeSearch(&s.spec, s.guarantee, s.spec.Start, s.tune.declare)
		s.phases = append(s.phases, s.mode)
	}
	if s.tune.auto && s.spec.Curvature == nil && s.kernel.Steps() == 0 {
		s.phases = append(s.phases, s.tune.probe(s.kernel, &s.spec, s.kernel.Positions()[:s.spec.Dim]))
	}
	s.phase = 0
	return r
}

func (r *run) stop() {
	r.answerTimer.Stop()
	if r.timer != nil {
		r.timer.Stop()
	}
}

// end is Run's one exit: it sends what is pending and the Finished frame
// (unless the stream is gone) and reports.
func (s *Session) end(r *run, o outcome) (Result, error) {
	if o.final != nil { // a restored finished session: its frame again
		if s.log != nil {
			s.log.close(*o.final)
		}
		return Result{Finished: *o.final, Kernel: s.kernel}, r.send(o.final)
	}
	if o.quiet && s.checkpointing() {
		// Gone or suspended, not finished: the session lives on in its
		// checkpoint, and followers wait for it to be resumed.
		if s.log != nil {
			s.log.suspend()
		}
		p := s.progress(time.Now(), false)
		return Result{Finished: Finished{Reason: o.reason, Message: o.msg, Progress: p}, Kernel: s.kernel}, o.err
	}
	s.carry.on = false // a burst cut short by an error: what is pending goes out below
	if !o.quiet {
		if err := s.flush(r, nil); err != nil {
			o = broken(err)
		}
	}
	res := s.result(o.reason, o.msg)
	if o.quiet {
		return res, o.err
	}
	if s.checkpointing() {
		s.save(&res.Finished)
	}
	if err := r.send(&res.Finished); err != nil && o.err == nil {
		return res, err // a failed session reports its own error, not the send's
	}
	return res, o.err
}

// flush sends the draws and progress of the last completed step, if they
// are still pending. srcs are the requests whose Points frames the client
// holds, each for a range of chains, or nil: draws equal to their points
// may be sent by reference.
func (s *Session) flush(r *run, srcs []drawSource) error {
	return s.flushTo(r, r.send, srcs)
}

// flushTo is flush sending through send.
func (s *Session) flushTo(r *run, send func(Frame) error, srcs []drawSource) error {
	if !r.pending {
		return nil
	}
	r.pending = false
	return s.afterStep(send, srcs)
}

// drawSource is a request whose points the client holds, for the draws of
// chains [lo, hi): the current request, or a chain group's latest.
type drawSource struct {
	lo, hi int
	id     uint64
	req    *kernels.Request // nil: the client holds none for these chains
}

// sentSource is the one source of a session stepping every chain in one
// request: req, just sent (nil: none).
func (s *Session) sentSource(req *kernels.Request) []drawSource {
	if req == nil {
		return nil
	}
	s.srcs = append(s.srcs[:0], drawSource{lo: 0, hi: s.spec.Chains, id: s.requestID, req: req})
	return s.srcs
}

// maxTime is the session's wall-time limit: the smaller of the client's
// and the server's; 0 when neither set one.
func (s *Session) maxTime() time.Duration {
	t := s.spec.MaxTime
	if s.lim.MaxTime > 0 && (t == 0 || s.lim.MaxTime < t) {
		t = s.lim.MaxTime
	}
	return t
}

// shouldStop decides, between requests, whether the session is over.
func (s *Session) shouldStop(r *run) (outcome, bool) {
	switch {
	case r.maxTime > 0 && time.Since(s.start) >= r.maxTime:
		return outcome{reason: TimeSpent}, true
	case s.spec.DrawsPerChain > 0 && s.kept >= s.spec.DrawsPerChain:
		return outcome{reason: DrawsCollected}, true
	case s.targetsMet():
		return outcome{reason: TargetMet}, true
	}
	return outcome{}, false
}

// overBudget decides whether req would overshoot the evaluation budget.
func (s *Session) overBudget(req *kernels.Request) (outcome, bool) {
	m, c := s.spec.MaxEvaluations, s.cost(req.Need, req.Rows)
	if m > 0 && s.used+c > m {
		return outcome{reason: BudgetSpent, msg: fmt.Sprintf("the next request needs %d evaluations, %d left", c, m-s.used)}, true
	}
	return outcome{}, false
}

// next is the request of the running phase, or of the kernel once every
// phase is complete.
func (s *Session) next() *kernels.Request {
	if s.phase < len(s.phases) {
		return s.phases[s.phase].Next()
	}
	return s.kernel.Next()
}

// request sends req, then what the last step left pending, and lets the
// kernel work while the client evaluates.
func (s *Session) request(r *run, req *kernels.Request) error {
	s.requestID++
	if s.phase == len(s.phases) {
		s.grp.timeSent(time.Now())
	}
	send := r.send
	if s.carrying(r) {
		send = r.hold // the step's draws may ride in the last Points frame (carry.go)
	}
	if err := s.sendPoints(req, send); err != nil {
		return err
	}
	if err := s.flushTo(r, send, s.sentSource(req)); err != nil {
		return err
	}
	if s.carry.on {
		if err := s.release(r.send); err != nil {
			return err
		}
	}
	if prep, ok := s.kernel.(kernels.Preparer); ok && s.phase == len(s.phases) {
		prep.Prepare()
	}
	r.answerTimer.Reset(s.lim.AnswerTimeout)
	return nil
}

// await collects every part of the answer to req; it reports an outcome
// when the session ends while waiting.
func (s *Session) await(r *run, req *kernels.Request) (outcome, bool) {
	for s.pool.unanswered > 0 {
		var msg Message
		select {
		case ev := <-s.pool.events:
			if err := s.poolEvent(req, ev); err != nil {
				return s.poolFailure(err), true
			}
			continue
		case <-s.pool.timer.C:
			if err := s.overdue(req, time.Now()); err != nil {
				return s.poolFailure(err), true
			}
			continue
		case <-r.ctx.Done():
			return outcome{reason: Failed, msg: ErrClientGone.Error(), err: ErrClientGone, quiet: true}, true
		case <-r.deadline:
			return outcome{reason: TimeSpent}, true
		case <-r.answerTimer.C:
			return s.silent(), true
		case msg = <-r.in:
		}
		switch {
		case msg.Err != nil:
			if e, ok := AsError(msg.Err); ok {
				return failed(e), true
			}
			if errors.Is(msg.Err, io.EOF) {
				return outcome{reason: Failed, msg: "client closed the stream", err: ErrClientGone, quiet: true}, true
			}
			return outcome{reason: Failed, msg: msg.Err.Error(), err: fmt.Errorf("%w: %v", ErrClientGone, msg.Err), quiet: true}, true
		case msg.Stop && msg.Shutdown && s.checkpointing():
			// Stop at the next checkpoint instead: finish this request.
			r.suspend = true
			continue
		case msg.Stop && msg.Shutdown:
			return outcome{reason: Shutdown, msg: msg.StopReason}, true
		case msg.Stop:
			return outcome{reason: Stopped, msg: msg.StopReason}, true
		case msg.Evaluations == nil:
			return failed(BadField("frame", "expected evaluations or stop")), true
		}
		if s.abandonedAnswer(msg.Evaluations) {
			continue // a pipelined request the session no longer waits for
		}
		if err := s.ownerAnswer(req, msg.Evaluations); err != nil {
			return s.poolFailure(err), true
		}
	}
	return outcome{}, false
}

// complete accounts for the answered request and hands the answer to the
// running phase or the kernel; a completed step's draws become pending.
func (s *Session) complete(r *run, req *kernels.Request) *Error {
	s.used += s.cost(req.Need, req.Rows)
	s.noise.request(req, s.spec.Noise)
	s.guarantee.penalise(req, s.answer, s.spec.Dim)
	s.mon.answered(req, s.answer)
	if s.phase < len(s.phases) {
		ph := s.phases[s.phase]
		if ph.Tell(s.answer) {
			s.phase++
		}
		if f, ok := ph.(interface{ Fault() *Error }); ok && f.Fault() != nil {
			return f.Fault()
		}
		if ph == Phase(s.mode) && s.mode.done {
			s.startAtMode()
		}
		return nil
	}
	s.grp.timeAnswered(time.Now())
	if s.kernel.Steps() == 0 {
		s.certifyStart(req)
	}
	done := s.kernel.Tell(s.answer)
	if done && s.div.observe(s.kernel.Positions(), s.kernel.Steps()) {
		return s.divergedError(s.kernel.Steps())
	}
	if done && int64(s.kernel.Steps()) <= s.spec.BurnIn {
		if ph := s.tune.afterStep(s.kernel, &s.spec); ph != nil {
			s.phases = append(s.phases, ph)
		}
	}
	if f, ok := s.kernel.(kernels.Faulter); ok {
		if err := f.Fault(); err != nil {
			field := s.entry.faultField
			if field == "" {
				field = "register.kernel"
			}
			return BadField(field, "a declared assumption does not hold: %v", err)
		}
	}
	r.stepDone = done
	if done {
		r.pending = true
		if s.keeps(int64(s.kernel.Steps())) {
			s.kept++
			s.mon.kept(s.kernel)
		}
		s.stepped()
	}
	return nil
}

// stepped runs, after every completed step, everything that changes the
// sampling or decides when it ends: the gradient-noise estimate, the
// guaranteed bound and the re-plan of the step, and, on a step-count
// cadence, the measured figures the targets and the verdict rest on.
// Nothing here reads the clock, so a slow client and a fast one with the
// same seed and answers get the same draws. The cadence (judgeCadence):
// every step (every ProgressEverySteps steps when set), judged at once,
// while Limits.DiagnosticsShare is negative (tests); else pipelined
// (judge.go: judged in the background on snapshots, applied at the next
// cadence point), after 20 steps, then whenever the steps have grown by a
// tenth when a target rests on the figures, by half otherwise, and then,
// with no target, once the steps since the latest judgement have paid for
// the next, by the cost model or by wall time (paidFor).
func (s *Session) stepped() {
	k := s.kernel.Steps()
	if s.spec.Noise.Stochastic {
		s.updateNoise(s.noise.estimate(s.spec.Noise))
	}
	if k < s.judgeNext {
		return
	}
	stein := k >= s.steinNext
	if s.lim.DiagnosticsShare < 0 {
		s.mon.judge(s.spec.Seed, k, stein, steinReplicates)
	} else {
		var ok bool
		if stein, ok = s.paidFor(k, stein); !ok {
			return // not yet: asked again after the next step
		}
		s.mon.start(s.spec.Seed, k, stein)
	}
	s.judgedAt, s.judgedTime = k, s.judgeNow()
	s.judgeNext, s.steinNext = s.judgeCadence(k, stein)
}

// keeps reports whether the draws after step are kept (burn-in, then
// every KeepEvery-th step).
func (s *Session) keeps(step int64) bool {
	return step > s.spec.BurnIn && (step-s.spec.BurnIn)%s.spec.KeepEvery == 0
}

// rowBytes bounds the bytes one row of a request needing need costs in
// the larger of a Points frame and its answer.
func (s *Session) rowBytes(need kernels.Need) int64 {
	return rowBytes(need, s.spec.Dim, s.replicates(need))
}

// rowBytes bounds the bytes one row costs in the larger of a Points frame
// and its answer, with reps gradient replicates.
func rowBytes(need kernels.Need, dim, reps int) int64 {
	return wire.RowBytes(rowValues(need, dim, reps))
}

// rowValues is the float64 values one row carries in the larger of a
// Points frame (the point, and its vector for Hessian-vector products)
// and its answer (reps gradients, a log density, a Hessian, a product).
func rowValues(need kernels.Need, dim, reps int) int {
	out, back := dim, dim*reps+1
	if need.Has(kernels.NeedHessian) {
		back += dim * dim
	}
	if need.Has(kernels.NeedHessianVector) {
		out += dim
		back += dim
	}
	return max(out, back)
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
	return wire.RowsPerMessage(s.msgBytes, rowValues(need, s.spec.Dim, s.replicates(need)))
}

func (s *Session) sendPoints(req *kernels.Request, send func(Frame) error) error {
	s.rowsPerPart = s.partRows(req.Need)
	if s.rowsPerPart < 1 {
		// Registration sized every request the registry declares, so this
		// is a request the registry left out; the client can still get
		// past it with a larger limit.
		return &Error{Kind: TooLarge, Field: "register.max_message_bytes", Chain: -1, Coord: -1,
			Reason: fmt.Sprintf("one row of this request (%d bytes) does not fit the session's message limit of %d bytes", s.rowBytes(req.Need), s.msgBytes)}
	}
	s.answer.Reserve(req.Need, req.Rows, s.spec.Dim)
	return s.assign(req, send)
}

// pointsFrame is the Points frame of rows [lo, hi) of req, request id.
func (s *Session) pointsFrame(req *kernels.Request, id uint64, lo, hi int) *Points {
	dim := s.spec.Dim
	f := &s.points // reused: a frame is valid only during its send (or encoding) call
	*f = Points{RequestID: id, FirstRow: lo, Rows: hi - lo, TotalRows: req.Rows, Dim: dim,
		Points: req.Points[lo*dim : hi*dim], Chains: req.Chain[lo:hi], Need: req.Need}
	if req.Need.Has(kernels.NeedHessianVector) {
		f.Vectors = req.Vectors[lo*dim : hi*dim]
	}
	if req.Group != nil {
		f.Groups = req.Group[lo:hi]
	}
	f.FullData = req.Need.Has(kernels.NeedFullData)
	f.Replicates = s.replicates(req.Need)
	return f
}

// accept validates the answer to part k of the current request (the
// pool has matched it to the part) and copies it into s.answer.
func (s *Session) accept(req *kernels.Request, ev *Evaluations, k int) *Error {
	pt := s.pool.parts[k]
	return s.acceptRows(req, s.answer, ev, pt.hi-pt.lo)
}

// acceptRows validates ev, the answer to rows rows of req from row
// ev.FirstRow on, and copies it into ans.
func (s *Session) acceptRows(req *kernels.Request, ans *kernels.Answer, ev *Evaluations, rows int) *Error {
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
			// so a partial copy does not matter. v−v is 0 for a finite v
			// and NaN for ±Inf and NaN: one comparison per value.
			dst := ans.Grad[ev.FirstRow*dim : (ev.FirstRow+rows)*dim]
			for i, v := range ev.Grad {
				if v-v != 0 {
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
			s.noise.replicates(ans.Grad[ev.FirstRow*dim:(ev.FirstRow+rows)*dim], ev.Grad, rows, reps, dim)
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
		copy(ans.LogDensity[ev.FirstRow:], ev.LogDensity)
	} else if len(ev.LogDensity) != 0 {
		return BadField("evaluations.log_densities", "must be empty: log densities were not asked for")
	}
	if req.Need.Has(kernels.NeedHessian) {
		if err := checkHessians(ev.Hessian, rows, dim, req.Chain[ev.FirstRow:]); err != nil {
			return err
		}
		copy(ans.Hessian[ev.FirstRow*dim*dim:], ev.Hessian)
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
		copy(ans.HessVec[ev.FirstRow*dim:], ev.HessVec)
	} else if len(ev.HessVec) != 0 {
		return BadField("evaluations.hessian_vectors", "must be empty: Hessian-vector products were not asked for")
	}
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

// afterStep keeps draws and sends progress after a completed step; srcs
// is as for flush.
func (s *Session) afterStep(send func(Frame) error, srcs []drawSource) error {
	step := int64(s.kernel.Steps())
	if s.keeps(step) {
		if err := s.sendDraws(step, send, srcs); err != nil {
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
		if s.log != nil {
			if s.carry.on {
				s.carry.progress = &p // logged after the draws held with it (bookCarried)
			} else {
				s.log.progress(&p)
			}
		}
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

// sendDraws sends the draws of a kept step, by reference to the rows of
// the requests in srcs that hold them when the client accepts references:
// one run of frames per source, each source's frames referring to its
// request.
func (s *Session) sendDraws(step int64, send func(Frame) error, srcs []drawSource) error {
	x := s.kernel.Positions()
	dim, chains := s.spec.Dim, s.spec.Chains
	if s.carry.on {
		// The frames are held until the request's Points frames go out:
		// the bookkeeping waits for them (carry.go, bookCarried), so that
		// it overlaps the client's evaluation instead of delaying it.
		s.carry.book, s.carry.bookSeq, s.carry.x = true, s.seq, x
	} else {
		s.accumulate(x, dim, chains)
	}
	// No references while a resumed client has not caught up: those draws
	// may be trimmed (skipSent), and a resumed client holds no points.
	// Nor once workers share the rows: the owner's stream may not hold the
	// request's points.
	refs := s.spec.DrawReferences && len(srcs) > 0 && s.seq >= s.persist.nextSeq && !s.pool.everWorkers
	if refs {
		s.clearPointRows()
		refs = false
		for _, src := range srcs {
			if src.req != nil && s.matchPoints(src.req, x) {
				refs = true
			}
		}
	}
	if !refs {
		s.srcs = append(s.srcs[:0], drawSource{lo: 0, hi: chains})
		srcs = s.srcs
	}
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
	per := max(1, wire.RowsPerMessage(s.msgBytes, dim))
	for _, src := range srcs {
		for lo := src.lo; lo < src.hi; lo += per {
			hi := min(lo+per, src.hi)
			s.draws = Draws{Seq: s.seq, Rows: hi - lo, Dim: dim, Values: x[lo*dim : hi*dim],
				Chains: s.drawChains[lo:hi], Iterations: s.drawIters[lo:hi]}
			if s.log != nil && !s.carry.on {
				s.log.append(&s.draws) // full values
			}
			if refs && src.req != nil && s.anyPointRow(lo, hi) {
				s.refValues = s.refValues[:0]
				for c := lo; c < hi; c++ {
					if s.pointRow[c] < 0 {
						s.refValues = append(s.refValues, x[c*dim:(c+1)*dim]...)
					}
				}
				s.draws.Values, s.draws.FromRequestID, s.draws.PointRows = s.refValues, src.id, s.pointRow[lo:hi]
			}
			if d, ok := s.skipSent(&s.draws); ok {
				if err := send(d); err != nil {
					return err
				}
			}
			s.seq += uint64(hi - lo)
		}
	}
	return nil
}

// clearPointRows sizes s.pointRow to the chains and sets every entry to
// −1 (no row holds the chain's draw).
func (s *Session) clearPointRows() {
	chains := s.spec.Chains
	if cap(s.pointRow) < chains {
		s.pointRow = make([]int, chains)
	}
	s.pointRow = s.pointRow[:chains]
	for c := range s.pointRow {
		s.pointRow[c] = -1
	}
}

// anyPointRow reports whether a chain in [lo, hi) has a row holding its
// draw.
func (s *Session) anyPointRow(lo, hi int) bool {
	for _, r := range s.pointRow[lo:hi] {
		if r >= 0 {
			return true
		}
	}
	return false
}

// matchPoints finds, for each chain of req (a request the client holds),
// a row of req whose point is bit for bit the chain's position in x, and
// records it in s.pointRow (cleared by clearPointRows; −1 where none is);
// it reports whether any chain of req has one.
// Kernels whose requests ask at their positions (LMC, kinetic Langevin,
// SGLD) hand out the position slice itself, and such rows match without
// a comparison; any other row is compared value by value, which stops at
// the first difference, so a kernel asking elsewhere (MALA's proposals)
// pays little.
func (s *Session) matchPoints(req *kernels.Request, x []float64) bool {
	dim, chains := s.spec.Dim, s.spec.Chains
	found := false
	for r := range req.Rows {
		c := req.Chain[r]
		if c < 0 || c >= chains || s.pointRow[c] >= 0 {
			continue
		}
		p, q := req.Points[r*dim:(r+1)*dim], x[c*dim:(c+1)*dim]
		if &p[0] == &q[0] || sameBits(p, q) {
			s.pointRow[c] = r
			found = true
		}
	}
	return found
}

// sameBits reports whether a and b hold the same float64 bit patterns, so
// that a client rebuilding one from the other gets exactly the same values
// (−0 and 0 differ, as they do on the wire).
func sameBits(a, b []float64) bool {
	if len(a) != len(b) {
		return false
	}
	for i, v := range a {
		if math.Float64bits(v) != math.Float64bits(b[i]) {
			return false
		}
	}
	return true
}

// plannedSteps is Registered.PlannedSteps: the steps per chain the plan
// needs from the chains' actual start. For TV that is the mode search's
// N(x̂, M⁻¹I), which the plan accounts for (its shift term has a share of
// the target). For W2 without a declared start distance the start
// distance is certified from the start gradients, which come after
// Registered: until then the count is not known and is 0 (a resumed
// session's Registered carries it; Progress projects it all along).
func (s *Session) plannedSteps() int {
	if s.guarantee == nil || s.guarantee.startPending {
		return 0
	}
	return s.guarantee.planned
}

// startAtMode restarts the kernel, which has taken no step, from the
// starts the mode search drew: the kernel is built again as New built
// it (per-chain streams for the chainwise kernels), from those starts,
// with the same seed (its streams have drawn nothing yet), step and
// metric.
func (s *Session) startAtMode() {
	old := s.kernel
	b := s.spec
	b.Start, b.StartRows = s.mode.starts, s.spec.Chains
	if h := stepOf(old); h > 0 {
		b.Step = h
	}
	k := s.entry.buildKernel(&b)
	if s.tune.metric != nil {
		k.(kernels.MetricUser).SetMetric(s.tune.metric)
	}
	s.kernel = k
	// The divergence watch measures excursions from the new starts.
	s.div = newDivergence(&b)
	// The shift term is now the search's, at most its budget: the target
	// may be met sooner than planned.
	if s.spec.Wants.Eps > 0 {
		s.epsSteps = s.guarantee.stepsTo(s.spec.Wants.Eps, 0)
	}
}

// targetsMet reports whether every requested target holds. Targets on
// measured accuracy are judged at the last progress report.
func (s *Session) targetsMet() bool {
	w := s.spec.Wants
	if !w.any() {
		return false
	}
	if w.Eps > 0 && !s.epsMet() {
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
	if w.MaxKSD > 0 && !(s.mon.stein != nil && s.stein().Below(w.MaxKSD)) {
		return false
	}
	// Never "target met" while a check fails.
	return failing(s.verdict()) == ""
}

// epsMet reports whether the guaranteed bound at the current step count
// is within Wants.Eps: the bound is the one the report shows, computed
// with the noise level and step of the step path.
func (s *Session) epsMet() bool {
	if s.guarantee == nil || s.boundBroken() != "" {
		return false
	}
	b, err := s.guarantee.at(s.kernel.Steps())
	return err == nil && b.Total <= s.spec.Wants.Eps
}

// stein returns the last Stein assessment as a diag result, for Below.
func (s *Session) stein() diag.SteinResult {
	r := s.mon.stein
	return diag.SteinResult{N: r.Draws, U2: r.U2, SE: r.SE, KSD: r.KSD, Upper95: r.Upper95, PValue: r.PValue, State: r.State}
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
		t.Met = s.epsMet()
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
		// The figure judged against the target is the upper 95 % bound:
		// the target is met only when the discrepancy is below it with
		// 95 % confidence.
		t := TargetStatus{Name: "max_ksd", Want: w.MaxKSD, Current: -1, ProjectedEvaluations: -1}
		if s.mon.stein != nil {
			t.Current, t.Met = s.mon.stein.Upper95, s.stein().Below(w.MaxKSD)
		}
		out = append(out, t)
	}
	return out
}

// burnInCost is the evaluations the burn-in steps took (per-step cost
// times burn-in, capped at what was used).
func (s *Session) burnInCost() int64 {
	searched := int64(0)
	if s.mode != nil {
		searched = int64(s.mode.evaluated)
	}
	return min(s.used, s.spec.BurnIn*int64(s.kernel.EvaluationsPerStep())+s.tune.probeEvals+searched)
}

// estimatedBound is the W2 bound of a session whose kernel the bounds
// cover (kernelEntry.guaranteed) that declared no
// curvature, computed from the certificates as if they were m and M. The
// certificates are one-sided the wrong way for a guarantee (m ≤ the upper
// bound used, M ≥ the lower bound used), so the figure is optimistic:
// it is labelled "estimated, not guaranteed" (bound.Estimated).
func (s *Session) estimatedBound(c CurvatureEstimate) (bound.Bound, bool) {
	if !s.entry.guaranteed || s.spec.Curvature != nil || (c.Pairs < int64(2*s.spec.Dim) && c.ProbedSmoothness == 0) || c.NotConvex ||
		s.tune.metric != nil {
		return bound.Bound{}, false
	}
	if _, _, rhat := s.mon.worst(); s.mon.measured && !(rhat <= rhatFail) {
		// The chains disagree: a bound on one chain's law is no summary
		// of them.
		return bound.Bound{}, false
	}
	m, bigM := c.StrongConvexityAtMost, c.SmoothnessAtLeast
	if c.ProbedSmoothness > 0 {
		// A safety factor of 1.1 on the larger of the probe and the
		// certificates for M, the smaller of the two for m (derived here:
		// each is a one-sided estimate, so the safer one is taken).
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
	b, err := bound.W2Bound(set, stepOf(s.kernel), s.kernel.Steps())
	return b, err == nil
}

// accumulate folds one step's rows into the running per-coordinate mean
// and sum of squared deviations: the step's own mean and deviations
// first, then the pairwise update of Chan, Golub & LeVeque (1979), so the
// inner loops have no division. The chains are summed four at a time,
// each coordinate's sum still adding them one after another in chain
// order (a + b + c is (a + b) + c in Go), so the figures are those of one
// chain at a time, with a quarter of the loads and stores of the sums.
func (s *Session) accumulate(x []float64, dim, chains int) {
	if cap(s.stepMean) < dim {
		s.stepMean, s.stepM2 = make([]float64, dim), make([]float64, dim)
	}
	sm, s2 := s.stepMean[:dim], s.stepM2[:dim]
	clear(sm)
	clear(s2)
	c := 0
	for ; c+4 <= chains; c += 4 {
		r0, r1, r2, r3 := rows4(x, c, dim)
		for i, v := range r0 {
			sm[i] = sm[i] + v + r1[i] + r2[i] + r3[i]
		}
	}
	for ; c < chains; c++ {
		for i, v := range x[c*dim : (c+1)*dim] {
			sm[i] += v
		}
	}
	inv := 1 / float64(chains)
	for i := range sm {
		sm[i] *= inv
	}
	c = 0
	for ; c+4 <= chains; c += 4 {
		r0, r1, r2, r3 := rows4(x, c, dim)
		for i, v := range r0 {
			m := sm[i]
			d0, d1, d2, d3 := v-m, r1[i]-m, r2[i]-m, r3[i]-m
			s2[i] = s2[i] + d0*d0 + d1*d1 + d2*d2 + d3*d3
		}
	}
	for ; c < chains; c++ {
		for i, v := range x[c*dim : (c+1)*dim] {
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

// rows4 returns rows c to c+3 of x (rows of dim values), each of length
// dim.
func rows4(x []float64, c, dim int) (r0, r1, r2, r3 []float64) {
	r0 = x[c*dim : (c+1)*dim]
	return r0, x[(c+1)*dim : (c+2)*dim][:len(r0)], x[(c+2)*dim : (c+3)*dim][:len(r0)], x[(c+3)*dim : (c+4)*dim][:len(r0)]
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
	if maxTime := s.maxTime(); maxTime > 0 {
		p.TimeLeft = max(0, maxTime-elapsed)
	}
	if sec := elapsed.Seconds(); sec > 0 {
		p.EvaluationsPerSecond = float64(s.used) / sec
	}
	if final {
		s.mon.judge(s.spec.Seed, s.kernel.Steps(), true, steinFinalReplicates)
	}
	s.mon.report(&p)
	for _, ph := range s.phases {
		ph.Report(&p)
	}
	p.Kernel = kernelReport(s.kernel)
	p.Pool = s.poolReport()
	p.Metric = s.tune.report()
	p.Tuning = append([]Choice(nil), s.tune.choices...)
	p.TuningEvaluations = s.tune.probeEvals
	if s.spec.Noise.Stochastic {
		n := s.noise.estimate(s.spec.Noise)
		p.Noise = &n
	}
	if s.guarantee != nil {
		if b, err := s.guarantee.at(s.kernel.Steps()); err == nil {
			p.Bound = &b
			p.BoundLabel = b.Source.String()
			if s.tune.updates > 0 {
				// The declared curvature holds in the units the client
				// stated; the kernel now runs in an adapted metric.
				b.Source = bound.Estimated
				p.BoundLabel = b.Source.String() + "; the metric was adapted, and the declared curvature is in the units of the metric declared at registration"
			}
			if s.spec.Noise.Stochastic && s.spec.Noise.Variance == 0 && s.guarantee.setting.Noise > 0 {
				p.BoundLabel += "; gradient noise measured, not declared"
			}
		}
	} else if b, ok := s.estimatedBound(p.Curvature); ok {
		p.Bound = &b
		p.BoundLabel = b.Source.String()
	}
	p.Targets = s.targets(p.Bound)
	p.Checks = s.verdict()
	return p
}

func (s *Session) result(r Reason, msg string) Result {
	p := s.progress(time.Now(), true)
	p.State = Done
	if fail := failing(p.Checks); fail != "" {
		switch r {
		case DrawsCollected, TargetMet:
			msg = fmt.Sprintf("%s, but %s", r, fail)
			r = CheckFailed
		case Failed:
		default:
			if msg != "" {
				msg += "; "
			}
			msg += fail
		}
	}
	f := Finished{Reason: r, Message: msg, Progress: p, Parameters: make([]ParameterSummary, s.spec.Dim), Checks: p.Checks}
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
