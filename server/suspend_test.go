package server_test

import (
	"context"
	"errors"
	"fmt"
	"os"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"sluice/client"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server"
	"sluice/server/metrics"
	"sluice/server/session"
	"sluice/server/store"
)

// openState opens a bbolt store in a fresh directory, closed at cleanup.
func openState(t *testing.T) *store.File {
	t.Helper()
	st, err := store.OpenFile(t.TempDir())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = st.Close() })
	return st
}

// gauge reads one sample of the metrics.
func gauge(t *testing.T, m *metrics.Metrics, name string) float64 {
	t.Helper()
	return scrapeMetrics(t, m)[name]
}

const detached = `sluice_sessions{state="detached"}`

// A client answers some requests, then stops answering. With a state store
// the server suspends its session past the answer timeout: the only slot
// is freed (another session registers into it and runs to the end), the
// session counts as detached, and the client, once it answers again, gets
// UNAVAILABLE, resumes with its token by itself and receives every draw
// once, bit-identical to an uninterrupted run.
func TestSilentClientIsSuspendedAndResumes(t *testing.T) {
	ref := uninterrupted(t)
	m := metrics.New()
	// The answer timeout is short so that the test does not wait long;
	// an ordinary answer that misses it on a loaded machine suspends the
	// session too, and the client resumes it by itself: the figures
	// checked below hold either way.
	addr, _ := startTCP(t, server.Options{MaxSessions: 1, Metrics: m,
		Limits: session.Limits{FollowBuffer: 4096, AnswerTimeout: 3 * time.Second},
		State:  server.StateOptions{Store: openState(t), Replica: "one"}})
	conn := dialLoop(t, addr)
	tg := gaussian2D(t)
	var requests, others int
	var other *client.Summary
	var otherErr error
	eval := func(ctx context.Context, b *client.Batch) error {
		requests++
		if requests == 30 {
			// Silent: the server suspends the session and frees its slot.
			waitFor(t, "the session to be suspended", func() bool { return gauge(t, m, detached) == 1 })
			spec := client.Spec{Dim: 2, Chains: 2, Start: []float64{0, 0}, Step: 0.1, Seed: 9, DrawsPerChain: 10}
			other, otherErr = client.Run(ctx, conn, spec, func(ctx context.Context, b *client.Batch) error {
				others++
				return minusX(ctx, b)
			})
		}
		return evaluator(tg)(ctx, b)
	}
	own := newSeqCounter()
	sum, err := client.Run(testCtx(t), conn, survivalSpec(), eval, client.OnDraws(own.add),
		client.WithResume(client.ResumePolicy{Attempts: 20, First: 10 * time.Millisecond, MaxWait: time.Second}))
	if otherErr != nil || other == nil || !collected(other.Reason) || others == 0 {
		t.Fatalf("the session in the freed slot: %v, %+v", otherErr, other)
	}
	if err != nil || !collected(sum.Reason) {
		t.Fatalf("suspended session: %v, %+v", err, sum)
	}
	if sum.Resumes < 1 || !sum.Registered.Resumed {
		t.Fatalf("resumes %d, resumed %v: the client never resumed", sum.Resumes, sum.Registered.Resumed)
	}
	lost, dup, differ := own.check(ref, 2)
	t.Logf("%d requests answered (some twice after the resume), %d resumes, %d draws: lost %d, duplicated %d",
		requests, sum.Resumes, own.total, lost, dup)
	if lost != 0 || dup != 0 || differ >= 0 || own.total != len(ref)/2 {
		t.Fatalf("lost %d, duplicated %d, first differing row %d, %d rows of %d", lost, dup, differ, own.total, len(ref)/2)
	}
	if g := gauge(t, m, detached); g != 0 {
		t.Errorf("detached sessions after the resume: %v, want 0", g)
	}
}

