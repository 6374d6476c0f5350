package server_test

import (
	"context"
	"math"
	"net"
	"sync"
	"sync/atomic"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"
	"google.golang.org/grpc/test/bufconn"

	"sluice/client"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server"
	"sluice/server/session"
	"sluice/server/store"
)

// switchable is a client connection whose dialer reaches whichever
// in-process server is current.
type switchable struct {
	cur atomic.Pointer[bufconn.Listener]
}

func (s *switchable) conn(t *testing.T) *grpc.ClientConn {
	cc, err := grpc.NewClient("passthrough:///bufnet",
		grpc.WithContextDialer(func(ctx context.Context, _ string) (net.Conn, error) { return s.cur.Load().DialContext(ctx) }),
		grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = cc.Close() })
	return cc
}

func serveOn(t *testing.T, o server.Options) (*server.Server, *bufconn.Listener) {
	lis := bufconn.Listen(1 << 20)
	srv := server.New(o)
	done := make(chan struct{})
	go func() { _ = srv.Serve(lis); close(done) }()
	t.Cleanup(func() { srv.Stop(); <-done })
	return srv, lis
}

// A graceful shutdown (SIGTERM) of a server that keeps state checkpoints
// the session at its next step boundary and ends its stream with
// UNAVAILABLE instead of finishing it; the client resumes on the next
// server over the same store and gets draws bit-identical to an
// uninterrupted run, each once.
func TestShutdownSuspendsAndClientResumes(t *testing.T) {
	ref := uninterrupted(t)
	st, err := store.OpenFile(t.TempDir())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = st.Close() })
	opts := server.Options{Limits: session.Limits{FollowBuffer: 4096}, State: server.StateOptions{Store: st, Replica: "one"}}
	a, lisA := serveOn(t, opts)
	var sw switchable
	sw.cur.Store(lisA)
	cc := sw.conn(t)
	tg := gaussian2D(t)
	var once sync.Once
	var requests int
	stopped := make(chan struct{})
	eval := func(ctx context.Context, b *client.Batch) error {
		requests++
		if requests == 40 {
			once.Do(func() {
				go func() {
					a.Shutdown(testCtx(t))
					_, lisB := serveOn(t, opts)
					sw.cur.Store(lisB)
					close(stopped)
				}()
			})
		}
		return evaluator(tg)(ctx, b)
	}
	own := newSeqCounter()
	sum, err := client.Run(testCtx(t), cc, survivalSpec(), eval, client.OnDraws(own.add),
		client.WithResume(client.ResumePolicy{Attempts: 100, First: 1e6, MaxWait: 1e8}))
	if err != nil || !collected(sum.Reason) {
		t.Fatalf("session: %v, %+v", err, sum)
	}
	<-stopped
	if sum.Resumes < 1 || !sum.Registered.Resumed {
		t.Fatalf("resumes %d, resumed %v", sum.Resumes, sum.Registered.Resumed)
	}
	lost, dup, differ := own.check(ref, 2)
	if lost != 0 || dup != 0 || differ >= 0 || own.total != len(ref)/2 {
		t.Fatalf("lost %d, duplicated %d, first differing row %d, %d rows", lost, dup, differ, own.total)
	}
	if math.IsNaN(sum.Parameters[0].Mean) {
		t.Fatal("no summary")
	}
}

// A Resume for a session still running on another stream of the same
// server takes it over: the old stream ends with CANCELED, the new one
// gets Registered (resumed) with the same id; a wrong token gets the one
// NOT_FOUND and leaves the session running.
func TestResumeTakesOverALiveSession(t *testing.T) {
	st, err := store.OpenFile(t.TempDir())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = st.Close() })
	_, lis := serveOn(t, server.Options{Limits: session.Limits{FollowBuffer: 4096}, State: server.StateOptions{Store: st}})
	var sw switchable
	sw.cur.Store(lis)
	cc := sw.conn(t)
	c := sluicev1.NewSluiceServiceClient(cc)
	ctx := testCtx(t)
	tg := gaussian2D(t)
	var reg client.Registered
	var requests int
	var newReg *sluicev1.Registered
	var wrongErr error
	eval := func(ectx context.Context, b *client.Batch) error {
		requests++
		if requests == 20 {
			bad, err := c.Session(ctx)
			if err != nil {
				return err
			}
			_ = bad.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Resume{Resume: &sluicev1.Resume{
				SessionId: reg.SessionID, Token: "0123456789abcdef0123456789abcdef"}}})
			_, wrongErr = bad.Recv()
			s, err := c.Session(ctx)
			if err != nil {
				return err
			}
			if err := s.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Resume{Resume: &sluicev1.Resume{
				SessionId: reg.SessionID, Token: reg.Token, NextSeq: 0}}}); err != nil {
				return err
			}
			f, err := s.Recv()
			if err != nil {
				return err
			}
			newReg = f.GetRegistered()
			_ = s.CloseSend()
		}
		return evaluator(tg)(ectx, b)
	}
	_, err = client.Run(ctx, cc, survivalSpec(), eval, client.OnRegistered(func(r *client.Registered) { reg = *r }),
		client.WithResume(client.ResumePolicy{Attempts: -1}))
	if status.Code(wrongErr) != codes.NotFound {
		t.Fatalf("resume with a wrong token: %v, want NOT_FOUND", wrongErr)
	}
	if status.Code(err) != codes.Canceled {
		t.Fatalf("the taken-over stream ended with %v, want CANCELED", err)
	}
	if newReg == nil || newReg.GetSessionId() != reg.SessionID || !newReg.GetResumed() || newReg.GetResumeToken() != reg.Token {
		t.Fatalf("new stream's Registered %+v", newReg)
	}
}
