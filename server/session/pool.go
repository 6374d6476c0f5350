package session

import (
	"errors"
	"io"
	"math"
	"slices"
	"sync"
	"sync/atomic"
	"time"

	"sluice/kernels"
)

// The evaluator pool: the engine shares each request's rows among the
// session's evaluators — the owner's stream (unless the spec says it only
// consumes) and any workers attached to the session — and reissues the
// rows of an evaluator that is lost or falls far behind its own pace.
//
// The rule, owned here and nowhere else:
//   - Split. A request's rows are cut into one contiguous share per
//     eligible evaluator, in proportion to its measured speed (rows per
//     second over each spell from rows issued to an empty backlog until
//     it is empty again, an exponentially weighted mean), rounded by largest
//     remainder; an evaluator not yet measured counts at the median of
//     the measured ones (1 when none is). Each share is cut further into
//     parts that fit a message and, when several evaluators share the
//     request, into Pieces parts, so that a lost evaluator's rows spread. Eligible are the evaluators with nothing
//     outstanding from an earlier request and not overdue; when none is,
//     every live evaluator is.
//   - Deadline. An evaluator with rows outstanding must answer its next
//     part within max(Floor, Factor × outstanding rows / speed) of its
//     last answer or assignment (speed: its own, else the pool's median;
//     no deadline when nothing is measured).
//   - Reissue. When an evaluator's stream ends, or its deadline passes,
//     each of its unanswered parts of the current request that no other
//     live, punctual evaluator holds is issued again, whole, to the live
//     punctual evaluator that would finish it first (backlog plus part,
//     over speed); when the holder is gone and every other evaluator is
//     overdue, the quickest overdue one takes it. A part nobody can take
//     waits for the next evaluator to attach or to answer again. Parts
//     meant for an evaluator lost while a request was being dealt go the
//     same way. An overdue evaluator's speed is lowered to what it has
//     shown at most (outstanding rows over time waited), so it gets
//     fewer rows next time.
//   - First answer wins. A part's first valid answer is kept; a later one
//     from an evaluator it was issued to, or one for an earlier request,
//     is dropped and counted (late). An answer to a part never issued to
//     that evaluator is a protocol error: it fails the session when it
//     comes from the owner, and ends that worker otherwise.
//
// The kernel sees one complete answer per request whatever the split: the
// noise is drawn by the kernel on the server, so the draws do not depend
// on the number or speed of the evaluators.

// PoolOptions tune the pool's deadlines and speed estimate.
type PoolOptions struct {
	// Factor multiplies the time an evaluator's measured speed predicts
	// for its outstanding rows to give its deadline (default 4).
	Factor float64
	// Floor is the shortest deadline (default 2 s).
	Floor time.Duration
	// Smoothing is the weight of the newest speed measurement in the
	// exponentially weighted mean, in (0, 1] (default 0.3).
	Smoothing float64
	// Pieces is how many parts an evaluator's share is cut into when
	// several evaluators share a request, so that the rows of one that is
	// lost spread over several others (default 4; 1: one part each).
	Pieces int
}

func (o PoolOptions) withDefaults() PoolOptions {
	if !(o.Factor > 0) {
		o.Factor = 4
	}
	if o.Floor <= 0 {
		o.Floor = 2 * time.Second
	}
	if !(o.Smoothing > 0 && o.Smoothing <= 1) {
		o.Smoothing = 0.3
	}
	if o.Pieces <= 0 {
		o.Pieces = 4
	}
	return o
}

// ErrSessionOver is Attach's error when the session has ended.
var ErrSessionOver = errors.New("session: the session is over")

// Worker is an evaluator attached to a running session. Its methods are
// safe for use from any goroutine.
type Worker struct {
	p    *pool
	id   int
	name string
	send func(*Points) error
	done chan struct{}
	once sync.Once
	err  error
}

// Attach adds an evaluator to the running session: the engine calls send
// (from its own goroutine) with every Points frame the worker is to
// answer. send must not block on the network and must not keep the
// frame's slices after it returns (copy or encode them); an error from it
// counts as the worker's loss. The worker's answers go to Answer, the end
// of its stream to Leave. Attach fails with ErrSessionOver once the
// session has ended; a session that has not started yet takes the worker
// at its first request.
func (s *Session) Attach(name string, send func(*Points) error) (*Worker, error) {
	p := s.pool
	w := &Worker{p: p, id: int(p.nextID.Add(1)), name: name, send: send, done: make(chan struct{})}
	if !p.register(w) {
		return nil, ErrSessionOver
	}
	select {
	case p.events <- poolEvent{w: w, join: true}:
		return w, nil
	case <-w.done:
		return nil, ErrSessionOver
	}
}

