package server_test

import (
	"context"
	"errors"
	"fmt"
	"net"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"go.uber.org/goleak"
	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"
	"go.uber.org/zap/zaptest/observer"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"

	"sluice/client"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server"
	"sluice/server/session"
)

// startTCP serves srv on a loopback TCP port and returns its address;
// the server is stopped, and goroutine leaks checked, at cleanup.
func startTCP(t *testing.T, o server.Options) (string, *server.Server) {
	t.Helper()
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	srv := server.New(o)
	done := make(chan struct{})
	go func() { _ = srv.Serve(lis); close(done) }()
	t.Cleanup(func() {
		srv.Stop()
		<-done
		goleak.VerifyNone(t, goleak.IgnoreCurrent())
	})
	return lis.Addr().String(), srv
}

func dialLoop(t *testing.T, addr string) *grpc.ClientConn {
	t.Helper()
	return dialTCP(t, addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
}

// minusX answers ∇log π for π = N(0, I): −x.
func minusX(_ context.Context, b *client.Batch) error {
	for i, x := range b.Points {
		b.Grad[i] = -x
	}
	return nil
}

// waitFor polls cond every 10 ms, at most 12 000 times (two minutes): a
// safety net, not a timing assertion.
func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	for range 12000 {
		if cond() {
			return
		}
		time.Sleep(10 * time.Millisecond)
	}
	t.Fatalf("gave up waiting for %s", what)
}

// One hundred concurrent sessions of 8 chains × 10 coordinates at the
// default options, over loopback TCP: none is refused, none fails, and
// every session receives each of its draws exactly once (sequence
// numbers 0 … 8·draws−1, each once).
func TestHundredConcurrentSessionsAtDefaults(t *testing.T) {
	addr, _ := startTCP(t, server.Options{})
	conns := []*grpc.ClientConn{dialLoop(t, addr), dialLoop(t, addr), dialLoop(t, addr), dialLoop(t, addr)}
	const sessions, dim, chains, draws = 100, 10, 8, 50
	var refused, failed, lost, duplicated atomic.Int64
	var wg sync.WaitGroup
	errs := make(chan error, sessions)
	for i := range sessions {
		wg.Add(1)
		go func() {
			defer wg.Done()
			seen := make([]int, chains*draws)
			var extra int64
			spec := client.Spec{Dim: dim, Chains: chains, Start: make([]float64, dim), Step: 0.1, Seed: uint64(i + 1),
				DrawsPerChain: draws}
			sum, err := client.Run(testCtx(t), conns[i%len(conns)], spec, minusX, client.OnDraws(func(d *client.Draws) {
				for r := range d.Rows {
					if q := d.Seq + uint64(r); q < uint64(len(seen)) {
						seen[q]++
					} else {
						extra++
					}
				}
			}))
			switch {
			case status.Code(err) == codes.ResourceExhausted:
				refused.Add(1)
				return
			case err != nil:
				failed.Add(1)
				errs <- fmt.Errorf("session %d: %w", i, err)
				return
			// Short sessions may end "check failed" (the verdict finds
			// too few effective draws): every draw is still delivered.
			case !collected(sum.Reason):
				failed.Add(1)
				errs <- fmt.Errorf("session %d ended %v", i, sum.Reason)
				return
			}
			duplicated.Add(extra)
			for _, n := range seen {
				switch {
				case n == 0:
					lost.Add(1)
				case n > 1:
					duplicated.Add(int64(n - 1))
				}
			}
		}()
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		t.Error(err)
	}
	t.Logf("%d sessions of %d×%d: %d refused, %d failed, %d draws lost, %d duplicated",
		sessions, chains, dim, refused.Load(), failed.Load(), lost.Load(), duplicated.Load())
	if refused.Load() != 0 || failed.Load() != 0 || lost.Load() != 0 || duplicated.Load() != 0 {
		t.Fatal("want 0 refused, 0 failed, 0 lost, 0 duplicated")
	}
}

