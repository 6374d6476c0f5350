package session

import (
	"bytes"
	"encoding/gob"
	"errors"
	"fmt"
	"time"

	"sluice/kernels"
	"sluice/kernels/diag"
)

// Checkpoints: a session's whole state, written at step boundaries so that
// a session survives a broken stream or a restarted server.
//
// A checkpoint is taken only where the next request is fully determined by
// the state: before the first request, and after a Tell that completed a
// kernel step (every phase is complete by then). Wall time may decide when
// one is written, never what the session does next: the state holds the
// kernel with its random stream, so the draws after a restore are
// bit-identical to those of the session that never stopped.
//
// The encoding (version 1): the bytes "sluice-state", a version byte, then a
// gob encoding of a list of named sections, each itself a gob encoding of a
// plain struct (or, for the kernel, the kernel's own MarshalBinary). A
// reader ignores sections it does not know and refuses a state that lacks
// one it needs, so sections can be added without a new version:
//
//	spec     the Spec as registered, seed drawn (the session is rebuilt from it)
//	session  id, token, counters, sequence numbers, budget used, elapsed time,
//	         running moments, noise meter, guarantee, the Finished frame of a
//	         finished session
//	kernel   the kernel's state (kernels.Checkpointer)
//	phases   each phase's state
//	monitor  the measured diagnostics' bounded accumulators
//	tuner    the metric adaptation in burn-in (window, pooled covariance,
//	         metrics) and the automatic settings chosen so far
//	follow   the tail of the draw log that followers and resuming clients read
//
// A phase in progress is never checkpointed: the first checkpoint precedes
// every phase and the next follows the kernel's first step, so a session
// restored before its phases completed runs them again from the start (the
// re-run rule; they are deterministic in the answers).

// stateMagic starts every encoded state.
const stateMagic = "sluice-state"

// stateVersion is the encoding's version.
const stateVersion = 1

// Checkpoint is one saved state.
type Checkpoint struct {
	// State is the encoded state (see Restore).
	State []byte
	// Seq increases with every checkpoint of a session (the request
	// counter at the time), across restores.
	Seq uint64
	// Final is set when the session has finished: State then holds its
	// Finished frame and resuming it only replays what it kept.
	Final bool
	// Steps is the kernel's step count at the checkpoint.
	Steps int
}

// Checkpoints says when a session saves its state, and where to.
type Checkpoints struct {
	// EverySteps writes a checkpoint every that many kernel steps (0:
	// not by steps). Spec.CheckpointEverySteps overrides it when set.
	EverySteps int64
	// Every writes one at the first step boundary after that much wall
	// time since the last (0: not by time).
	Every time.Duration
	// Save receives every checkpoint, on the session's goroutine; it
	// should not keep State beyond the call. Errors are the caller's to
	// report: the session goes on.
	Save func(Checkpoint)
}

// ErrSuspended is returned by Run when the session stopped at a checkpoint
// without finishing (the server is shutting down): it can be resumed.
var ErrSuspended = errors.New("session: suspended at a checkpoint")

// ErrSilent is wrapped, with the Timeout *Error, by the error Run returns
// when a checkpointed session's client did not answer within the answer
// timeout: the session is suspended at its latest checkpoint (no Finished
// frame is sent and no final checkpoint written) and can be resumed.
var ErrSilent = errors.New("session: suspended: its client stopped answering")

// silent is the outcome of a client that did not answer the request
// within the answer timeout. A checkpointed session is suspended: its
// latest checkpoint (a step boundary at or before the request) stands,
// and a resume continues from there. Otherwise it fails, saying why it
// could not be suspended.
func (s *Session) silent() outcome {
	e := &Error{Kind: Timeout, Field: "evaluations", Chain: -1, Coord: -1,
		Reason: fmt.Sprintf("no answer to request %d within the answer timeout of %v", s.requestID, s.lim.AnswerTimeout)}
	if s.checkpointing() {
		return outcome{reason: Failed, msg: e.Error(), err: fmt.Errorf("%w: %w", ErrSilent, e), quiet: true}
	}
	e.Reason += "; this session is not checkpointed (the server keeps no session state), so it cannot be suspended and ends"
	return failed(e)
}

// ErrNotResumable is wrapped by the error ResumeAt returns when the draws
// the client asks for can no longer be replayed.
var ErrNotResumable = errors.New("session: draws asked for are no longer kept")