// Answer hands the engine the worker's answer to one Points frame. It
// reports false when the worker has been dropped or the session is over
// (the answer is then discarded). The engine owns ev once it is taken.
func (w *Worker) Answer(ev *Evaluations) bool {
	select {
	case w.p.events <- poolEvent{w: w, ev: ev}:
		return true
	case <-w.done:
		return false
	}
}

// Leave tells the engine the worker's stream ended (err is io.EOF for a
// clean close); its unanswered rows go to others.
func (w *Worker) Leave(err error) {
	if err == nil {
		err = io.EOF
	}
	select {
	case w.p.events <- poolEvent{w: w, err: err}:
	case <-w.done:
	}
}

// Done is closed when the engine has dropped the worker or the session
// has ended; Err then says why.
func (w *Worker) Done() <-chan struct{} { return w.done }

// Err is nil when the worker ended with the session (or by Leave), and
// the *Error of its bad frame when the engine dropped it for one. Valid
// once Done is closed.
func (w *Worker) Err() error {
	select {
	case <-w.done:
		return w.err
	default:
		return nil
	}
}

func (w *Worker) end(err error) {
	w.once.Do(func() { w.err = err; close(w.done) })
}

// WorkerStatus is one evaluator as a progress report shows it.
type WorkerStatus struct {
	Name string
	// Owner is set for the session owner's own stream.
	Owner bool
	// RowsPerSecond is the measured speed (0 until measured).
	RowsPerSecond float64
	// Rows is how many rows it answered first (the answers kept).
	Rows int64
	// Reissued is how many of its rows were issued to others.
	Reissued int64
	// Late is how many of its answers came second and were dropped.
	Late int64
}

// PoolReport is the pool's part of a progress report.
type PoolReport struct {
	// Workers lists the live evaluators, the owner first when it
	// evaluates; empty for a session with no attached worker ever.
	Workers []WorkerStatus
	// RowsReissued counts rows issued a second time (or more); AnswersLate
	// the answers dropped because a part was already answered.
	RowsReissued, AnswersLate int64
}

type poolEvent struct {
	w    *Worker
	join bool
	ev   *Evaluations
	err  error
}

// outKey is one part issued to an evaluator and not answered by it.
type outKey struct {
	req   uint64
	first int
	rows  int
}

type evaluator struct {
	w       *Worker // nil for the owner
	name    string
	send    func(*Points) error
	speed   float64 // rows per second; 0 until measured
	out     []outKey
	backlog int // rows in out
	// busy is when the backlog last grew from empty, busyRows the rows
	// answered since: one speed measurement per busy spell.
	busy     time.Time
	busyRows int
	since    time.Time
	due      time.Time // zero: no deadline
	overdue  bool
	st       WorkerStatus
}

func (e *evaluator) owner() bool { return e.w == nil }

// part is one Points frame of the current request.
type part struct {
	lo, hi   int
	answered bool
	holders  []*evaluator
}

type pool struct {
	opts   PoolOptions
	events chan poolEvent
	nextID atomic.Int64

	mu     sync.Mutex
	closed bool
	all    map[*Worker]struct{}

	// Engine-goroutine state.
	evals       []*evaluator
	everWorkers bool
	ownerAdded  bool
	parts       []part
	unanswered  int
	waiting     []int // parts with no live holder
	reissued    int64
	late        int64
	timer       *time.Timer
	// Scratch reused by assign, so that a step allocates nothing.
	elig, owners []*evaluator
	speeds       []float64
	shares       []int
}

// addPart appends part [lo, hi), reusing the holders slice of the part
// that was there before.
func (p *pool) addPart(lo, hi int) {
	n := len(p.parts)
	if n < cap(p.parts) {
		p.parts = p.parts[:n+1]
		p.parts[n] = part{lo: lo, hi: hi, holders: p.parts[n].holders[:0]}
		return
	}
	p.parts = append(p.parts, part{lo: lo, hi: hi})
}

func newPool(o PoolOptions) *pool {
	t := time.NewTimer(time.Hour)
	t.Stop()
	return &pool{opts: o.withDefaults(), events: make(chan poolEvent, 256), all: map[*Worker]struct{}{}, timer: t}
}