// A stream that never sends Register is ended after the register
// deadline with DEADLINE_EXCEEDED naming register.
func TestRegisterDeadline(t *testing.T) {
	addr, _ := startTCP(t, server.Options{RegisterTimeout: 50 * time.Millisecond})
	st, err := sluicev1.NewSluiceServiceClient(dialLoop(t, addr)).Session(testCtx(t))
	if err != nil {
		t.Fatal(err)
	}
	_, err = st.Recv()
	if s := status.Convert(err); s.Code() != codes.DeadlineExceeded || fieldOf(s) != "register" {
		t.Fatalf("silent stream ended with %v (field %q), want DEADLINE_EXCEEDED naming register", err, fieldOf(s))
	}
}

// A thousand streams that never register hold no session slot: with
// room for a single session, a good session registers and finishes while
// they wait; a graceful shutdown then ends them at once (it returns
// before its two-minute deadline, which would otherwise close them hard),
// each with UNAVAILABLE.
func TestUnregisteredStreamsHoldNoSlotAndDoNotDelayShutdown(t *testing.T) {
	addr, srv := startTCP(t, server.Options{MaxSessions: 1, RegisterTimeout: 10 * time.Minute})
	ctx := testCtx(t)
	const idle = 1000
	var streams []sluicev1.SluiceService_SessionClient
	conns := []*grpc.ClientConn{dialLoop(t, addr), dialLoop(t, addr), dialLoop(t, addr), dialLoop(t, addr)}
	for i := range idle {
		st, err := sluicev1.NewSluiceServiceClient(conns[i%len(conns)]).Session(ctx)
		if err != nil {
			t.Fatal(err)
		}
		streams = append(streams, st)
	}
	waitFor(t, "the idle streams to reach the server", func() bool { return srv.Registering() == idle })
	sum, err := client.Run(ctx, dialLoop(t, addr), client.Spec{Dim: 2, Chains: 2, Start: []float64{0, 0}, Step: 0.1, DrawsPerChain: 20}, minusX)
	if err != nil || !collected(sum.Reason) {
		t.Fatalf("good session beside %d idle streams: %v %+v", idle, err, sum)
	}
	sctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	srv.Shutdown(sctx)
	if sctx.Err() != nil {
		t.Fatal("shutdown waited for its deadline: the idle streams delayed it")
	}
	for i, st := range streams {
		if _, err := st.Recv(); status.Code(err) != codes.Unavailable {
			t.Fatalf("idle stream %d ended with %v, want UNAVAILABLE", i, err)
		}
	}
}

// A registered client that stops answering ends its session after the
// answer timeout (DEADLINE_EXCEEDED naming evaluations), freeing its slot
// for the next session.
func TestSilentClientFreesItsSlot(t *testing.T) {
	// The answer timeout is what the test is about: long enough that the
	// good session's trivial answers (microseconds) never meet it on a
	// loaded machine, short enough that the silent one ends soon.
	addr, _ := startTCP(t, server.Options{MaxSessions: 1, Limits: session.Limits{AnswerTimeout: 5 * time.Second}})
	conn := dialLoop(t, addr)
	st := rawSession(t, conn, goodRegister())
	s, _ := finalStatus(st)
	if s.Code() != codes.DeadlineExceeded || fieldOf(s) != "evaluations" {
		t.Fatalf("silent client: %v %q (field %q)", s.Code(), s.Message(), fieldOf(s))
	}
	sum, err := client.Run(testCtx(t), conn, client.Spec{Dim: 2, Chains: 2, Start: []float64{0, 0}, Step: 0.1, DrawsPerChain: 10}, minusX)
	if err != nil || !collected(sum.Reason) {
		t.Fatalf("next session: %v", err)
	}
}

