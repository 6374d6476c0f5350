package server

import (
	"errors"
	"fmt"
	"io"
	"sync"

	"go.uber.org/zap"
	"google.golang.org/protobuf/proto"

	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
)

// attachable is a running session as the Attach rpc finds it.
type attachable struct {
	sess  *session.Session
	token string
}

func (s *Server) openPool(id, token string, sess *session.Session) {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.pools[id] = attachable{sess: sess, token: token}
}

func (s *Server) closePool(id string) {
	s.mu.Lock()
	defer s.mu.Unlock()
	delete(s.pools, id)
}

// Attach implements the Attach rpc: one worker evaluating part of a
// running session's rows. The engine decides which rows the worker gets
// (session.Session.Attach); this handler only carries frames. It owns two
// goroutines: a writer, the stream's only sender, fed by a queue the
// engine fills without blocking (the writer has ended when the handler
// returns), and a reader handing the worker's answers to the engine, which
// ends with the stream.
func (s *Server) Attach(stream sluicev1.SluiceService_AttachServer) error {
	first, err := stream.Recv()
	if errors.Is(err, io.EOF) {
		return problem(badInput, "attach", "stream closed before the first frame")
	}
	if err != nil {
		return toStatus(recvError("attach", err))
	}
	a := first.GetAttach()
	if a == nil {
		return toStatus(session.BadField("attach", "the first frame must be attach"))
	}
	s.mu.Lock()
	target, ok := s.pools[a.GetSessionId()]
	s.mu.Unlock()
	if !ok {
		return problem(unknownSession, "attach.session_id", "no running session %q on this server", a.GetSessionId())
	}
	if !SessionTokenEqual(a.GetToken(), target.token) {
		return problem(wrongToken, "attach.token", "does not match the session's token")
	}
	sess := target.sess
	sp := sess.Spec()
	limit := sess.MessageLimit()
	q := newSendQueue()
	q.push(&sluicev1.AttachResponse{Frame: &sluicev1.AttachResponse_Attached{Attached: &sluicev1.Attached{
		SessionId: sess.ID(), Dim: int32(sp.Dim), MaxMessageBytes: limit, Names: sp.Names}}})
	wrote := make(chan struct{})
	go func() { // writer: the stream's only sender
		defer close(wrote)
		for {
			m, ok := q.pop()
			if !ok {
				return
			}
			if err := stream.Send(m); err != nil {
				q.close()
				return
			}
		}
	}()
	defer func() { q.close(); <-wrote }()
	w, err := sess.Attach(a.GetName(), func(p *session.Points) error {
		// A fresh encoder: the frame's bytes are the queue's, not shared.
		enc := encoder{}
		if !q.push(&sluicev1.AttachResponse{Frame: &sluicev1.AttachResponse_Points{Points: enc.frame(p).GetPoints()}}) {
			return errors.New("server: worker stream closed")
		}
		return nil
	})
	if err != nil {
		return problem(unknownSession, "attach.session_id", "session %q is over", a.GetSessionId())
	}
	log := s.log.With(zap.String("session", sess.ID()), zap.String("worker", a.GetName()))
	log.Info("worker attached")
	read := make(chan error, 1)
	go func() { // reader: owned by this handler, ends with the stream
		for {
			f, err := stream.Recv()
			var ev *session.Evaluations
			switch {
			case err != nil:
				err = recvError("evaluations", err)
			case int64(proto.Size(f)) > limit:
				err = &session.Error{Kind: session.TooLarge, Field: "evaluations", Chain: -1, Coord: -1,
					Reason: fmt.Sprintf("message of %d bytes exceeds the session's limit of %d bytes", proto.Size(f), limit)}
			case f.GetEvaluations() == nil:
				err = session.BadField("frame", "expected evaluations: a worker attaches once")
			default:
				var buf []float64
				m := messageFromWire(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{Evaluations: f.GetEvaluations()}}, &buf)
				err, ev = m.Err, m.Evaluations
			}
			if err != nil {
				w.Leave(err)
				read <- err
				return
			}
			if !w.Answer(ev) {
				read <- nil
				return
			}
		}
	}()
	select {
	case <-w.Done():
		log.Info("worker detached", zap.NamedError("reason", w.Err()))
		return toStatus(w.Err())
	case err := <-read:
		log.Info("worker left", zap.Error(err))
		if _, bad := session.AsError(err); bad {
			return toStatus(err)
		}
		return nil
	}
}

// sendQueue is a worker stream's queue of frames, filled by the engine
// without blocking and drained by the stream's writer.
type sendQueue struct {
	mu     sync.Mutex
	items  []*sluicev1.AttachResponse
	wake   chan struct{}
	closed bool
}

func newSendQueue() *sendQueue { return &sendQueue{wake: make(chan struct{}, 1)} }

// push adds m; false once the queue is closed.
func (q *sendQueue) push(m *sluicev1.AttachResponse) bool {
	q.mu.Lock()
	defer q.mu.Unlock()
	if q.closed {
		return false
	}
	q.items = append(q.items, m)
	select {
	case q.wake <- struct{}{}:
	default:
	}
	return true
}

// pop waits for the next frame; false once the queue is closed.
func (q *sendQueue) pop() (*sluicev1.AttachResponse, bool) {
	for {
		q.mu.Lock()
		if q.closed {
			q.mu.Unlock()
			return nil, false
		}
		if len(q.items) > 0 {
			m := q.items[0]
			q.items[0] = nil
			q.items = q.items[1:]
			q.mu.Unlock()
			return m, true
		}
		q.mu.Unlock()
		<-q.wake
	}
}

func (q *sendQueue) close() {
	q.mu.Lock()
	defer q.mu.Unlock()
	if !q.closed {
		q.closed = true
		close(q.wake)
	}
}

// poolToWire adds the pool's figures to a progress report.
func poolToWire(w *sluicev1.Progress, p *session.PoolReport) {
	w.RowsReissued, w.AnswersLate = p.RowsReissued, p.AnswersLate
	for _, e := range p.Workers {
		w.Workers = append(w.Workers, &sluicev1.WorkerReport{Name: e.Name, Owner: e.Owner, RowsPerSecond: e.RowsPerSecond,
			Rows: e.Rows, RowsReissued: e.Reissued, AnswersLate: e.Late})
	}
}