// registerSilently opens a session on a raw stream, reads its Registered
// frame and its first request, and answers nothing: it returns the
// session's id and token and the status that ends the stream.
func registerSilently(t *testing.T, c sluicev1.SluiceServiceClient) (id, token string, end *status.Status) {
	t.Helper()
	st, err := c.Session(testCtx(t))
	if err != nil {
		t.Fatal(err)
	}
	if err := st.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Register{Register: goodRegister()}}); err != nil {
		t.Fatal(err)
	}
	for {
		f, err := st.Recv()
		if err != nil {
			return id, token, status.Convert(err)
		}
		if r := f.GetRegistered(); r != nil {
			id, token = r.GetSessionId(), r.GetResumeToken()
		}
		if f.GetFinished() != nil {
			t.Fatalf("a suspended session sent a Finished frame: %v", f.GetFinished())
		}
	}
}

// resumeStatus sends Resume for id with token and returns the status of
// the stream's first answer (OK when Registered came).
func resumeStatus(t *testing.T, c sluicev1.SluiceServiceClient, id, token string) *status.Status {
	t.Helper()
	ctx, cancel := context.WithCancel(testCtx(t))
	defer cancel()
	st, err := c.Session(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if err := st.Send(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Resume{Resume: &sluicev1.Resume{
		SessionId: id, Token: token}}}); err != nil {
		t.Fatal(err)
	}
	f, err := st.Recv()
	if err != nil {
		return status.Convert(err)
	}
	if f.GetRegistered() == nil || !f.GetRegistered().GetResumed() {
		t.Fatalf("resume answered %v", f)
	}
	return status.New(codes.OK, "")
}

// followStatus calls Follow for id with token and returns the status of
// its first answer.
func followStatus(t *testing.T, c sluicev1.SluiceServiceClient, id, token string) codes.Code {
	t.Helper()
	ctx, cancel := context.WithCancel(testCtx(t))
	defer cancel()
	fs, err := c.Follow(ctx, &sluicev1.FollowRequest{SessionId: id, Token: token})
	if err != nil {
		return status.Code(err)
	}
	_, err = fs.Recv()
	return status.Code(err)
}

// A suspended session stays resumable for the grace only: the stream of a
// silent client ends with UNAVAILABLE naming evaluations (no Finished
// frame); once the grace has passed, the server that suspended it deletes
// its state, and Resume and Follow get NOT_FOUND.
func TestSuspendedSessionExpires(t *testing.T) {
	st := openState(t)
	const grace = 500 * time.Millisecond
	m := metrics.New()
	addr, _ := startTCP(t, server.Options{Metrics: m, Limits: session.Limits{AnswerTimeout: time.Second},
		State: server.StateOptions{Store: st, SuspendGrace: grace}})
	c := sluicev1.NewSluiceServiceClient(dialLoop(t, addr))
	id, token, end := registerSilently(t, c)
	if end.Code() != codes.Unavailable || fieldOf(end) != "evaluations" || !strings.Contains(end.Message(), "suspended") {
		t.Fatalf("silent client's stream ended with %v %q (field %q), want UNAVAILABLE naming evaluations", end.Code(), end.Message(), fieldOf(end))
	}
	rec, err := st.Get(context.Background(), id)
	if err != nil || !rec.LeaseUntil.IsZero() {
		t.Fatalf("suspended session's record: %v, lease %v; want the record with its lease released", err, rec.LeaseUntil)
	}
	waitFor(t, "the expired session's state to be deleted", func() bool {
		_, err := st.Get(context.Background(), id)
		return errors.Is(err, store.ErrNotFound)
	})
	if s := resumeStatus(t, c, id, token); s.Code() != codes.NotFound {
		t.Fatalf("resume after the grace: %v %q, want NOT_FOUND", s.Code(), s.Message())
	}
	if code := followStatus(t, c, id, token); code != codes.NotFound {
		t.Fatalf("follow after the grace: %v, want NOT_FOUND", code)
	}
	if g := gauge(t, m, detached); g != 0 {
		t.Errorf("detached sessions after expiry: %v, want 0", g)
	}
}