// persist is a session's checkpoint bookkeeping.
type persist struct {
	cp       Checkpoints
	orig     Spec // as registered, seed drawn
	token    string
	restored *sessionState // set by Restore until Run applies it
	phases   [][]byte      // phase states to apply in begin
	final    *Finished     // a restored finished session's frame
	resumed  bool
	nextSeq  uint64 // the resuming client's next sequence number
	lastSave time.Time
}

// SetCheckpoints makes the session save its state as c says. Call before
// Run.
func (s *Session) SetCheckpoints(c Checkpoints) {
	s.persist.cp = c
	if e := s.spec.CheckpointEverySteps; e > 0 {
		s.persist.cp.EverySteps = e
	}
}

// SetToken records the session's secret token, saved with its state (the
// engine does not check it: the adapter does).
func (s *Session) SetToken(t string) { s.persist.token = t }

// Token is the token recorded with SetToken or restored.
func (s *Session) Token() string { return s.persist.token }

// Resumed reports whether the session was restored from a checkpoint.
func (s *Session) Resumed() bool { return s.persist.resumed }

// ResumeAt tells a restored session that its client has every draw with a
// sequence number below next: Run replays the kept draws from next up to
// the checkpoint, and sends none below next after it. It fails, wrapping
// ErrNotResumable, when draws from next on have left the kept tail.
func (s *Session) ResumeAt(next uint64) error {
	if s.log != nil {
		if first, end := s.log.Span(); next < end && next < first {
			return fmt.Errorf("%w: the client has draws up to %d, the oldest kept is %d", ErrNotResumable, next, first)
		}
	} else if next < s.seq {
		return fmt.Errorf("%w: the client has draws up to %d, the checkpoint is at %d and the server keeps no draws (follow buffer 0)", ErrNotResumable, next, s.seq)
	}
	s.persist.nextSeq = next
	return nil
}

// checkpointing reports whether the session saves checkpoints.
func (s *Session) checkpointing() bool { return s.persist.cp.Save != nil }

// section is one named part of an encoded state.
type section struct {
	Name string
	Data []byte
}

// sessionState is the "session" section.
type sessionState struct {
	ID, Token    string
	RequestID    uint64
	Used         int64
	Seq          uint64
	Kept         int64
	Steps        int
	Phase        int
	Elapsed      time.Duration
	Count        int64
	Mean, M2     []float64
	EpsSteps     int
	Noise        noiseState
	Guarantee    *guaranteeState
	Finished     *Finished
	LastProgress time.Duration // since start
	// The verdict's cadence and divergence watch. JudgedAt is the step of
	// the latest judgement (0 in states written before it was kept: the
	// cadence then counts the steps since the start).
	JudgeNext, SteinNext, JudgedAt int
	Divergence                     *divergence
}

type noiseState struct {
	Sum      float64
	Count, N int64
	Mean, M2 float64
	Touched  float64
}

type guaranteeState struct {
	Noise   float64
	H       float64
	K0      int
	Planned int
	Replan  bool
	// The start: a W2 start distance certified from the start gradients,
	// a TV bound's shift term and what the mode search found.
	StartDistance float64
	StartSource   string
	StartPending  bool
	Shift         float64
	ModeText      string
}

// monitorState is the "monitor" section.
type monitorState struct {
	Hist, KSD, Curv []byte
	LastX, LastG    []float64
	HaveLast        []bool
	KeptX           []float64
	PendingScores   bool
	Requests        int
	LastKSD         float64
	Params          []ParameterDiagnostics
	Measured        bool
	// The verdict's figures: chains' sums, their spread, certificate
	// pairs and the last Stein assessment.
	ChainSum      []float64
	ChainN        int64
	Spread        float64
	SpreadName    string
	Pairs, Uphill int
	Stein         *SteinReport
	// A judgement taken on the cadence and not yet applied (judge.go).
	Pending *pendingState
}

// followState is the "follow" section: the kept tail of the draw log.
type followState struct {
	First, Next uint64
	Values      []float64
	Chains      []int
	Iterations  []int64
}

// probeState is a curvature probe's phase state.
type probeState struct {
	Large, Small []byte
	BigM, M      float64
	Evaluations  int
	Theta        []float64
}

func gobBytes(v any) ([]byte, error) {
	var b bytes.Buffer
	if err := gob.NewEncoder(&b).Encode(v); err != nil {
		return nil, err
	}
	return b.Bytes(), nil
}

