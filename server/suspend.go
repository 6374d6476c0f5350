package server

import (
	"context"
	"errors"
	"sync"
	"time"

	"go.uber.org/zap"

	"sluice/server/metrics"
	"sluice/server/session"
	"sluice/server/store"
)

// Sessions whose client stops answering, and the leases that keep one
// replica running each session.
//
// A registered client that does not answer a request within
// Limits.AnswerTimeout has its session suspended when the server keeps
// state (StateOptions.Store): the engine stops without finishing it (no
// Finished frame, no final checkpoint), its latest checkpoint (a step
// boundary at or before the unanswered request) stands, its lease is
// released so that any replica may take it, and its stream ends with
// UNAVAILABLE, which the clients resume after by themselves. Its slot and
// memory budget are freed as the handler returns. For
// StateOptions.SuspendGrace after the release, a Resume with the
// session's token continues it from that checkpoint; the client gives the
// next sequence number it expects, so it sees no gap and no duplicate, and
// is asked again for the points after the checkpoint. After the grace the
// session is expired: its state is deleted (by a timer on the replica that
// suspended it, or by the first Resume that finds it expired, so the grace
// holds across restarts) and Resume and Follow get the one NOT_FOUND.
//
// A suspended record is recognised in the store by its released lease
// (LeaseUntil zero) on a session that has not finished: a running session
// always holds a lease, and only a finished session's last checkpoint is
// otherwise written without one. The grace counts from the record's
// Updated time, the store's clock at the release.
//
// Without a store nothing can be resumed: the session ends with reason
// FAILED and DEADLINE_EXCEEDED naming evaluations, saying that the answer
// timeout passed and that the server keeps no session state.

// lease is a running session's hold on its record: renewed every
// length/3 on a timer of its own (and by every checkpoint), released when
// the session is suspended, given up with the final checkpoint.
type lease struct {
	store  store.Store
	id     string
	owner  string
	length time.Duration
	log    *zap.Logger
	cancel context.CancelFunc // stops the session when the lease is lost

	mu    sync.Mutex
	held  bool      // false once released, given up or lost
	until time.Time // the lease as last written, by this server's clock
	lost  bool      // another replica holds the session now

	stopc chan struct{}
	done  chan struct{}
	once  sync.Once
}

// renew runs until stop: every length/3 it extends the lease.
func (l *lease) renew() {
	defer close(l.done)
	t := time.NewTicker(max(l.length/3, time.Millisecond))
	defer t.Stop()
	for {
		select {
		case <-l.stopc:
			return
		case <-t.C:
		}
		if !l.renewOnce() {
			return
		}
	}
}

// renewOnce extends the lease; false when it is no longer held.
func (l *lease) renewOnce() bool {
	l.mu.Lock()
	defer l.mu.Unlock()
	if !l.held {
		return false
	}
	ctx, cancel := context.WithTimeout(context.Background(), min(storeTimeout, l.length/3+time.Second))
	defer cancel()
	until := time.Now().Add(l.length)
	err := l.store.Renew(ctx, l.id, l.owner, until)
	switch {
	case err == nil:
		l.until = until
		l.log.Debug("lease renewed", zap.Time("until", until))
	case errors.Is(err, store.ErrNotFound):
		// The first checkpoint has not been written (or failed): nothing
		// to hold yet.
	case errors.Is(err, store.ErrConflict):
		l.loseLocked("lease renewal refused: another replica holds the session")
		return false
	default:
		l.log.Warn("lease not renewed", zap.Error(err), zap.Time("lease_until", l.until))
		if time.Now().After(l.until) {
			l.loseLocked("the session's lease passed without a renewal")
			return false
		}
	}
	return true
}

// loseLocked stops the session: another replica may run it now. l.mu is
// held.
func (l *lease) loseLocked(why string) {
	if l.lost {
		return
	}
	l.held, l.lost = false, true
	l.log.Warn("session stopped: lease lost", zap.String("why", why))
	l.cancel()
}

// stop ends the renewals and waits for the last to finish.
func (l *lease) stop() {
	if l == nil {
		return
	}
	l.once.Do(func() { close(l.stopc) })
	<-l.done
}

