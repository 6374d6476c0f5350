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
// answering for Limits.AnswerTimeout has its session suspended, or ended
// when the server keeps no state (onSilent, suspend.go).

// awaitRegister waits for a stream's first frame, within the register
// deadline, holding a registering token (not a session slot).
func (s *Server) awaitRegister(stream sluicev1.SluiceService_SessionServer) (*sluicev1.SessionRequest, error) {
	select {
	case s.registering <- struct{}{}:
		defer func() { <-s.registering }()
	default:
		s.log.Info("stream refused: too many waiting to register", zap.Int("max_registering", cap(s.registering)))
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
		s.log.Info("stream refused: no register frame in time", zap.Duration("register_timeout", s.opts.RegisterTimeout))
		return nil, problem(noAnswer, "register", "no register frame within %v of opening the stream", s.opts.RegisterTimeout)
	case <-s.quit:
		return nil, problem(draining, "", "server shutting down")
	}
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
	s.log.Info("session refused: memory budget", zap.Int64("needs", b.Total), zap.String("largest", big.What),
		zap.Int64("left", max(0, s.mem.left())), zap.Int64("max_memory_bytes", s.mem.total))
	return problem(tooLarge, big.Field, "this session needs %s at worst (%s); the server has %s left of its %s",
		session.Bytes(b.Total), big.What, session.Bytes(max(0, s.mem.left())), session.Bytes(s.mem.total))
}

// Registering returns the number of streams waiting for their Register
// frame.
func (s *Server) Registering() int { return len(s.registering) }