func (p *pool) register(w *Worker) bool {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.closed {
		return false
	}
	p.all[w] = struct{}{}
	return true
}

// close ends every worker; later Attach calls fail.
func (p *pool) close() {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.closed = true
	for w := range p.all {
		w.end(nil)
	}
	clear(p.all)
	p.timer.Stop()
}

// drop removes e from the live evaluators and ends its worker with err.
func (p *pool) drop(e *evaluator, err error) {
	p.evals = slices.DeleteFunc(p.evals, func(x *evaluator) bool { return x == e })
	if e.w != nil {
		p.mu.Lock()
		delete(p.all, e.w)
		p.mu.Unlock()
		e.w.end(err)
	}
}

func (p *pool) find(w *Worker) *evaluator {
	for _, e := range p.evals {
		if e.w == w {
			return e
		}
	}
	return nil
}

// medianSpeed is the median of the measured speeds, 0 when none is.
func (p *pool) medianSpeed() float64 {
	var v []float64
	for _, e := range p.evals {
		if e.speed > 0 {
			v = append(v, e.speed)
		}
	}
	if len(v) == 0 {
		return 0
	}
	slices.Sort(v)
	return v[len(v)/2]
}

func (p *pool) speedOf(e *evaluator) float64 {
	if e.speed > 0 {
		return e.speed
	}
	if m := p.medianSpeed(); m > 0 {
		return m
	}
	return 1
}

// split shares rows among evaluators of the given speeds (all > 0) in
// proportion, by largest remainder.
func split(rows int, speeds []float64) []int {
	out := make([]int, len(speeds))
	var sum float64
	for _, v := range speeds {
		sum += v
	}
	type rem struct {
		i int
		f float64
	}
	rs := make([]rem, len(speeds))
	left := rows
	for i, v := range speeds {
		q := float64(rows) * v / sum
		out[i] = int(math.Floor(q))
		left -= out[i]
		rs[i] = rem{i, q - float64(out[i])}
	}
	slices.SortStableFunc(rs, func(a, b rem) int {
		switch {
		case a.f > b.f:
			return -1
		case a.f < b.f:
			return 1
		}
		return 0
	})
	for k := 0; left > 0; k = (k + 1) % len(rs) {
		out[rs[k].i]++
		left--
	}
	return out
}

// setDeadline restarts e's clock at now.
func (p *pool) setDeadline(e *evaluator, now time.Time) {
	e.since = now
	e.due = time.Time{}
	if e.backlog == 0 {
		return
	}
	v := e.speed
	if v <= 0 {
		v = p.medianSpeed()
	}
	if v <= 0 {
		return
	}
	d := time.Duration(p.opts.Factor * float64(e.backlog) / v * float64(time.Second))
	e.due = now.Add(max(p.opts.Floor, d))
}

// arm sets the timer to the earliest deadline of an evaluator holding an
// unanswered part of the current request.
func (p *pool) arm(now time.Time) {
	p.timer.Stop()
	var first time.Time
	for _, e := range p.evals {
		if e.due.IsZero() && e.backlog > 0 {
			// Not measured when its rows were issued: time it by the
			// others' speed once there is one.
			p.setDeadline(e, e.since)
		}
		if !e.due.IsZero() && !e.overdue && (first.IsZero() || e.due.Before(first)) {
			first = e.due
		}
	}
	if !first.IsZero() {
		p.timer.Reset(max(first.Sub(now), time.Millisecond))
	}
}

// punctual reports whether e is live and within its deadline.
func (p *pool) punctual(e *evaluator) bool {
	return !e.overdue && slices.Contains(p.evals, e)
}

// covered reports whether part k has a live, punctual holder.
func (p *pool) covered(k int) bool {
	return slices.ContainsFunc(p.parts[k].holders, p.punctual)
}

// ownerEvaluator adds the owner's stream as an evaluator when the spec
// lets it evaluate; it is called once, at the first request.
func (s *Session) ownerEvaluator() {
	if s.pool.ownerAdded || s.spec.WorkersOnly {
		return
	}
	s.pool.ownerAdded = true
	e := &evaluator{name: "owner", send: func(f *Points) error { return s.ownerOut(f) }}
	e.st = WorkerStatus{Name: e.name, Owner: true}
	s.pool.evals = append([]*evaluator{e}, s.pool.evals...)
}

