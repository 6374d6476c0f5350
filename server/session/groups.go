package session

import (
	"errors"
	"fmt"
	"io"
	"time"

	"sluice/kernels"
)

// Pipelined chain groups. Once burn-in and every phase are over, a session
// whose kernel pipelines (registry: one kernel per chain and one request
// per step) splits its chains into groups of consecutive chains that step
// on their own: each group has a request out at all times, so while the
// client evaluates one group's points the engine takes another group's
// answers, tells them to that group's kernels and sends its next points.
//
// The rule that keeps the draws those of stepping every chain together: a
// group's answer is told only when no other group has completed fewer
// steps (else it waits, answered, until they catch up). So when the last
// group completes step j every group is at step j exactly, and the engine
// does there what it does after a step of the whole batch: divergence,
// kept draws, diagnostics, progress, checkpoints and the decision to go
// on. A group may already have its points for step j + 1 out then; when
// the session ends at step j those requests are abandoned (their answers,
// should they still come, are dropped), never told. Each chain draws its
// noise from a stream of its own (kernels.ChainSource), and its kernel
// sees the same answers in the same order whatever the groups, so the
// draws are the same for any number of groups.
//
// Budget: the points of step j + 1 go out only when the whole step fits in
// the evaluation budget (what was told, plus every request out, plus the
// step) and the draws collected after step j do not already end the
// session; so no group asks for evaluations a single request would not.

// chainGroup is one group of consecutive chains stepped on its own.
type chainGroup struct {
	k      *kernels.Blocks
	lo, hi int
	req    *kernels.Request // the request out (nil: none)
	id     uint64           // its request id
	parts  []bool           // per part of the request: answered
	left   int              // parts not answered
	answer *kernels.Answer
	round  int // requests told, for the monitor's certificate cadence
}

// groups holds the pipelined state of a session.
type groups struct {
	g []chainGroup
	// open is the last step whose requests may go out.
	open int
	// leave is set when the session must step every chain together again
	// (a worker attached, or the automatic choice found lock step faster:
	// review): no step is opened any more.
	leave bool
	srcs  []drawSource
	// abandoned holds the ids of requests out when the pipeline ended;
	// their answers are dropped.
	abandoned []uint64
	// Timing of the requests of whole steps (lock-step), for the automatic
	// choice: the time from points sent to the last answer taken (the
	// client's evaluation and the transport), and from that answer to the
	// next points sent (the engine's own work).
	sentAt, answeredAt time.Time
	wait, work         time.Duration
	timed              int
	// Timing of whole steps in groups (from one step every chain has
	// completed to the next), for the automatic choice's second look:
	// lastStep is when the latest completed, stepped the time since the
	// first, steps how many; judged is set once the choice was reviewed.
	lastStep time.Time
	stepped  time.Duration
	steps    int
	judged   bool
}

// groupsFor is the number of groups the session steps its chains in from
// now on: more than 1 only when the kernel pipelines, burn-in and every
// phase are over, only the owner evaluates, and the spec asks for groups
// or leaves the choice to the engine.
func (s *Session) groupsFor() int {
	sp := &s.spec
	if !s.entry.pipelines || sp.Chains < 2 || s.phase < len(s.phases) || s.pool.everWorkers || sp.WorkersOnly ||
		sp.Noise.Stochastic || s.grp.leave {
		return 1
	}
	steps := int64(s.kernel.Steps())
	if steps < 1 || steps < sp.BurnIn {
		return 1
	}
	if sp.ChainGroups > 0 {
		return sp.ChainGroups
	}
	return s.grp.auto()
}

// autoGroupShare is the least share of a step's round trip the engine's
// own work must take for the automatic choice to pipeline: below it, the
// time pipelining could hide is smaller than what the extra messages cost.
const autoGroupShare = 0.05

// auto chooses the number of groups from the measured times: 1 until
// groupedReviewSteps lock-step steps were timed (the review compares the
// groups against them); then 2 when the engine's work between an answer
// and the next points is at least autoGroupShare of the time the client
// takes to answer (two groups hide the shorter of the two behind the
// longer; more only add messages), else 1.
func (g *groups) auto() int {
	if g.timed < groupedReviewSteps || float64(g.work) < autoGroupShare*float64(g.wait) {
		return 1
	}
	return 2
}

// groupedReviewSteps is how many whole steps in groups, and lock-step
// steps before them, the automatic choice times before it reviews itself;
// groupedSlower is how much slower a step in groups must be than one in
// lock step for the session to go back to lock step.
const (
	groupedReviewSteps = 16
	groupedSlower      = 1.1
)