func gobRead(data []byte, v any) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = fmt.Errorf("malformed: %v", r)
		}
	}()
	return gob.NewDecoder(bytes.NewReader(data)).Decode(v)
}

// snapshot encodes the session's state; fin is the Finished frame of a
// finished session, else nil.
func (s *Session) snapshot(fin *Finished) (Checkpoint, error) {
	var secs []section
	add := func(name string, v any) error {
		b, err := gobBytes(v)
		if err != nil {
			return fmt.Errorf("session: checkpoint section %s: %w", name, err)
		}
		secs = append(secs, section{name, b})
		return nil
	}
	if err := add("spec", s.persist.orig); err != nil {
		return Checkpoint{}, err
	}
	st := sessionState{ID: s.id, Token: s.persist.token, RequestID: s.requestID, Used: s.used, Seq: s.seq, Kept: s.kept,
		Steps: s.kernel.Steps(), Phase: s.phase, Elapsed: time.Since(s.start), Count: s.count, Mean: s.mean, M2: s.m2,
		EpsSteps: s.epsSteps, Finished: fin, LastProgress: s.lastProgress.Sub(s.start),
		JudgeNext: s.judgeNext, SteinNext: s.steinNext, JudgedAt: s.judgedAt, Divergence: s.div,
		Noise: noiseState{Sum: s.noise.sum, Count: s.noise.count, N: s.noise.n, Mean: s.noise.mean, M2: s.noise.m2, Touched: s.noise.touched}}
	if g := s.guarantee; g != nil {
		st.Guarantee = &guaranteeState{Noise: g.setting.Noise, H: g.h, K0: g.k0, Planned: g.planned, Replan: g.replan,
			StartDistance: g.setting.StartDistance, StartSource: g.startSource, StartPending: g.startPending, Shift: g.shift, ModeText: g.modeText}
	}
	if err := add("session", st); err != nil {
		return Checkpoint{}, err
	}
	ck, ok := s.kernel.(kernels.Checkpointer)
	if !ok {
		return Checkpoint{}, fmt.Errorf("session: kernel %s cannot be checkpointed", s.spec.Kernel)
	}
	kb, err := ck.MarshalBinary()
	if err != nil {
		return Checkpoint{}, fmt.Errorf("session: checkpoint of kernel %s: %w", s.spec.Kernel, err)
	}
	secs = append(secs, section{"kernel", kb})
	var phases [][]byte
	for _, p := range s.phases {
		pc, ok := p.(phaseCheckpointer)
		if !ok {
			return Checkpoint{}, fmt.Errorf("session: phase %T cannot be checkpointed", p)
		}
		b, err := pc.marshal()
		if err != nil {
			return Checkpoint{}, err
		}
		phases = append(phases, b)
	}
	if err := add("phases", phases); err != nil {
		return Checkpoint{}, err
	}
	ts, err := s.tune.state()
	if err != nil {
		return Checkpoint{}, fmt.Errorf("session: checkpoint of the tuner: %w", err)
	}
	if err := add("tuner", ts); err != nil {
		return Checkpoint{}, err
	}
	m := s.mon
	ms := monitorState{LastX: m.lastX, LastG: m.lastG, HaveLast: m.haveLast, KeptX: m.keptX, PendingScores: m.pendingScores,
		Requests: m.requests, LastKSD: m.lastKSD, Params: m.params, Measured: m.measured,
		ChainSum: m.chainSum, ChainN: m.chainN, Spread: m.spread, SpreadName: m.spreadName, Pairs: m.pairs, Uphill: m.uphill, Stein: m.stein,
		Pending: m.pending()}
	if ms.Hist, err = m.hist.MarshalBinary(); err == nil {
		if ms.KSD, err = m.ksd.MarshalBinary(); err == nil {
			ms.Curv, err = m.curv.MarshalBinary()
		}
	}
	if err != nil {
		return Checkpoint{}, fmt.Errorf("session: checkpoint of the diagnostics: %w", err)
	}
	if err := add("monitor", ms); err != nil {
		return Checkpoint{}, err
	}
	if s.log != nil {
		if err := add("follow", s.log.tail()); err != nil {
			return Checkpoint{}, err
		}
	}
	body, err := gobBytes(secs)
	if err != nil {
		return Checkpoint{}, err
	}
	out := make([]byte, 0, len(stateMagic)+1+len(body))
	out = append(append(append(out, stateMagic...), stateVersion), body...)
	return Checkpoint{State: out, Seq: s.requestID, Final: fin != nil, Steps: s.kernel.Steps()}, nil
}

