package server

import (
	"context"
	"errors"
	"os"
	"time"

	"go.uber.org/zap"

	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
	"sluice/server/store"
)

// StateOptions configure checkpoints, Resume and the suspension of
// sessions whose client stopped answering (suspend.go). With a nil Store
// the server keeps no state: sessions end with their stream, a silent
// client's session ends FAILED, and Resume is answered UNAVAILABLE.
type StateOptions struct {
	// Store keeps the checkpoints (store.OpenFile or store.OpenPostgres);
	// the server closes it neither on Shutdown nor on Stop.
	Store store.Store
	// Every writes a checkpoint at the first step boundary after this much
	// wall time since the last (0 means 30 seconds; negative: not by time).
	// Register.checkpoint_every_steps adds checkpoints by step count.
	Every time.Duration
	// Retention is how long the state of a finished or abandoned session
	// is kept after its last checkpoint (0 means 24 hours); a sweep
	// removes older records every Retention/8 (between a second and an
	// hour).
	Retention time.Duration
	// Replica names this server as the holder of its sessions' leases
	// (default: the host name). A server restarted with the same name
	// takes its sessions back at once; another replica waits for the
	// lease to expire.
	Replica string
	// Lease is how long a session's lease lasts (0 means 2 minutes). A
	// running session renews it every Lease/3, whether or not it writes
	// checkpoints, and every checkpoint renews it too; a session whose
	// lease another replica took, or whose lease passed by this server's
	// clock without a renewal, is stopped (its client gets UNAVAILABLE
	// and resumes it where it now lives).
	Lease time.Duration
	// SuspendGrace is how long a session whose client stopped answering
	// (Limits.AnswerTimeout) stays resumable (0 means DefaultSuspendGrace;
	// more than Retention is cut to Retention). See suspend.go.
	SuspendGrace time.Duration
}

// DefaultSuspendGrace is StateOptions.SuspendGrace's default: long enough
// for a batch job whose client was preempted or stalled to be requeued and
// resume, short next to the default retention.
const DefaultSuspendGrace = time.Hour

func (o StateOptions) withDefaults() StateOptions {
	if o.Every == 0 {
		o.Every = 30 * time.Second
	}
	if o.Every < 0 {
		o.Every = 0
	}
	if o.Retention <= 0 {
		o.Retention = 24 * time.Hour
	}
	if o.Replica == "" {
		o.Replica, _ = os.Hostname()
		if o.Replica == "" {
			o.Replica = "sluice"
		}
	}
	if o.Lease <= 0 {
		o.Lease = 2 * time.Minute
	}
	if o.SuspendGrace <= 0 {
		o.SuspendGrace = DefaultSuspendGrace
	}
	o.SuspendGrace = min(o.SuspendGrace, o.Retention)
	return o
}

// liveSession is a session running on a stream of this server.
type liveSession struct {
	token  string
	cancel context.CancelFunc
	done   chan struct{} // closed when its handler is done with it
}

// storeTimeout bounds one store call.
const storeTimeout = 30 * time.Second

// takeoverWait bounds how long a Resume waits for the stream it replaces
// to end.
const takeoverWait = time.Minute

// goLive records a running session so that a Resume from another stream
// can end it; lv is the entry a Resume already made.
func (s *Server) goLive(id string, sess *session.Session, cancel context.CancelFunc, lv *liveSession) *liveSession {
	s.mu.Lock()
	defer s.mu.Unlock()
	if lv == nil {
		lv = &liveSession{done: make(chan struct{})}
	}
	lv.token, lv.cancel = sess.Token(), cancel
	s.live[id] = lv
	return lv
}

func (s *Server) leave(id string, lv *liveSession) {
	s.mu.Lock()
	if s.live[id] == lv {
		delete(s.live, id)
	}
	s.mu.Unlock()
	close(lv.done)
}