// review is the automatic choice's second look, after groupedReviewSteps
// whole steps in groups: when a step in groups took groupedSlower times a
// lock-step one or more, pipelining does not pay here (the client's cost
// per request does not shrink with its rows, or client and server share
// the cores), and the session steps every chain together again. Groups
// never change the draws a chain gets, so this choice, unlike the
// sampling's decisions, may rest on wall time.
func (g *groups) review(now time.Time) (back bool) {
	if !g.lastStep.IsZero() {
		g.stepped += now.Sub(g.lastStep)
		g.steps++
	}
	g.lastStep = now
	if g.judged || g.steps < groupedReviewSteps || g.timed < groupedReviewSteps {
		return false
	}
	g.judged = true
	lock := float64(g.wait+g.work) / float64(g.timed)
	return float64(g.stepped)/float64(g.steps) >= groupedSlower*lock
}

// timeSent and timeAnswered measure the lock-step requests of kernel
// steps for the automatic choice.
func (g *groups) timeSent(now time.Time) {
	if !g.answeredAt.IsZero() {
		g.work += now.Sub(g.answeredAt)
		g.timed++
	}
	g.sentAt = now
}

func (g *groups) timeAnswered(now time.Time) {
	if !g.sentAt.IsZero() {
		g.wait += now.Sub(g.sentAt)
		g.answeredAt = now
	}
}

// pipeline steps the chains in n groups until the session ends (stop set)
// or it must step every chain together again (a worker attached, or the
// next step does not fit the budget: the lock-step loop then decides).
func (s *Session) pipeline(r *run, n int) (outcome, bool) {
	if o, stop, ok := s.startGroups(r, n); stop || !ok {
		return o, stop
	}
	for {
		o, stop, leave := s.groupEvent(r)
		if stop {
			s.abandon()
			return o, true
		}
		if leave {
			s.abandon()
			return outcome{}, false
		}
	}
}

// startGroups cuts the chains into n groups and sends each its first
// request; ok is false when the chains cannot be grouped or the next step
// does not fit the budget.
func (s *Session) startGroups(r *run, n int) (o outcome, stop, ok bool) {
	b, ok := kernels.BlocksOf(s.kernel)
	if !ok {
		return outcome{}, false, false // a kernel the registry does not batch
	}
	s.setGroups(b, n)
	s.grp.open = s.kernel.Steps()
	if !s.opens(s.grp.open+1, s.grp.g[0].k.Next().Need) {
		return outcome{}, false, false
	}
	s.ownerEvaluator()
	send := r.send
	if s.carrying(r) {
		send = r.hold // the step's draws may ride in the last Points frame (carry.go)
	}
	for i := range s.grp.g {
		if err := s.sendGroup(r, send, &s.grp.g[i]); err != nil {
			return s.groupFailure(err), true, false
		}
	}
	// The last lock-step step's draws, by reference to the groups' first
	// requests, which ask at its positions.
	if err := s.flushTo(r, send, s.groupSources()); err != nil {
		return broken(err), true, false
	}
	if s.carry.on {
		if err := s.release(r.send); err != nil {
			return broken(err), true, false
		}
	}
	return outcome{}, false, true
}

// setGroups cuts the chains into n groups of consecutive chains, the
// first chains%n one chain larger.
func (s *Session) setGroups(b *kernels.Blocks, n int) {
	chains, dim := s.spec.Chains, s.spec.Dim
	if len(s.grp.g) != n {
		s.grp.g = make([]chainGroup, n)
		lo := 0
		for i := range s.grp.g {
			hi := lo + chains/n
			if i < chains%n {
				hi++
			}
			s.grp.g[i] = chainGroup{k: b.Group(lo, hi), lo: lo, hi: hi, answer: kernels.NewAnswer(hi-lo, dim)}
			lo = hi
		}
	}
	for i := range s.grp.g {
		s.grp.g[i].req = nil
		s.grp.g[i].round = s.mon.requests
	}
}

// opens reports whether the requests of step j, needing need, may go
// out, deciding it the first time: the whole step must fit the budget, and
// the draws kept up to step j − 1 must not have ended the session.
func (s *Session) opens(j int, need kernels.Need) bool {
	if j <= s.grp.open {
		return true
	}
	if s.grp.leave || j > s.grp.open+1 {
		return false
	}
	if m := s.spec.MaxEvaluations; m > 0 {
		sum := s.used + s.cost(need, s.spec.Chains)
		for i := range s.grp.g {
			if g := &s.grp.g[i]; g.req != nil {
				sum += s.cost(g.req.Need, g.req.Rows)
			}
		}
		if sum > m {
			return false
		}
	}
	if d := s.spec.DrawsPerChain; d > 0 {
		kept := s.kept
		if prev := int64(j - 1); prev > int64(s.kernel.Steps()) && s.keeps(prev) {
			kept++ // step j − 1 will keep its draws
		}
		if kept >= d {
			return false
		}
	}
	s.grp.open = j
	return true
}

