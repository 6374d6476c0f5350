package server

import (
	"errors"
	"io"
	"time"

	"go.uber.org/zap"

	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
)

// The deadlines that free a server's slots: a new stream must send its
// Register frame within Options.RegisterTimeout, and waits for it
// outside the session slots (with its own cap, Options.MaxRegistering);
// Shutdown ends such streams at once. A registered client that stops
// answering is ended after Limits.AnswerTimeout (onSilent).

// awaitRegister waits for a stream's first frame, within the register
// deadline, holding a registering token (not a session slot).
func (s *Server) awaitRegister(stream sluicev1.SluiceService_SessionServer) (*sluicev1.SessionRequest, error) {
	select {
	case s.registering <- struct{}{}:
		defer func() { <-s.registering }()
	default:
		return nil, problem(busy, "", "server busy: %d streams are waiting to register", cap(s.registering))
	}
	type received struct {
		f   *sluicev1.SessionRequest
		err error
	}
	// The receive ends when the frame comes or when the stream does
	// (the handler's return cancels it), so this goroutine never leaks.
	c := make(chan received, 1)
	go func() {
		f, err := stream.Recv()
		c <- received{f, err}
	}()
	t := time.NewTimer(s.opts.RegisterTimeout)
	defer t.Stop()
	select {
	case r := <-c:
		if errors.Is(r.err, io.EOF) {
			return nil, problem(badInput, "register", "stream closed before the first frame")
		}
		if r.err != nil {
			return nil, toStatus(recvError("register", r.err))
		}
		return r.f, nil
	case <-t.C:
		return nil, problem(noAnswer, "register", "no register frame within %v of opening the stream", s.opts.RegisterTimeout)
	case <-s.quit:
		return nil, problem(draining, "", "server shutting down")
	}
}

// onSilent is called when a registered client did not answer a request
// within Limits.AnswerTimeout: the session has ended (its slot and memory
// are freed as the handler returns) and err, the engine's Timeout error,
// is what the client is told. A server that can checkpoint sessions
// suspends the session here instead, so that the client can resume it.
func (s *Server) onSilent(id string, sess *session.Session, res session.Result, err error) error {
	s.log.Info("client silent: session ended", zap.String("session", id), zap.Duration("answer_timeout", s.answerTimeout()),
		zap.Int64("draws", res.Finished.Progress.DrawsSent), zap.Int("chains", sess.Spec().Chains))
	return err
}

// answerTimeout is the answer timeout sessions run with.
func (s *Server) answerTimeout() time.Duration {
	if t := s.opts.Limits.AnswerTimeout; t > 0 {
		return t
	}
	return session.DefaultAnswerTimeout
}

// memoryRefusal is the status of a session whose worst case does not fit
// what the server's memory budget has left.
func (s *Server) memoryRefusal(b session.Budget) error {
	big := b.Largest()
	return problem(tooLarge, big.Field, "this session needs %s at worst (%s); the server has %s left of its %s",
		session.Bytes(b.Total), big.What, session.Bytes(max(0, s.mem.left())), session.Bytes(s.mem.total))
}

// Registering returns the number of streams waiting for their Register
// frame.
func (s *Server) Registering() int { return len(s.registering) }