// persistTo makes sess write its checkpoints to the store, under this
// replica's lease, and returns the lease (nil without a store); a
// finished session's last checkpoint releases it. cancel stops the
// session when its lease is lost.
func (s *Server) persistTo(ctx context.Context, sess *session.Session, cancel context.CancelFunc) *lease {
	st := s.opts.State.withDefaults()
	if st.Store == nil {
		return nil
	}
	id := sess.ID()
	log := s.log.With(zap.String("session", id))
	l := &lease{store: st.Store, id: id, owner: st.Replica, length: st.Lease, log: log, cancel: cancel,
		held: true, until: time.Now().Add(st.Lease), stopc: make(chan struct{}), done: make(chan struct{})}
	sess.SetCheckpoints(session.Checkpoints{Every: st.Every, Save: func(c session.Checkpoint) {
		if c.State == nil {
			log.Error("checkpoint could not be encoded; the previous one stands", zap.Int("step", c.Steps))
			return
		}
		rec := store.Record{State: c.State, Seq: c.Seq, Owner: st.Replica, LeaseUntil: time.Now().Add(st.Lease)}
		if c.Final {
			rec.LeaseUntil = time.Time{}
		}
		sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), storeTimeout)
		defer cancel()
		l.mu.Lock()
		defer l.mu.Unlock()
		if c.Final {
			l.held = false // no renewal may follow the release
		}
		t := time.Now()
		err := st.Store.Put(sctx, id, rec)
		switch {
		case errors.Is(err, store.ErrConflict):
			l.loseLocked("checkpoint refused: another replica holds the session")
			return
		case err != nil:
			log.Warn("checkpoint not written", zap.Int("step", c.Steps), zap.Error(err))
			return
		}
		if !c.Final {
			l.until = rec.LeaseUntil
		}
		s.opts.Metrics.Checkpoint(time.Since(t), len(c.State))
		log.Debug("checkpoint written", zap.Int("step", c.Steps), zap.Int("bytes", len(c.State)), zap.Bool("final", c.Final))
	}})
	go l.renew()
	return l
}

// notFound is the one answer to a Resume or Follow whose session is
// unknown or whose token is wrong: the two are indistinguishable.
func notFound() error {
	return problem(unknownSession, "session_id", "no session with this id and token here")
}