// sendGroup sends g's next request when its step is open, and lets its
// kernels prepare while the client evaluates.
func (s *Session) sendGroup(r *run, send func(Frame) error, g *chainGroup) error {
	if g.req != nil {
		return nil
	}
	req := g.k.Next()
	if !s.opens(g.k.Steps()+1, req.Need) {
		return nil
	}
	per := s.partRows(req.Need)
	if per < 1 {
		return &Error{Kind: TooLarge, Field: "register.max_message_bytes", Chain: -1, Coord: -1,
			Reason: fmt.Sprintf("one row of this request (%d bytes) does not fit the session's message limit of %d bytes", s.rowBytes(req.Need), s.msgBytes)}
	}
	s.requestID++
	g.req, g.id = req, s.requestID
	g.answer.Reserve(req.Need, req.Rows, s.spec.Dim)
	g.parts = g.parts[:0]
	for lo := 0; lo < req.Rows; lo += per {
		g.parts = append(g.parts, false)
		if err := send(s.pointsFrame(req, g.id, lo, min(lo+per, req.Rows))); err != nil {
			return err
		}
	}
	g.left = len(g.parts)
	g.k.Prepare()
	r.answerTimer.Reset(s.lim.AnswerTimeout)
	return nil
}

// groupEvent waits for one message and handles it: an answer completes a
// part of a group's request, and every group that may then be told is.
func (s *Session) groupEvent(r *run) (o outcome, stop, leave bool) {
	var msg Message
	select {
	case ev := <-s.pool.events:
		// No part is out to a worker: a join, a worker's end, or a late
		// answer to an earlier request.
		if err := s.poolEvent(nil, ev); err != nil {
			return s.poolFailure(err), true, false
		}
		if s.pool.everWorkers {
			s.grp.leave = true // the workers share the rows from the next step on
		}
		return s.advance(r)
	case <-r.ctx.Done():
		return outcome{reason: Failed, msg: ErrClientGone.Error(), err: ErrClientGone, quiet: true}, true, false
	case <-r.deadline:
		return outcome{reason: TimeSpent}, true, false
	case <-r.answerTimer.C:
		// As with one group: suspended when checkpointed, else failed.
		return s.silent(), true, false
	case msg = <-r.in:
	}
	switch {
	case msg.Err != nil:
		if e, ok := AsError(msg.Err); ok {
			return failed(e), true, false
		}
		if errors.Is(msg.Err, io.EOF) {
			return outcome{reason: Failed, msg: "client closed the stream", err: ErrClientGone, quiet: true}, true, false
		}
		return outcome{reason: Failed, msg: msg.Err.Error(), err: fmt.Errorf("%w: %v", ErrClientGone, msg.Err), quiet: true}, true, false
	case msg.Stop && msg.Shutdown && s.checkpointing():
		r.suspend = true // at the next completed step
		return s.advance(r)
	case msg.Stop && msg.Shutdown:
		return outcome{reason: Shutdown, msg: msg.StopReason}, true, false
	case msg.Stop:
		return outcome{reason: Stopped, msg: msg.StopReason}, true, false
	case msg.Evaluations == nil:
		return failed(BadField("frame", "expected evaluations or stop")), true, false
	}
	if err := s.groupAnswer(msg.Evaluations); err != nil {
		return failed(err), true, false
	}
	r.answerTimer.Reset(s.lim.AnswerTimeout)
	return s.advance(r)
}

// groupAnswer validates the owner's answer to a part of a group's request
// and copies it into the group's answer.
func (s *Session) groupAnswer(ev *Evaluations) *Error {
	if s.abandonedAnswer(ev) {
		return nil
	}
	for i := range s.grp.g {
		g := &s.grp.g[i]
		if g.req == nil || g.id != ev.RequestID {
			continue
		}
		per := s.partRows(g.req.Need)
		k := ev.FirstRow / per
		if ev.FirstRow < 0 || ev.FirstRow%per != 0 || k >= len(g.parts) {
			return BadField("evaluations.first_row", "%d is not the first row of a part of request %d", ev.FirstRow, g.id)
		}
		if g.parts[k] {
			return BadField("evaluations.first_row", "part starting at row %d of request %d was already answered", ev.FirstRow, g.id)
		}
		if err := s.acceptRows(g.req, g.answer, ev, min(per, g.req.Rows-ev.FirstRow)); err != nil {
			return err
		}
		g.parts[k] = true
		g.left--
		return nil
	}
	return BadField("evaluations.request_id", "answers request %d, which is not one of the requests out", ev.RequestID)
}