// isLost reports whether the session was stopped for its lease.
func (l *lease) isLost() bool {
	if l == nil {
		return false
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.lost
}

// release gives the lease up so that any replica may take the session,
// and returns the record as released (its Updated starts the grace).
func (l *lease) release(ctx context.Context) (store.Record, error) {
	if l == nil {
		return store.Record{}, errors.New("the session has no lease")
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	if !l.held {
		return store.Record{}, errors.New("the session's lease is not held here")
	}
	l.held = false
	if err := l.store.Renew(ctx, l.id, l.owner, time.Time{}); err != nil {
		return store.Record{}, err
	}
	return l.store.Get(ctx, l.id)
}

// suspension is a session this server suspended, until it is resumed or
// its grace passes.
type suspension struct {
	token   string
	updated time.Time // the released record's Updated
	timer   *time.Timer
}

// onSilent is called when a registered client did not answer a request
// within Limits.AnswerTimeout; err is the engine's error (ErrSilent when
// the session was checkpointed and is suspended). It returns the status
// the client is told and whether the session was suspended.
func (s *Server) onSilent(sess *session.Session, res session.Result, err error, l *lease) (error, bool) {
	id := sess.ID()
	log := s.log.With(zap.String("session", id))
	fields := []zap.Field{zap.Duration("answer_timeout", s.answerTimeout()),
		zap.Int64("draws", res.Finished.Progress.DrawsSent), zap.Int("chains", sess.Spec().Chains)}
	if !errors.Is(err, session.ErrSilent) {
		log.Info("client silent: session ended (no state store: --state-dir or --state-postgres would suspend it)", fields...)
		return err, false
	}
	st := s.opts.State.withDefaults()
	ctx, cancel := context.WithTimeout(context.Background(), storeTimeout)
	defer cancel()
	rec, rerr := l.release(ctx)
	if rerr != nil {
		// The lease runs out by itself; the session stays resumable
		// like an abandoned one, until the retention.
		log.Warn("client silent: session suspended, its lease not released", append(fields, zap.Error(rerr))...)
		return problem(suspended, "evaluations", "%v; the session was suspended at its latest checkpoint: resume it with its id and token", err), true
	}
	sp := &suspension{token: sess.Token(), updated: rec.Updated}
	s.mu.Lock()
	if old := s.suspended[id]; old != nil {
		old.timer.Stop()
	} else {
		s.opts.Metrics.AddSessions(metrics.Detached, 1)
	}
	s.suspended[id] = sp
	sp.timer = time.AfterFunc(st.SuspendGrace, func() { s.expire(id, sp) })
	s.mu.Unlock()
	log.Info("client silent: session suspended", append(fields, zap.Duration("grace", st.SuspendGrace), zap.Uint64("checkpoint_seq", rec.Seq))...)
	return problem(suspended, "evaluations", "%v; the session was suspended at its latest checkpoint: resume it with its id and token within %v",
		err, st.SuspendGrace), true
}

// unsuspend forgets id's suspension here (it was resumed); s.mu is held.
func (s *Server) unsuspendLocked(id string) {
	if sp := s.suspended[id]; sp != nil {
		sp.timer.Stop()
		delete(s.suspended, id)
		s.opts.Metrics.AddSessions(metrics.Detached, -1)
	}
}

// expire ends a suspension whose grace passed: its draw log is dropped and
// its record deleted, unless the session was resumed meanwhile (here or
// by another replica: the record was written since the release).
func (s *Server) expire(id string, sp *suspension) {
	s.mu.Lock()
	if s.suspended[id] != sp {
		s.mu.Unlock()
		return
	}
	delete(s.suspended, id)
	s.opts.Metrics.AddSessions(metrics.Detached, -1)
	_, running := s.active[id]
	var f *followed
	if !running {
		f = s.logs[id]
		delete(s.logs, id)
		s.maybeIdle()
	}
	s.mu.Unlock()
	if f != nil {
		s.mem.release(f.reserved)
	}
	if running {
		return
	}
	ctx, cancel := context.WithTimeout(context.Background(), storeTimeout)
	defer cancel()
	s.dropExpired(ctx, id, sp.updated)
}

// dropExpired deletes the record of a suspended session whose grace
// passed, written at updated, only if it is still that record with its
// lease released (store.DeleteReleased, one step): a replica that resumed
// or wrote it since keeps it.
func (s *Server) dropExpired(ctx context.Context, id string, updated time.Time) {
	st := s.opts.State.withDefaults()
	done, err := st.Store.DeleteReleased(ctx, id, updated)
	if err != nil {
		s.log.Warn("expired session's checkpoint not deleted", zap.String("session", id), zap.Error(err))
		return
	}
	if !done {
		return // gone, or resumed or written since the release
	}
	s.log.Info("suspended session expired: its client did not resume it within the grace; state deleted",
		zap.String("session", id), zap.Duration("grace", st.SuspendGrace))
}

// expired reports whether rec, whose state info describes, is a
// suspended session (released lease, not finished) whose grace has
// passed.
func (s *Server) expired(rec store.Record, info session.StateInfo) bool {
	st := s.opts.State.withDefaults()
	return rec.LeaseUntil.IsZero() && !info.Finished && time.Since(rec.Updated) >= st.SuspendGrace
}

// stopSuspensions stops the expiry timers (Stop, Shutdown): a server
// started later on the same store expires them on Resume.
func (s *Server) stopSuspensionsLocked() {
	for _, sp := range s.suspended {
		sp.timer.Stop()
	}
}