// assign splits req's rows into parts, issues them and records the part
// table; send is the owner's.
func (s *Session) assign(req *kernels.Request, send func(Frame) error) error {
	p := s.pool
	s.ownerEvaluator()
	// The owner's parts of this request go out through send (which may
	// hold them, carry.go); anything sent to the owner later, through
	// the run's own send.
	s.ownerOut = send
	defer func() { s.ownerOut = s.ownerBase }()
	if err := s.drainPool(nil); err != nil {
		return err
	}
	now := time.Now()
	elig := p.elig[:0]
	for _, e := range p.evals {
		if !e.overdue && !slices.ContainsFunc(e.out, func(k outKey) bool { return k.req != s.requestID }) {
			elig = append(elig, e)
		}
	}
	p.elig = elig
	if len(elig) == 0 {
		elig = p.evals
	}
	p.parts = p.parts[:0]
	p.waiting = p.waiting[:0]
	if len(elig) == 0 {
		for lo := 0; lo < req.Rows; lo += s.rowsPerPart {
			p.addPart(lo, min(lo+s.rowsPerPart, req.Rows))
			p.waiting = append(p.waiting, len(p.parts)-1)
		}
		p.unanswered = len(p.parts)
		return nil
	}
	var shares []int
	if len(elig) == 1 { // one evaluator takes every row
		p.shares = append(p.shares[:0], req.Rows)
		shares = p.shares
	} else {
		speeds := p.speeds[:0]
		for _, e := range elig {
			speeds = append(speeds, p.speedOf(e))
		}
		p.speeds = speeds
		shares = split(req.Rows, speeds)
	}
	owners := p.owners[:0]
	lo := 0
	for i, e := range elig {
		end := lo + shares[i]
		size := s.rowsPerPart
		if len(elig) > 1 {
			// Pieces, so that a lost evaluator's rows spread over several.
			size = min(size, max(1, (shares[i]+p.opts.Pieces-1)/p.opts.Pieces))
		}
		for a := lo; a < end; a += size {
			p.addPart(a, min(a+size, end))
			owners = append(owners, e)
		}
		lo = end
	}
	p.owners = owners
	p.unanswered = len(p.parts)
	for k, e := range owners {
		var err error
		if slices.Contains(p.evals, e) {
			err = s.issue(req, k, e, now)
		} else {
			// e was lost while its earlier parts were being sent: this
			// part goes to whoever would finish it first.
			_, err = s.place(req, k, true, now)
		}
		if err != nil {
			return err
		}
	}
	p.arm(now)
	return nil
}

// issue sends part k of req to e. A failed send to the owner is returned;
// a failed send to a worker counts as its loss.
func (s *Session) issue(req *kernels.Request, k int, e *evaluator, now time.Time) error {
	p := s.pool
	pt := &p.parts[k]
	pt.holders = append(pt.holders, e)
	if e.backlog == 0 {
		e.since, e.busy, e.busyRows = now, now, 0
	}
	e.out = append(e.out, outKey{req: s.requestID, first: pt.lo, rows: pt.hi - pt.lo})
	e.backlog += pt.hi - pt.lo
	p.setDeadline(e, e.since)
	if err := e.send(s.pointsFrame(req, s.requestID, pt.lo, pt.hi)); err != nil {
		if e.owner() {
			return err
		}
		return s.lose(req, e, nil, now)
	}
	return nil
}

// lose drops e (ending its worker with err) and reissues what only it
// held.
func (s *Session) lose(req *kernels.Request, e *evaluator, err error, now time.Time) error {
	p := s.pool
	if !slices.Contains(p.evals, e) {
		return nil
	}
	p.drop(e, err)
	return s.reissue(req, e, now)
}

// reissue gives the unanswered parts of the current request that e holds
// and no other live punctual evaluator holds to the evaluator that would
// finish each first (place); parts nobody can take wait.
func (s *Session) reissue(req *kernels.Request, e *evaluator, now time.Time) error {
	p := s.pool
	gone := !slices.Contains(p.evals, e)
	for _, o := range e.out {
		if o.req != s.requestID {
			continue
		}
		k := p.partAt(o.first)
		if k < 0 || p.parts[k].answered || p.covered(k) {
			continue
		}
		e.st.Reissued += int64(o.rows)
		issued, err := s.place(req, k, gone, now)
		if err != nil {
			return err
		}
		if issued {
			p.reissued += int64(o.rows)
		}
	}
	p.arm(now)
	return nil
}