// Restore rebuilds a session from a state written by a checkpoint, under
// the server's limits lim. The session continues exactly where the
// checkpoint left it: the next Run sends Registered (Resumed set), replays
// kept draws (see ResumeAt), and goes on with the step after the
// checkpoint. A damaged or foreign state is an error, never a panic.
func Restore(state []byte, lim Limits) (*Session, error) {
	if len(state) < len(stateMagic)+1 || string(state[:len(stateMagic)]) != stateMagic {
		return nil, errors.New("session: not a session state")
	}
	if v := state[len(stateMagic)]; v != stateVersion {
		return nil, fmt.Errorf("session: state of version %d, this server reads version %d", v, stateVersion)
	}
	var secs []section
	if err := gobRead(state[len(stateMagic)+1:], &secs); err != nil {
		return nil, fmt.Errorf("session: state: %w", err)
	}
	byName := map[string][]byte{}
	for _, sec := range secs {
		byName[sec.Name] = sec.Data
	}
	get := func(name string, v any) error {
		b, ok := byName[name]
		if !ok {
			return fmt.Errorf("session: state lacks its %s section", name)
		}
		if err := gobRead(b, v); err != nil {
			return fmt.Errorf("session: state section %s: %w", name, err)
		}
		return nil
	}
	var spec Spec
	if err := get("spec", &spec); err != nil {
		return nil, err
	}
	var st sessionState
	if err := get("session", &st); err != nil {
		return nil, err
	}
	if spec.Seed == 0 {
		return nil, errors.New("session: state has no seed")
	}
	s, err := New(st.ID, spec, lim)
	if err != nil {
		return nil, fmt.Errorf("session: state's spec no longer valid here: %w", err)
	}
	dim := s.spec.Dim
	if len(st.Mean) != dim || len(st.M2) != dim || st.Phase < 0 || st.Steps < 0 || st.Elapsed < 0 || st.Count < 0 {
		return nil, errors.New("session: state's session section is inconsistent")
	}
	kb, ok := byName["kernel"]
	if !ok {
		return nil, errors.New("session: state lacks its kernel section")
	}
	ck, ok := s.kernel.(kernels.Checkpointer)
	if !ok {
		return nil, fmt.Errorf("session: kernel %s cannot be restored", s.spec.Kernel)
	}
	if err := ck.UnmarshalBinary(kb); err != nil {
		return nil, fmt.Errorf("session: state's kernel: %w", err)
	}
	if s.kernel.Steps() != st.Steps {
		return nil, fmt.Errorf("session: state's kernel is at step %d, its session at %d", s.kernel.Steps(), st.Steps)
	}
	var phases [][]byte
	if err := get("phases", &phases); err != nil {
		return nil, err
	}
	var ms monitorState
	if err := get("monitor", &ms); err != nil {
		return nil, err
	}
	if _, ok := byName["tuner"]; ok { // states written before the section existed have none
		var ts tunerState
		if err := get("tuner", &ts); err != nil {
			return nil, err
		}
		if err := s.tune.restore(&ts, dim); err != nil {
			return nil, err
		}
	}
	if err := s.mon.restore(&ms); err != nil {
		return nil, err
	}
	if s.log != nil {
		if b, ok := byName["follow"]; ok {
			var fs followState
			if err := gobRead(b, &fs); err != nil {
				return nil, fmt.Errorf("session: state section follow: %w", err)
			}
			if err := s.log.restore(&fs, st.Seq); err != nil {
				return nil, err
			}
		} else {
			_ = s.log.restore(&followState{First: st.Seq, Next: st.Seq}, st.Seq) // consistent by construction
		}
	}
	s.requestID, s.used, s.seq, s.kept, s.count, s.epsSteps = st.RequestID, st.Used, st.Seq, st.Kept, st.Count, st.EpsSteps
	copy(s.mean, st.Mean)
	copy(s.m2, st.M2)
	n := st.Noise
	s.noise = noiseMeter{sum: n.Sum, count: n.Count, n: n.N, mean: n.Mean, m2: n.M2, touched: n.Touched}
	if g := st.Guarantee; g != nil && s.guarantee != nil {
		s.guarantee.setting.Noise, s.guarantee.h, s.guarantee.k0, s.guarantee.planned, s.guarantee.replan = g.Noise, g.H, g.K0, g.Planned, g.Replan
		if g.StartSource != "" { // certified after registration
			s.guarantee.setting.StartDistance, s.guarantee.startSource, s.guarantee.startPending = g.StartDistance, g.StartSource, false
		}
		if g.ModeText != "" { // the mode search completed
			s.guarantee.shift, s.guarantee.modeText = g.Shift, g.ModeText
		}
	}
	s.persist.token = st.Token
	s.judgeNext, s.steinNext, s.judgedAt = st.JudgeNext, st.SteinNext, st.JudgedAt
	if st.Divergence != nil {
		s.div = st.Divergence
	}
	s.persist.restored = &st
	s.persist.phases = phases
	s.persist.final = st.Finished
	s.persist.resumed = true
	s.persist.nextSeq = st.Seq
	return s, nil
}