// The grace holds across a restart: a server on the same store that finds
// a suspended session past its grace refuses its Resume with NOT_FOUND
// and deletes it; within the grace, it resumes it.
func TestSuspensionOutlivesTheServer(t *testing.T) {
	st := openState(t)
	const grace = 2 * time.Second
	opts := server.Options{Limits: session.Limits{AnswerTimeout: time.Second},
		State: server.StateOptions{Store: st, SuspendGrace: grace}}
	a, lisA := serveOn(t, opts)
	var sw switchable
	sw.cur.Store(lisA)
	c := sluicev1.NewSluiceServiceClient(sw.conn(t))
	idIn, tokenIn, _ := registerSilently(t, c)
	idOut, tokenOut, _ := registerSilently(t, c)
	a.Stop() // its expiry timers stop with it
	_, lisB := serveOn(t, opts)
	sw.cur.Store(lisB)
	if s := resumeStatus(t, c, idIn, tokenIn); s.Code() != codes.OK {
		t.Fatalf("resume within the grace on the next server: %v %q", s.Code(), s.Message())
	}
	rec, err := st.Get(context.Background(), idOut)
	if err != nil {
		t.Fatal(err)
	}
	waitFor(t, "the grace to pass", func() bool { return time.Since(rec.Updated) > grace })
	if _, err := st.Get(context.Background(), idOut); err != nil {
		t.Fatalf("the record was deleted while no server ran a timer for it: %v", err)
	}
	if s := resumeStatus(t, c, idOut, tokenOut); s.Code() != codes.NotFound {
		t.Fatalf("resume after the grace on the next server: %v %q, want NOT_FOUND", s.Code(), s.Message())
	}
	if _, err := st.Get(context.Background(), idOut); !errors.Is(err, store.ErrNotFound) {
		t.Fatalf("expired record after the refused resume: %v, want deleted", err)
	}
}

// Without a state store a silent client's session cannot be suspended: it
// ends FAILED, its Finished frame and status naming the answer timeout and
// saying that the server keeps no session state.
func TestSilentClientWithoutStoreFails(t *testing.T) {
	addr, _ := startTCP(t, server.Options{Limits: session.Limits{AnswerTimeout: time.Second}})
	st := rawSession(t, dialLoop(t, addr), goodRegister())
	var fin *sluicev1.Finished
	var end error
	for {
		f, err := st.Recv()
		if err != nil {
			end = err
			break
		}
		if f.GetFinished() != nil {
			fin = f.GetFinished()
		}
	}
	s := status.Convert(end)
	if s.Code() != codes.DeadlineExceeded || fieldOf(s) != "evaluations" {
		t.Fatalf("status %v %q (field %q), want DEADLINE_EXCEEDED naming evaluations", s.Code(), s.Message(), fieldOf(s))
	}
	if fin == nil || fin.GetReason() != sluicev1.FinishReason_FINISH_REASON_FAILED {
		t.Fatalf("finished frame %v, want reason FAILED", fin)
	}
	for _, want := range []string{"answer timeout of 1s", "keeps no session state"} {
		if !strings.Contains(fin.GetMessage(), want) || !strings.Contains(s.Message(), want) {
			t.Errorf("finished message %q / status %q: want %q in both", fin.GetMessage(), s.Message(), want)
		}
	}
}

// pgStore opens the PostgreSQL store on a fresh schema of the test
// cluster (dropped at cleanup); it skips without one, unless
// SLUICE_TEST_POSTGRES=require.
func pgStore(t *testing.T) func() store.Store {
	t.Helper()
	url := os.Getenv("SLUICE_TEST_POSTGRES_URL")
	if url == "" {
		if os.Getenv("SLUICE_TEST_POSTGRES") == "require" {
			t.Fatal("SLUICE_TEST_POSTGRES=require but SLUICE_TEST_POSTGRES_URL is empty")
		}
		t.Skip("PostgreSQL test skipped: SLUICE_TEST_POSTGRES_URL not set; run under scripts/pg-test-cluster")
	}
	ctx := context.Background()
	conn, err := pgx.Connect(ctx, url)
	if err != nil {
		t.Fatalf("connecting to the test cluster: %v", err)
	}
	defer func() { _ = conn.Close(ctx) }()
	schema := fmt.Sprintf("srv%d_%d", os.Getpid(), pgSchemas.Add(1))
	if _, err := conn.Exec(ctx, "CREATE SCHEMA "+schema); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		c, err := pgx.Connect(ctx, url)
		if err != nil {
			t.Errorf("dropping schema %s: %v", schema, err)
			return
		}
		defer func() { _ = c.Close(ctx) }()
		if _, err := c.Exec(ctx, "DROP SCHEMA "+schema+" CASCADE"); err != nil {
			t.Errorf("dropping schema %s: %v", schema, err)
		}
	})
	sep := "?"
	if strings.Contains(url, "?") {
		sep = "&"
	}
	at := url + sep + "search_path=" + schema
	return func() store.Store {
		s, err := store.OpenPostgres(ctx, at)
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { _ = s.Close() })
		return s
	}
}