// place issues part k to the live punctual evaluator not holding it that
// would finish it first (backlog plus part, over speed). When none is
// punctual and anyOverdue is set (the part's holder is gone, so waiting
// for it is hopeless), an overdue but live evaluator takes it instead;
// with no taker the part waits for the next evaluator to attach or to
// become punctual again. It reports whether the part was issued.
func (s *Session) place(req *kernels.Request, k int, anyOverdue bool, now time.Time) (bool, error) {
	p := s.pool
	best := p.fastest(k, false)
	if best == nil && anyOverdue {
		best = p.fastest(k, true)
	}
	if best == nil {
		if !slices.Contains(p.waiting, k) {
			p.waiting = append(p.waiting, k)
		}
		return false, nil
	}
	return true, s.issue(req, k, best, now)
}

// fastest is the live evaluator not holding part k that would finish it
// first; overdue ones count only when overdue is set. nil when none.
func (p *pool) fastest(k int, overdue bool) *evaluator {
	rows := p.parts[k].hi - p.parts[k].lo
	var best *evaluator
	var bestT float64
	for _, c := range p.evals {
		if (c.overdue && !overdue) || slices.Contains(p.parts[k].holders, c) {
			continue
		}
		t := float64(c.backlog+rows) / p.speedOf(c)
		if best == nil || t < bestT {
			best, bestT = c, t
		}
	}
	return best
}

// placeWaiting places the parts waiting for an evaluator; the ones still
// without a taker keep waiting.
func (s *Session) placeWaiting(req *kernels.Request, now time.Time) error {
	p := s.pool
	if req == nil || len(p.waiting) == 0 {
		return nil
	}
	waiting := slices.Clone(p.waiting)
	p.waiting = p.waiting[:0]
	for _, k := range waiting {
		if p.parts[k].answered || p.covered(k) {
			continue
		}
		if _, err := s.place(req, k, true, now); err != nil {
			return err
		}
	}
	p.arm(now)
	return nil
}

// join adds a worker and gives it the parts waiting for an evaluator.
func (s *Session) join(req *kernels.Request, w *Worker, now time.Time) error {
	p := s.pool
	e := &evaluator{w: w, name: w.name, send: w.send}
	e.st = WorkerStatus{Name: w.name}
	p.evals = append(p.evals, e)
	p.everWorkers = true
	if req == nil {
		return nil
	}
	return s.placeWaiting(req, now)
}

// partAt is the index of the part of the current request starting at
// row first, or −1.
func (p *pool) partAt(first int) int {
	k, ok := slices.BinarySearchFunc(p.parts, first, func(pt part, v int) int { return pt.lo - v })
	if !ok {
		return -1
	}
	return k
}

// takeAnswer takes e's answer ev. It returns an *Error that fails the
// session (a bad value, or the owner's protocol error); a worker's
// protocol error ends that worker only.
func (s *Session) takeAnswer(req *kernels.Request, e *evaluator, ev *Evaluations, now time.Time) error {
	p := s.pool
	i := slices.IndexFunc(e.out, func(k outKey) bool { return k.req == ev.RequestID && k.first == ev.FirstRow })
	if i < 0 {
		err := s.mismatch(req, ev)
		if e.owner() {
			return err
		}
		return s.lose(req, e, err, now)
	}
	o := e.out[i]
	e.out = slices.Delete(e.out, i, i+1)
	e.backlog -= o.rows
	e.busyRows += o.rows
	if dt := now.Sub(e.busy).Seconds(); e.backlog == 0 && dt > 0 {
		// A busy spell ended: its rows over its length is one measurement.
		v := float64(e.busyRows) / dt
		if e.speed == 0 || e.overdue {
			e.speed = v
		} else {
			a := p.opts.Smoothing
			e.speed = a*v + (1-a)*e.speed
		}
	}
	wasOverdue := e.overdue
	e.overdue = false
	p.setDeadline(e, now)
	p.arm(now)
	if wasOverdue {
		// Punctual again: it may take the parts waiting for a taker.
		if err := s.placeWaiting(req, now); err != nil {
			return err
		}
	}
	k := -1
	if o.req == s.requestID {
		k = p.partAt(o.first)
	}
	if k < 0 || p.parts[k].answered {
		p.late++
		e.st.Late++
		return nil
	}
	if err := s.accept(req, ev, k); err != nil {
		return err
	}
	p.parts[k].answered = true
	p.unanswered--
	e.st.Rows += int64(o.rows)
	return nil
}