// The server-wide memory budget: with room for one session's worst
// case, a second concurrent one is refused with RESOURCE_EXHAUSTED naming
// the field and the figures; once the first ends, its reservation is
// back (its follow ring after the retention) and the second runs.
func TestServerMemoryBudget(t *testing.T) {
	spec := session.Spec{Dim: 10, Chains: 8, Start: make([]float64, 10), StartRows: 1, Step: 0.1}
	lim := session.Limits{FollowBuffer: 1000}
	b, err := server.New(server.Options{Limits: lim}).Budget(spec)
	if err != nil {
		t.Fatal(err)
	}
	addr, srv := startTCP(t, server.Options{Limits: lim, MaxMemoryBytes: b.Total * 3 / 2, FollowRetention: 50 * time.Millisecond})
	conn := dialLoop(t, addr)
	cspec := client.Spec{Dim: 10, Chains: 8, Start: make([]float64, 10), Step: 0.1, DrawsPerChain: 300}
	hold, release := make(chan struct{}), make(chan struct{})
	first := make(chan error, 1)
	go func() {
		n := 0
		_, err := client.Run(testCtx(t), conn, cspec, func(ctx context.Context, bt *client.Batch) error {
			if n++; n == 2 {
				close(hold)
				<-release
			}
			return minusX(ctx, bt)
		})
		first <- err
	}()
	<-hold
	if u := srv.Used(); u != b.Total {
		t.Fatalf("one session reserved %d bytes, its budget is %d", u, b.Total)
	}
	_, err = client.Run(testCtx(t), conn, cspec, minusX)
	s := status.Convert(err)
	if s.Code() != codes.ResourceExhausted || fieldOf(s) == "" || !strings.Contains(s.Message(), "the server has") ||
		!strings.Contains(s.Message(), "at worst") {
		t.Fatalf("second session: %v (field %q), want RESOURCE_EXHAUSTED naming a field and the figures", err, fieldOf(s))
	}
	close(release)
	if err := <-first; err != nil {
		t.Fatal(err)
	}
	waitFor(t, "the retained ring to be released", func() bool { return srv.Used() == 0 })
	if _, err := client.Run(testCtx(t), conn, cspec, minusX); err != nil {
		t.Fatalf("after the first ended: %v", err)
	}
}

// A client that answers with more gradient replicates than it declared
// at registration gets INVALID_ARGUMENT naming evaluations.gradients.
func TestMoreReplicatesThanDeclared(t *testing.T) {
	addr, _ := startTCP(t, server.Options{})
	conn := dialLoop(t, addr)
	for _, extra := range []int{3, 64} {
		reg := goodRegister()
		reg.Kernel = "sgld"
		reg.Noise = &sluicev1.GradientNoise{Kind: sluicev1.GradientKind_GRADIENT_KIND_STOCHASTIC, Replicates: 2}
		st := rawSession(t, conn, reg)
		var p *sluicev1.Points
		for p == nil {
			f, err := st.Recv()
			if err != nil {
				t.Fatal(err)
			}
			p = f.GetPoints()
		}
		ev := &sluicev1.Evaluations{RequestId: p.RequestId, FirstRow: p.FirstRow, Rows: p.Rows, Dim: p.Dim,
			Gradients: make([]byte, int(p.Rows)*extra*int(p.Dim)*8)}
		if err := st.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{Evaluations: ev}}); err != nil {
			t.Fatal(err)
		}
		s, _ := finalStatus(st)
		if s.Code() != codes.InvalidArgument || fieldOf(s) != "evaluations.gradients" {
			t.Fatalf("%d replicates for 2 declared: %v %q (field %q)", extra, s.Code(), s.Message(), fieldOf(s))
		}
	}
}

// Follow refuses an overlong session id naming the field.
func TestFollowSessionIDLimit(t *testing.T) {
	addr, _ := startTCP(t, server.Options{})
	st, err := sluicev1.NewSluiceServiceClient(dialLoop(t, addr)).Follow(testCtx(t),
		&sluicev1.FollowRequest{SessionId: strings.Repeat("x", server.MaxSessionIDBytes+1)})
	if err == nil {
		_, err = st.Recv()
	}
	if s := status.Convert(err); s.Code() != codes.InvalidArgument || fieldOf(s) != "session_id" {
		t.Fatalf("long id: %v", err)
	}
	if errors.Is(err, context.Canceled) {
		t.Fatal("cancelled")
	}
}