// advance tells every group whose answer is complete and may be told, in
// chain order, handles each completed step of every chain, and sends the
// groups' next requests.
func (s *Session) advance(r *run) (outcome, bool, bool) {
	for {
		told := false
		for i := range s.grp.g {
			g := &s.grp.g[i]
			if g.req == nil || g.left > 0 || g.k.Steps() > s.kernel.Steps() {
				continue
			}
			if err := s.tellGroup(g); err != nil {
				return failed(err), true, false
			}
			told = true
			if s.allAt(g.k.Steps()) {
				if o, stop, leave := s.groupsStepped(r); stop || leave {
					return o, stop, leave
				}
			} else if err := s.sendGroup(r, r.send, g); err != nil {
				return s.groupFailure(err), true, false
			}
		}
		if !told {
			break
		}
	}
	if s.grp.leave && s.idle() {
		return outcome{}, false, true
	}
	return outcome{}, false, false
}

// allAt reports whether every group has completed exactly j steps and
// none is in the middle of one (every group's kernels were told since).
func (s *Session) allAt(j int) bool {
	for i := range s.grp.g {
		if s.grp.g[i].k.Steps() != j {
			return false
		}
	}
	return true
}

// idle reports whether no group has a request out.
func (s *Session) idle() bool {
	for i := range s.grp.g {
		if s.grp.g[i].req != nil {
			return false
		}
	}
	return true
}

// tellGroup accounts for g's answered request and tells it to g's
// kernels, as complete does for a request of every chain.
func (s *Session) tellGroup(g *chainGroup) *Error {
	req := g.req
	g.req = nil
	s.used += s.cost(req.Need, req.Rows)
	s.guarantee.penalise(req, g.answer, s.spec.Dim)
	if req.Need.Has(kernels.NeedGradient) {
		g.round++
		s.mon.answeredAt(req, g.answer, g.round)
		s.mon.requests = max(s.mon.requests, g.round)
	}
	g.k.Tell(g.answer)
	return nil
}

// groupsStepped runs what follows a completed step of every chain (the
// last group's Tell completed it): the step's bookkeeping, checkpoints and
// the decision to go on; then the last group's next points go out before
// the step's draws, which refer to each group's latest request.
func (s *Session) groupsStepped(r *run) (outcome, bool, bool) {
	k := s.kernel.Steps()
	if s.spec.ChainGroups == 0 && s.grp.review(time.Now()) {
		s.grp.leave = true // the automatic choice's second look: lock step is faster
	}
	if s.div.observe(s.kernel.Positions(), k) {
		return failed(s.divergedError(k)), true, false
	}
	r.stepDone, r.pending = true, true
	if s.keeps(int64(k)) {
		s.kept++
		s.mon.kept(s.kernel)
	}
	s.stepped()
	if o, stop := s.checkpointDue(r); stop {
		return o, true, false
	}
	if o, stop := s.shouldStop(r); stop {
		return o, true, false
	}
	send := r.send
	if s.carrying(r) {
		send = r.hold // the step's draws may ride in the last Points frame (carry.go)
	}
	for i := range s.grp.g {
		if err := s.sendGroup(r, send, &s.grp.g[i]); err != nil {
			return s.groupFailure(err), true, false
		}
	}
	if s.idle() {
		// The next step does not fit: the lock-step loop says why (and
		// sends what is held first).
		if s.carry.on {
			if err := s.release(r.send); err != nil {
				return broken(err), true, false
			}
		}
		return outcome{}, false, true
	}
	if err := s.flushTo(r, send, s.groupSources()); err != nil {
		return broken(err), true, false
	}
	if s.carry.on {
		if err := s.release(r.send); err != nil {
			return broken(err), true, false
		}
	}
	return outcome{}, false, false
}

// groupSources lists, for the draws of a step every chain has just
// completed, each group's request out: it asks at its kernels' points
// after that step.
func (s *Session) groupSources() []drawSource {
	s.grp.srcs = s.grp.srcs[:0]
	for i := range s.grp.g {
		g := &s.grp.g[i]
		s.grp.srcs = append(s.grp.srcs, drawSource{lo: g.lo, hi: g.hi, id: g.id, req: g.req})
	}
	return s.grp.srcs
}

// abandon records the requests out when the pipeline ends, so that their
// answers are dropped, and forgets them.
func (s *Session) abandon() {
	for i := range s.grp.g {
		if g := &s.grp.g[i]; g.req != nil {
			s.grp.abandoned = append(s.grp.abandoned, g.id)
			g.req = nil
		}
	}
	s.grp.open = s.kernel.Steps()
}

// abandonedAnswer reports whether ev answers a request the pipeline
// abandoned (it is then dropped).
func (s *Session) abandonedAnswer(ev *Evaluations) bool {
	for _, id := range s.grp.abandoned {
		if id == ev.RequestID {
			return true
		}
	}
	return false
}

// groupFailure is the outcome of an error while sending a group's points.
func (s *Session) groupFailure(err error) outcome {
	if e, ok := err.(*Error); ok {
		return failed(e)
	}
	return broken(err)
}