// mismatch explains an answer to a part never issued to its sender.
func (s *Session) mismatch(req *kernels.Request, ev *Evaluations) *Error {
	if ev.RequestID != s.requestID {
		return BadField("evaluations.request_id", "answers request %d, but the current request is %d", ev.RequestID, s.requestID)
	}
	if k := s.pool.partAt(ev.FirstRow); k >= 0 && ev.FirstRow < req.Rows {
		if s.pool.parts[k].answered {
			return BadField("evaluations.first_row", "part starting at row %d of request %d was already answered", ev.FirstRow, s.requestID)
		}
		return BadField("evaluations.first_row", "part starting at row %d of request %d was not sent to this evaluator", ev.FirstRow, s.requestID)
	}
	return BadField("evaluations.first_row", "%d is not the first row of a part of request %d", ev.FirstRow, s.requestID)
}

// overdue reissues the parts of every evaluator past its deadline.
func (s *Session) overdue(req *kernels.Request, now time.Time) error {
	p := s.pool
	for _, e := range slices.Clone(p.evals) {
		if e.overdue || e.due.IsZero() || now.Before(e.due) {
			continue
		}
		e.overdue = true
		if waited := now.Sub(e.since).Seconds(); waited > 0 && e.backlog > 0 {
			// It has shown at most this speed.
			if v := float64(e.backlog) / waited; e.speed == 0 || v < e.speed {
				e.speed = v
			}
		}
		if err := s.reissue(req, e, now); err != nil {
			return err
		}
	}
	p.arm(now)
	return nil
}

// poolEvent handles one event from an attached worker during req (nil
// between requests).
// The error is an *Error for bad data that fails the session, or the
// owner's failed send.
func (s *Session) poolEvent(req *kernels.Request, ev poolEvent) error {
	p := s.pool
	now := time.Now()
	switch {
	case ev.join:
		return s.join(req, ev.w, now)
	case ev.err != nil:
		if e := p.find(ev.w); e != nil {
			if req == nil {
				p.drop(e, nil)
				return nil
			}
			return s.lose(req, e, nil, now)
		}
		return nil
	}
	e := p.find(ev.w)
	if e == nil {
		return nil // dropped already: its answers no longer count
	}
	if req == nil {
		// Between requests every answer is late or foreign.
		i := slices.IndexFunc(e.out, func(k outKey) bool { return k.req == ev.ev.RequestID && k.first == ev.ev.FirstRow })
		if i < 0 {
			p.drop(e, s.mismatch(&kernels.Request{}, ev.ev))
			return nil
		}
		e.backlog -= e.out[i].rows
		e.out = slices.Delete(e.out, i, i+1)
		p.late++
		e.st.Late++
		return nil
	}
	return s.takeAnswer(req, e, ev.ev, now)
}

// drainPool handles the pool's queued events without waiting.
func (s *Session) drainPool(req *kernels.Request) error {
	for {
		select {
		case ev := <-s.pool.events:
			if err := s.poolEvent(req, ev); err != nil {
				return err
			}
		default:
			return nil
		}
	}
}

// poolReport fills the pool's figures of a progress report.
func (s *Session) poolReport() PoolReport {
	p := s.pool
	r := PoolReport{RowsReissued: p.reissued, AnswersLate: p.late}
	if !p.everWorkers {
		return r
	}
	for _, e := range p.evals {
		st := e.st
		st.RowsPerSecond = e.speed
		r.Workers = append(r.Workers, st)
	}
	return r
}

// ownerAnswer takes the owner's answer ev during req.
func (s *Session) ownerAnswer(req *kernels.Request, ev *Evaluations) error {
	p := s.pool
	if len(p.evals) > 0 && p.evals[0].owner() {
		return s.takeAnswer(req, p.evals[0], ev, time.Now())
	}
	if s.spec.WorkersOnly {
		return BadField("evaluations", "the owner registered owner_evaluates = false: attached workers evaluate, the owner only consumes")
	}
	return s.mismatch(req, ev)
}

// poolFailure is the outcome of an error while collecting answers: an
// *Error fails the session, anything else is a broken owner stream.
func (s *Session) poolFailure(err error) outcome {
	if e, ok := err.(*Error); ok {
		return failed(e)
	}
	return broken(err)
}