// A frame far larger than any answer the session needs, though within
// the message limit, is refused before it is decoded (RESOURCE_EXHAUSTED
// naming evaluations): what a client sends stays within what
// registration reserved.
func TestOversizeAnswerRefusedBeforeDecoding(t *testing.T) {
	addr, _ := startTCP(t, server.Options{})
	st := rawSession(t, dialLoop(t, addr), goodRegister())
	var p *sluicev1.Points
	for p == nil {
		f, err := st.Recv()
		if err != nil {
			t.Fatal(err)
		}
		p = f.GetPoints()
	}
	ev := &sluicev1.Evaluations{RequestId: p.RequestId, FirstRow: p.FirstRow, Rows: p.Rows, Dim: p.Dim,
		Gradients: make([]byte, len(p.Points)), Hessians: make([]byte, 1<<20)}
	if err := st.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{Evaluations: ev}}); err != nil {
		t.Fatal(err)
	}
	s, _ := finalStatus(st)
	if s.Code() != codes.ResourceExhausted || fieldOf(s) != "evaluations" || !strings.Contains(s.Message(), "largest answer this session needs") {
		t.Fatalf("1 MiB of Hessians for a 3 × 2 session: %v %q (field %q)", s.Code(), s.Message(), fieldOf(s))
	}
}

// collected reports whether a session ended with every draw it was asked
// for: "draws collected", or "check failed" when the verdict judged those
// draws poor (short runs often are) — these tests are about delivery, not
// about the draws' quality.
func collected(r client.Reason) bool { return r == client.DrawsCollected || r == client.CheckFailed }

// Refusals and abandoned sessions are logged at info: a Follow of an
// unknown session (NOT_FOUND), a session refused for want of a slot, a
// registration refused for its input, and a session whose client went
// away.
func TestRefusalsAndAbandonedSessionsLoggedAtInfo(t *testing.T) {
	core, logs := observer.New(zapcore.InfoLevel)
	addr, _ := startTCP(t, server.Options{MaxSessions: 1, Logger: zap.New(core)})
	conn := dialLoop(t, addr)
	c := sluicev1.NewSluiceServiceClient(conn)
	ctx, cancel := context.WithCancel(testCtx(t))
	defer cancel()
	fs, err := c.Follow(ctx, &sluicev1.FollowRequest{SessionId: "nobody", Token: "0123456789abcdef0123456789abcdef"})
	if err == nil {
		_, err = fs.Recv()
	}
	if status.Code(err) != codes.NotFound {
		t.Fatalf("follow of an unknown session: %v", err)
	}
	held, err := c.Session(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if err := held.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Register{Register: goodRegister()}}); err != nil {
		t.Fatal(err)
	}
	if f, err := held.Recv(); err != nil || f.GetRegistered() == nil {
		t.Fatalf("first session: %v, %v", f, err)
	}
	if s, _ := finalStatus(rawSession(t, conn, goodRegister())); s.Code() != codes.ResourceExhausted {
		t.Fatalf("second session with one slot: %v", s)
	}
	cancel() // the first client goes away
	waitFor(t, "the abandoned session to be logged", func() bool { return logs.FilterMessageSnippet("abandoned").Len() == 1 })
	bad := goodRegister()
	bad.Dim = -1
	if s, _ := finalStatus(rawSession(t, conn, bad)); s.Code() != codes.InvalidArgument {
		t.Fatalf("bad registration: %v", s)
	}
	for _, msg := range []string{"call refused", "session refused: every slot taken", "client went away: session abandoned", "registration refused"} {
		if n := logs.FilterMessage(msg).FilterLevelExact(zapcore.InfoLevel).Len(); n != 1 {
			t.Errorf("%q logged %d times at info, want once; logged: %v", msg, n, messages(logs))
		}
	}
}

func messages(o *observer.ObservedLogs) []string {
	var m []string
	for _, e := range o.All() {
		m = append(m, e.Level.String()+" "+e.Message)
	}
	return m
}