// resume implements the Resume variant of the Session rpc's first frame.
func (s *Server) resume(stream sluicev1.SluiceService_SessionServer, r *sluicev1.Resume) error {
	st := s.opts.State.withDefaults()
	if st.Store == nil {
		return problem(draining, "", "this server keeps no session state (sluice serve --state-dir or --state-postgres): nothing to resume")
	}
	id, token := r.GetSessionId(), r.GetToken()
	if id == "" || len(id) > store.MaxIDBytes || token == "" {
		return notFound()
	}
	// A session still running here: its stream ends, this one wins.
	s.mu.Lock()
	if s.draining {
		s.mu.Unlock()
		return problem(draining, "", "server shutting down")
	}
	old := s.live[id]
	s.mu.Unlock()
	if old != nil {
		if !SessionTokenEqual(token, old.token) {
			return notFound()
		}
		old.cancel()
		select {
		case <-old.done:
		case <-time.After(takeoverWait):
			return problem(draining, "", "the session's previous stream is still ending; retry")
		case <-stream.Context().Done():
			return toStatus(stream.Context().Err())
		}
	}
	ctx, cancel := context.WithTimeout(stream.Context(), storeTimeout)
	defer cancel()
	rec, err := st.Store.Get(ctx, id)
	if errors.Is(err, store.ErrNotFound) {
		return notFound()
	}
	if err != nil {
		s.log.Warn("checkpoint store", zap.String("session", id), zap.Error(err))
		return problem(draining, "", "the checkpoint store is not available; retry")
	}
	if info, err := session.Describe(rec.State); err == nil && info.ID == id && SessionTokenEqual(token, info.Token) && s.expired(rec, info) {
		s.mu.Lock()
		s.unsuspendLocked(id)
		s.mu.Unlock()
		s.dropExpired(ctx, id, rec.Updated)
		return notFound()
	}
	sess, err := session.Restore(rec.State, s.opts.Limits)
	if err != nil {
		s.log.Error("checkpoint cannot be restored", zap.String("session", id), zap.Error(err))
		return notFound()
	}
	if sess.ID() != id || !SessionTokenEqual(token, sess.Token()) {
		return notFound()
	}
	if err := sess.ResumeAt(r.GetNextSeq()); err != nil {
		return problem(outsideLog, "resume.next_seq", "%v", err)
	}
	// Take the lease: refused while another replica holds a live one.
	rec.Owner, rec.LeaseUntil = st.Replica, time.Now().Add(st.Lease)
	if err := st.Store.Put(ctx, id, rec); err != nil {
		if errors.Is(err, store.ErrConflict) {
			return problem(draining, "", "session %s is held by another server; retry after its lease (%v) expires", id, st.Lease)
		}
		return problem(draining, "", "the checkpoint store is not available; retry")
	}
	s.mu.Lock()
	s.unsuspendLocked(id) // suspended here: no longer
	s.mu.Unlock()
	budget, err := session.Need(sess.Spec(), s.opts.Limits)
	if err != nil {
		return toStatus(err)
	}
	if !s.mem.reserve(budget.Total) {
		return s.memoryRefusal(budget)
	}
	reserved := budget.Total // what is left to release when the handler returns
	defer func() { s.mem.release(reserved) }()
	s.log.Info("session resumed", zap.String("session", id), zap.Uint64("next_seq", r.GetNextSeq()))
	return s.serveSession(stream, sess, nil, &reserved)
}

// followable returns the followed log of session id when token is its
// token. A session this server keeps state for but is not running (its
// client has not resumed it yet) gives UNAVAILABLE; anything else the one
// NOT_FOUND.
func (s *Server) followable(ctx context.Context, id, token string) (*followed, error) {
	s.mu.Lock()
	f, ok := s.logs[id]
	s.mu.Unlock()
	if ok {
		if !SessionTokenEqual(token, f.token) {
			return nil, notFound()
		}
		return f, nil
	}
	st := s.opts.State
	if st.Store == nil || id == "" || len(id) > store.MaxIDBytes || token == "" {
		return nil, notFound()
	}
	ctx, cancel := context.WithTimeout(ctx, storeTimeout)
	defer cancel()
	rec, err := st.Store.Get(ctx, id)
	if err != nil {
		return nil, notFound()
	}
	info, err := session.Describe(rec.State)
	if err != nil || !SessionTokenEqual(token, info.Token) || s.expired(rec, info) {
		return nil, notFound()
	}
	return nil, problem(draining, "", "session %s is suspended; it continues when its client resumes it", id)
}

// startSweep runs the store's sweep every Retention/8 (at most hourly)
// until Shutdown or Stop.
func (s *Server) startSweep() {
	if s.opts.State.Store == nil {
		return
	}
	st := s.opts.State.withDefaults()
	every := max(min(st.Retention/8, time.Hour), time.Second)
	go func() {
		t := time.NewTicker(every)
		defer t.Stop()
		for {
			select {
			case <-s.sweeper:
				return
			case <-t.C:
			}
			ctx, cancel := context.WithTimeout(context.Background(), storeTimeout)
			n, err := st.Store.Sweep(ctx, time.Now().Add(-st.Retention))
			cancel()
			if err != nil {
				s.log.Warn("sweep of old checkpoints failed", zap.Error(err))
			} else if n > 0 {
				s.log.Info("old checkpoints removed", zap.Int("sessions", n))
			}
		}
	}()
}

// stopSweep ends the sweep loop; s.mu is held.
func (s *Server) stopSweep() {
	select {
	case <-s.sweeper:
	default:
		close(s.sweeper)
	}
}