var pgSchemas atomic.Int64

// A session whose only checkpoints are its first and its last keeps its
// lease by renewing it: well after the lease written with its first
// checkpoint has passed, another replica's Resume is refused (UNAVAILABLE,
// held by another server) and the session runs on to its end, never
// interrupted. On bbolt (two servers sharing one store in this process)
// and on PostgreSQL (two connections to the test cluster).
func TestLeaseRenewedWithoutCheckpoints(t *testing.T) {
	t.Run("bbolt", func(t *testing.T) {
		st := openState(t)
		leaseOutlivesItsCheckpoint(t, st, st)
	})
	t.Run("postgres", func(t *testing.T) {
		open := pgStore(t)
		leaseOutlivesItsCheckpoint(t, open(), open())
	})
}

func leaseOutlivesItsCheckpoint(t *testing.T, stA, stB store.Store) {
	const lease = time.Second
	state := func(st store.Store, replica string) server.StateOptions {
		// No checkpoints by time; the spec asks none by steps.
		return server.StateOptions{Store: st, Replica: replica, Lease: lease, Every: -1}
	}
	_, lisA := serveOn(t, server.Options{Limits: session.Limits{FollowBuffer: 4096}, State: state(stA, "a")})
	_, lisB := serveOn(t, server.Options{Limits: session.Limits{FollowBuffer: 4096}, State: state(stB, "b")})
	var swA, swB switchable
	swA.cur.Store(lisA)
	swB.cur.Store(lisB)
	ccA, b := swA.conn(t), sluicev1.NewSluiceServiceClient(swB.conn(t))
	spec := survivalSpec()
	spec.CheckpointEverySteps = 0
	var reg client.Registered
	var requests int
	var takeover *status.Status
	var first, renewed store.Record
	tg := gaussian2D(t)
	eval := func(ctx context.Context, batch *client.Batch) error {
		requests++
		if requests == 20 {
			var err error
			if first, err = stA.Get(ctx, reg.SessionID); err != nil {
				return err
			}
			// Wait until the lease of the first checkpoint has passed by
			// this clock and a renewal has written a later one.
			waitFor(t, "the first lease to pass and a renewal", func() bool {
				renewed, err = stA.Get(ctx, reg.SessionID)
				return err == nil && time.Now().After(first.LeaseUntil.Add(100*time.Millisecond)) && renewed.LeaseUntil.After(time.Now())
			})
			takeover = resumeStatus(t, b, reg.SessionID, reg.Token)
		}
		return evaluator(tg)(ctx, batch)
	}
	sum, err := client.Run(testCtx(t), ccA, spec, eval, client.OnRegistered(func(r *client.Registered) { reg = *r }),
		client.WithResume(client.ResumePolicy{Attempts: -1}))
	if err != nil || !collected(sum.Reason) || sum.Resumes != 0 {
		t.Fatalf("session on replica a: %v, %+v (resumes %d)", err, sum, sum.Resumes)
	}
	if takeover == nil || takeover.Code() != codes.Unavailable || !strings.Contains(takeover.Message(), "held by another server") {
		t.Fatalf("replica b's resume of a live session: %v, want UNAVAILABLE, held by another server", takeover)
	}
	if first.Seq != renewed.Seq || first.Owner != "a" || renewed.Owner != "a" {
		t.Fatalf("first checkpoint seq %d owner %q, renewed record seq %d owner %q: want the same checkpoint, owner a",
			first.Seq, first.Owner, renewed.Seq, renewed.Owner)
	}
	t.Logf("lease of the first checkpoint until %v; renewed until %v, checkpoint seq %d unchanged",
		first.LeaseUntil.Format(time.StampMilli), renewed.LeaseUntil.Format(time.StampMilli), renewed.Seq)
}