// restore applies a saved monitor state.
func (m *monitor) restore(ms *monitorState) error {
	w := m.dim * m.chains
	if len(ms.LastX) != w || len(ms.LastG) != w || len(ms.KeptX) != w || len(ms.HaveLast) != m.chains ||
		(len(ms.Params) != 0 && len(ms.Params) != m.dim) {
		return errors.New("session: state's monitor section has other sizes")
	}
	if err := m.hist.UnmarshalBinary(ms.Hist); err != nil {
		return fmt.Errorf("session: state's history: %w", err)
	}
	if err := m.ksd.UnmarshalBinary(ms.KSD); err != nil {
		return fmt.Errorf("session: state's Stein discrepancy: %w", err)
	}
	if err := m.curv.UnmarshalBinary(ms.Curv); err != nil {
		return fmt.Errorf("session: state's certificates: %w", err)
	}
	copy(m.lastX, ms.LastX)
	copy(m.lastG, ms.LastG)
	copy(m.haveLast, ms.HaveLast)
	copy(m.keptX, ms.KeptX)
	m.pendingScores, m.requests, m.lastKSD = ms.PendingScores, ms.Requests, ms.LastKSD
	if len(ms.ChainSum) == len(m.chainSum) {
		copy(m.chainSum, ms.ChainSum)
	}
	m.chainN, m.spread, m.spreadName, m.pairs, m.uphill, m.stein = ms.ChainN, ms.Spread, ms.SpreadName, ms.Pairs, ms.Uphill, ms.Stein
	m.params, m.measured = append(m.params[:0], ms.Params...), ms.Measured
	if p := ms.Pending; p != nil && len(p.Params) != 0 && len(p.Params) != m.dim {
		return errors.New("session: state's pending judgement has other sizes")
	}
	m.restorePending(ms.Pending)
	return nil
}

// phaseCheckpointer is implemented by every Phase, so that a checkpoint
// taken after the phases holds what they learnt. A phase without it makes
// the session's checkpoints fail (reported through Checkpoints.Save as an
// empty checkpoint), never the session.
type phaseCheckpointer interface {
	marshal() ([]byte, error)
	unmarshal([]byte) error
}

func (p *curvatureProbe) marshal() ([]byte, error) {
	st := probeState{BigM: p.bigM, M: p.m, Evaluations: p.evaluations, Theta: p.theta}
	var err error
	if st.Large, err = p.large.MarshalBinary(); err != nil {
		return nil, err
	}
	if p.small != nil {
		if st.Small, err = p.small.MarshalBinary(); err != nil {
			return nil, err
		}
	}
	return gobBytes(st)
}

func (p *curvatureProbe) unmarshal(b []byte) error {
	var st probeState
	if err := gobRead(b, &st); err != nil {
		return fmt.Errorf("session: state's curvature probe: %w", err)
	}
	if len(st.Theta) != p.dim {
		return errors.New("session: state's curvature probe has another dimension")
	}
	copy(p.theta, st.Theta)
	if err := p.large.UnmarshalBinary(st.Large); err != nil {
		return fmt.Errorf("session: state's curvature probe: %w", err)
	}
	p.small = nil
	if st.Small != nil {
		p.small = newSmallFrom(p)
		if err := p.small.UnmarshalBinary(st.Small); err != nil {
			return fmt.Errorf("session: state's curvature probe: %w", err)
		}
	}
	p.bigM, p.m, p.evaluations = st.BigM, st.M, st.Evaluations
	return nil
}

// restorePhases applies the phase states of a restored session to the
// phases begin just built.
func (s *Session) restorePhases() error {
	st := s.persist.restored
	if st == nil {
		return nil
	}
	// Phases begin does not build again are the tuner's probes run during
	// burn-in (and its first probe, once the kernel has stepped): they
	// were finished when the checkpoint was taken, their results are in
	// the tuner's and the kernel's state, and they stand in the list as
	// finished probes so that the phase index means what it meant.
	for len(s.phases) < len(s.persist.phases) {
		s.phases = append(s.phases, &lanczosProbe{})
	}
	if st.Phase > len(s.phases) || (len(s.persist.phases) != 0 && len(s.persist.phases) != len(s.phases)) {
		return errors.New("session: state's phases do not match the spec's")
	}
	for i, b := range s.persist.phases {
		pc, ok := s.phases[i].(phaseCheckpointer)
		if !ok {
			return fmt.Errorf("session: phase %T cannot be restored", s.phases[i])
		}
		if err := pc.unmarshal(b); err != nil {
			return err
		}
		if pr, ok := s.phases[i].(*lanczosProbe); ok && i < st.Phase && !pr.finished {
			return errors.New("session: state's tuner probe was not finished")
		}
	}
	s.phase = st.Phase
	return nil
}

// tail copies the kept rows of the log.
func (l *DrawLog) tail() followState {
	l.mu.Lock()
	defer l.mu.Unlock()
	n := int(l.next - l.first)
	fs := followState{First: l.first, Next: l.next, Values: make([]float64, n*l.dim), Chains: make([]int, n), Iterations: make([]int64, n)}
	for r := range n {
		i := int((l.first + uint64(r)) % uint64(len(l.chains)))
		copy(fs.Values[r*l.dim:], l.row(i))
		fs.Chains[r], fs.Iterations[r] = l.chains[i], l.iters[i]
	}
	return fs
}

// restore fills an empty log with a saved tail ending at seq.
func (l *DrawLog) restore(fs *followState, seq uint64) error {
	n := fs.Next - fs.First
	if fs.Next != seq || fs.First > fs.Next || uint64(len(fs.Chains)) != n || uint64(len(fs.Iterations)) != n ||
		uint64(len(fs.Values)) != n*uint64(l.dim) {
		return errors.New("session: state's follow section is inconsistent")
	}
	skip := uint64(0)
	if n > uint64(l.capRows) { // a smaller buffer here than where it was written
		skip = n - uint64(l.capRows)
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	l.first, l.next = fs.First+skip, fs.First+skip
	for uint64(len(l.chains)) < n-skip { // the ring grows as it fills
		l.grow()
	}
	for r := skip; r < n; r++ {
		i := int(l.next % uint64(len(l.chains)))
		copy(l.row(i), fs.Values[r*uint64(l.dim):(r+1)*uint64(l.dim)])
		l.chains[i], l.iters[i] = fs.Chains[r], fs.Iterations[r]
		l.next++
	}
	return nil
}

// atBoundary reports whether the session is where a checkpoint may be
// taken: before its first request, or right after a completed kernel step.
func (s *Session) atBoundary(r *run) bool {
	return s.requestID == 0 || (r.stepDone && s.phase == len(s.phases))
}

// checkpointDue writes a checkpoint at a step boundary when the policy
// asks for one, or when the server asked the session to suspend; it then
// reports the suspension as the session's outcome.
func (s *Session) checkpointDue(r *run) (outcome, bool) {
	if !s.checkpointing() || !s.atBoundary(r) {
		return outcome{}, false
	}
	cp := s.persist.cp
	steps := int64(s.kernel.Steps())
	due := r.suspend || s.requestID == 0 && !s.persist.resumed ||
		r.stepDone && cp.EverySteps > 0 && steps%cp.EverySteps == 0 ||
		cp.Every > 0 && time.Since(s.persist.lastSave) >= cp.Every
	if !due || (s.requestID == 0 && s.persist.resumed) {
		return outcome{}, false
	}
	r.stepDone = false
	// The checkpoint holds every draw sent so far: send the pending ones
	// first.
	if err := s.flush(r, nil); err != nil { // full values: a resumed client holds no points
		return broken(err), true
	}
	s.save(nil)
	if r.suspend {
		return outcome{reason: Shutdown, msg: "suspended at a checkpoint", err: ErrSuspended, quiet: true}, true
	}
	return outcome{}, false
}

// save writes a checkpoint; a state that cannot be encoded is not written
// (the previous checkpoint stands) and is reported through Save as an
// empty checkpoint with Seq 0.
func (s *Session) save(fin *Finished) {
	c, err := s.snapshot(fin)
	s.persist.lastSave = time.Now()
	if err != nil {
		c = Checkpoint{Steps: s.kernel.Steps()}
	}
	s.persist.cp.Save(c)
}

// replay sends a resumed client the kept draws from its next sequence
// number up to the checkpoint.
func (s *Session) replay(r *run) error {
	if !s.persist.resumed || s.log == nil {
		return nil
	}
	from := s.persist.nextSeq
	per := max(1, int(min(int64(1<<20), s.msgBytes/int64(8*s.spec.Dim+24))))
	for from < s.seq {
		d, err := s.log.readKept(from, min(per, int(s.seq-from)))
		if err != nil {
			return err
		}
		if err := r.send(&d); err != nil {
			return err
		}
		from += uint64(d.Rows)
	}
	return nil
}

// readKept returns up to max kept rows from seq from without waiting.
func (l *DrawLog) readKept(from uint64, max int) (Draws, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	if from < l.first || from >= l.next {
		return Draws{}, fmt.Errorf("%w: %d is outside the kept %d..%d", ErrNotResumable, from, l.first, l.next)
	}
	n := int(min(l.next-from, uint64(max)))
	d := Draws{Seq: from, Rows: n, Dim: l.dim, Values: make([]float64, n*l.dim), Chains: make([]int, n), Iterations: make([]int64, n)}
	for r := range n {
		i := int((from + uint64(r)) % uint64(len(l.chains)))
		copy(d.Values[r*l.dim:], l.row(i))
		d.Chains[r], d.Iterations[r] = l.chains[i], l.iters[i]
	}
	return d, nil
}

// skipSent trims a block of draws to the rows a resumed client does not
// have yet; ok is false when it has them all.
func (s *Session) skipSent(d *Draws) (*Draws, bool) {
	next := s.persist.nextSeq
	if d.Seq+uint64(d.Rows) <= next {
		return nil, false
	}
	if d.Seq >= next {
		return d, true
	}
	// Only a resumed session's first draws are trimmed; they carry full
	// values (sendDraws makes no references before the client caught up).
	k := int(next - d.Seq)
	s.trimmed = Draws{Seq: next, Rows: d.Rows - k, Dim: d.Dim, Values: d.Values[k*d.Dim:], Chains: d.Chains[k:], Iterations: d.Iterations[k:]}
	return &s.trimmed, true
}

// newSmallFrom allocates the second probe of p, to be overwritten by a
// saved state.
func newSmallFrom(p *curvatureProbe) *diag.CurvatureProbe {
	return diag.NewSmallestCurvature(p.theta, nil, nil, p.eps, 1)
}

// ErrLogSuspended is returned by DrawLog.Read, once every kept row from
// the requested sequence number on has been read, when the session stopped
// without finishing (its client went away, or the server is shutting
// down): it continues in another log once its client resumes it.
var ErrLogSuspended = errors.New("session: session suspended; it continues when its client resumes it")

// suspend marks the log's session stopped without finishing.
func (l *DrawLog) suspend() {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.done || l.suspended {
		return
	}
	l.suspended = true
	close(l.wake)
	l.wake = make(chan struct{})
}

// StateInfo is what Describe reads of an encoded state.
type StateInfo struct {
	ID, Token string
	// Finished is set for a finished session's last checkpoint.
	Finished bool
}

// Describe reads a state's session id, token and whether it finished,
// without rebuilding the session.
func Describe(state []byte) (StateInfo, error) {
	if len(state) < len(stateMagic)+1 || string(state[:len(stateMagic)]) != stateMagic || state[len(stateMagic)] != stateVersion {
		return StateInfo{}, errors.New("session: not a session state of this version")
	}
	var secs []section
	if err := gobRead(state[len(stateMagic)+1:], &secs); err != nil {
		return StateInfo{}, fmt.Errorf("session: state: %w", err)
	}
	for _, sec := range secs {
		if sec.Name == "session" {
			var st sessionState
			if err := gobRead(sec.Data, &st); err != nil {
				return StateInfo{}, fmt.Errorf("session: state section session: %w", err)
			}
			return StateInfo{ID: st.ID, Token: st.Token, Finished: st.Finished != nil}, nil
		}
	}
	return StateInfo{}, errors.New("session: state lacks its session section")
}

// tunerState is the "tuner" section: the metric adaptation and the
// automatic settings in the middle of burn-in (adapt.go), so that a
// session restored between two window ends pools the same draws into the
// same window and estimates the same metric. Metrics and the accumulator
// use their own codecs (nil: none).
type tunerState struct {
	Window        int
	Cov           []byte
	Metric        []byte
	UpdatedAt     int64
	Updates       int
	Lambda        float64
	M, BigM       float64
	Choices       []Choice
	ProbeEvals    int64
	Probes        int
	PrevMetric    []byte
	PrevUpdatedAt int64
	PrevLambda    float64
	Reverted      int
}

// marshalMetric encodes m (nil stays nil).
func marshalMetric(m *kernels.Metric) ([]byte, error) {
	if m == nil {
		return nil, nil
	}
	return m.MarshalBinary()
}

// unmarshalMetric decodes a metric of dimension dim (nil stays nil).
func unmarshalMetric(b []byte, dim int) (*kernels.Metric, error) {
	if b == nil {
		return nil, nil
	}
	m, err := kernels.UnmarshalMetric(b)
	if err == nil && m.Dim() != dim {
		err = fmt.Errorf("metric of dimension %d, want %d", m.Dim(), dim)
	}
	return m, err
}

func (t *tuner) state() (tunerState, error) {
	st := tunerState{Window: t.window, UpdatedAt: t.updatedAt, Updates: t.updates, Lambda: t.lambda, M: t.m, BigM: t.bigM,
		Choices: t.choices, ProbeEvals: t.probeEvals, Probes: t.probes, PrevUpdatedAt: t.prevUpdatedAt,
		PrevLambda: t.prevLambda, Reverted: t.reverted}
	var err error
	if t.cov != nil {
		if st.Cov, err = t.cov.MarshalBinary(); err != nil {
			return st, err
		}
	}
	if st.Metric, err = marshalMetric(t.metric); err != nil {
		return st, err
	}
	st.PrevMetric, err = marshalMetric(t.prevMetric)
	return st, err
}

// restore applies a saved tuner state to the tuner New built from the
// same spec.
func (t *tuner) restore(st *tunerState, dim int) error {
	bad := func(err error) error { return fmt.Errorf("session: state's tuner: %w", err) }
	if st.Window < 0 || st.Window > len(t.ends) || st.Updates < 0 || st.Probes < 0 || st.ProbeEvals < 0 {
		return errors.New("session: state's tuner section is inconsistent")
	}
	m, err := unmarshalMetric(st.Metric, dim)
	if err != nil {
		return bad(err)
	}
	prev, err := unmarshalMetric(st.PrevMetric, dim)
	if err != nil {
		return bad(err)
	}
	t.cov = nil
	if st.Cov != nil {
		c := &kernels.Covariance{}
		if err := c.UnmarshalBinary(st.Cov); err != nil {
			return bad(err)
		}
		if c.Dim() != dim {
			return bad(fmt.Errorf("accumulator of dimension %d, want %d", c.Dim(), dim))
		}
		t.cov = c
	}
	t.window, t.metric, t.updatedAt, t.updates, t.lambda = st.Window, m, st.UpdatedAt, st.Updates, st.Lambda
	t.m, t.bigM, t.choices, t.probeEvals, t.probes = st.M, st.BigM, st.Choices, st.ProbeEvals, st.Probes
	t.prevMetric, t.prevUpdatedAt, t.prevLambda, t.reverted = prev, st.PrevUpdatedAt, st.PrevLambda, st.Reverted
	return nil
}

// lanczosState is a tuner probe's phase state. A checkpoint is taken only
// when every phase is complete, so a probe is saved either before it
// started (the first checkpoint) or finished, its result already applied
// to the tuner and the kernel.
type lanczosState struct {
	Kind     string // "lanczos"
	Finished bool
	Evals    int
}

func (pr *lanczosProbe) marshal() ([]byte, error) {
	if !pr.finished && pr.evals > 0 {
		return nil, errors.New("session: a curvature probe in progress cannot be checkpointed")
	}
	return gobBytes(lanczosState{Kind: "lanczos", Finished: pr.finished, Evals: pr.evals})
}

func (pr *lanczosProbe) unmarshal(b []byte) error {
	var st lanczosState
	if err := gobRead(b, &st); err != nil || st.Kind != "lanczos" {
		return fmt.Errorf("session: state's tuner probe: not a probe state (%v)", err)
	}
	if st.Finished {
		pr.finished, pr.evals = true, st.Evals
	}
	return nil
}
