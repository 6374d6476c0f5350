package main

import (
	"bytes"
	"context"
	"net"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/creack/pty"
	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"sluice/client"
	"sluice/server"
	"sluice/server/session"
)

// heldSession runs a session on an in-process server listening on
// 127.0.0.1, whose gradients (of a standard Gaussian, −x) stop after
// step 100 until release is called. It returns the server's address, the
// session id, release, and a channel that receives the session's result.
func heldSession(t *testing.T, ctx context.Context, buffer int) (addr, id, token string, release func(), done <-chan error) {
	t.Helper()
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	srv := server.New(server.Options{Limits: session.Limits{FollowBuffer: buffer, DiagnosticsShare: -1}})
	go func() { _ = srv.Serve(lis) }()
	t.Cleanup(srv.Stop)
	cc, err := grpc.NewClient(lis.Addr().String(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = cc.Close() })
	gate := make(chan struct{})
	var once sync.Once
	release = func() { once.Do(func() { close(gate) }) }
	t.Cleanup(release)
	// 50 burn-in steps and 200 kept: 250 steps, a report every 25; one
	// request per step (ChainGroups 1), so the 101st call is step 101's.
	spec := client.Spec{Dim: 2, Chains: 4, Start: []float64{1, -1}, Step: 0.2, BurnIn: 50, DrawsPerChain: 200, Seed: 5,
		ProgressEverySteps: 25, Names: []string{"left", "right"}, MaxEvaluations: 100000, ChainGroups: 1}
	calls := 0
	eval := func(ctx context.Context, b *client.Batch) error {
		calls++
		if calls == 101 {
			select {
			case <-gate:
			case <-ctx.Done():
				return ctx.Err()
			}
		}
		for i, x := range b.Points {
			b.Grad[i] = -x
		}
		return nil
	}
	ids := make(chan [2]string, 1)
	res := make(chan error, 1)
	go func() {
		_, err := client.Run(ctx, cc, spec, eval, client.OnRegistered(func(r *client.Registered) { ids <- [2]string{r.SessionID, r.Token} }))
		res <- err
	}()
	select {
	case it := <-ids:
		id, token = it[0], it[1]
	case err := <-res:
		t.Fatalf("session: %v", err)
	}
	return lis.Addr().String(), id, token, release, res
}

// `sluice watch` on a terminal (a pseudo-terminal here) draws the bar and
// the figures while the session is held at step 100, redraws in place, and
// exits with status 0 once the session finishes.
func TestWatchOnATerminal(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute) // safety net only
	defer cancel()
	addr, id, token, release, done := heldSession(t, ctx, 10000)
	master, tty, err := pty.Open()
	if err != nil {
		t.Fatal(err)
	}
	defer master.Close()
	if !isTerminal(tty) {
		t.Fatal("the pseudo-terminal is not seen as a terminal")
	}
	var mu sync.Mutex
	var screen bytes.Buffer
	seen := make(chan struct{}, 1)
	drained := make(chan struct{}) // closed once the reader has read all
	go func() {
		defer close(drained)
		buf := make([]byte, 4096)
		for {
			n, err := master.Read(buf)
			mu.Lock()
			screen.Write(buf[:n])
			if strings.Contains(screen.String(), "step 100/250") {
				select {
				case seen <- struct{}{}:
				default:
				}
			}
			mu.Unlock()
			if err != nil {
				return
			}
		}
	}()
	code := make(chan int, 1)
	go func() {
		var stderr bytes.Buffer
		code <- run(ctx, []string{"watch", id, "--token", token, "--target", addr}, tty, &stderr)
		if stderr.Len() > 0 {
			t.Errorf("stderr: %s", stderr.String())
		}
	}()
	// The session is held at step 100 until the view has shown it: the
	// follower sees the run as it goes, not only once it is over.
	select {
	case <-seen:
	case <-ctx.Done():
		mu.Lock()
		t.Fatalf("no frame at step 100 before the deadline:\n%q", screen.String())
	}
	release()
	if c := <-code; c != 0 {
		t.Fatalf("exit %d", c)
	}
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	// With the terminal's own end closed, the reader reads what is still
	// buffered and then gets an error: everything written is on screen.
	_ = tty.Close()
	select {
	case <-drained:
	case <-ctx.Done():
		t.Fatal("the terminal's output never ended")
	}
	mu.Lock()
	out := screen.String()
	mu.Unlock()
	t.Logf("the terminal received:\n%s", out)
	for _, want := range []*regexp.Regexp{
		regexp.MustCompile(`session ` + regexp.QuoteMeta(id) + `: kernel lmc, 4 chains × 2 parameters`),
		regexp.MustCompile(`\[█{12}░{18}\]  40% +sampling, step 100/250`), // 100 of 250 steps: 12 of 30 cells
		regexp.MustCompile(`\[█{30}\] 100%`),
		regexp.MustCompile(`worst R-hat \d\.\d{3} \((left|right)\), smallest ESS \d+ \((left|right)\), Stein \d`),
		regexp.MustCompile(`about [0-9.]+m?s to finish \(draws budget\)`),
		regexp.MustCompile(`\x1b\[\d+F\x1b\[J`), // redrawn in place
		regexp.MustCompile(`finished \(draws collected\): 250 steps, 1000 evaluations in [0-9.]+ s, 800 draws sent`),
	} {
		if !want.MatchString(out) {
			t.Errorf("the terminal shows no %q:\n%s", want, out)
		}
	}
}

// Not on a terminal, `sluice watch` prints plain lines: the header, a
// line per report (at most one a second) with the percentage and the
// figures, and the finish line; no escape sequence.
func TestWatchPlainLines(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute) // safety net only
	defer cancel()
	addr, id, token, release, done := heldSession(t, ctx, 10000)
	release()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	code, stdout, stderr := runCmd(t, ctx, "watch", id, "--token", token, "--target", addr)
	if code != 0 || stderr != "" {
		t.Fatalf("exit %d, stderr %q", code, stderr)
	}
	lines := strings.Split(strings.TrimSpace(stdout), "\n")
	if len(lines) < 3 || strings.Contains(stdout, "\x1b") {
		t.Fatalf("output:\n%q", stdout)
	}
	if want := "session " + id + ": kernel lmc, 4 chains × 2 parameters, step 0.2; 200 draws per chain after 50 burn-in steps, keeping every 1, at most 100000 evaluations"; lines[0] != want {
		t.Errorf("header line %q, want %q", lines[0], want)
	}
	// The follower reads the finished session from the start; of its ten
	// reports (steps 25, 50, …, 250) the server keeps the latest eight:
	// the first line is the report at step 75 (30% of the draws budget,
	// 0.3% of the evaluations).
	// (R-hat is measured on the engine's own cadence: it may not be yet.)
	if !regexp.MustCompile(`^ 30% sampling, step 75/250, 300 evaluations \(99700 left\), [0-9.]+ s, .*; (worst R-hat \d\.\d{3} |R-hat not measured yet)`).MatchString(lines[1]) {
		t.Errorf("first report line %q", lines[1])
	}
	if !strings.HasPrefix(lines[len(lines)-1], "finished (draws collected): 250 steps, 1000 evaluations") {
		t.Errorf("last line %q", lines[len(lines)-1])
	}
}

// A session whose first draws have left the server's buffer (40 rows kept
// of 800) is still watched: the view follows from the latest draw on.
func TestWatchAfterTheBufferMovedOn(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute) // safety net only
	defer cancel()
	addr, id, token, release, done := heldSession(t, ctx, 40)
	release()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	code, stdout, stderr := runCmd(t, ctx, "watch", id, "--token", token, "--target", addr)
	if code != 0 || stderr != "" || !strings.Contains(stdout, "finished (draws collected): 250 steps") {
		t.Fatalf("exit %d, stderr %q, stdout:\n%s", code, stderr, stdout)
	}
}

// A missing session id is a usage error; an unknown one fails with the
// server's NOT_FOUND in words.
func TestWatchErrors(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	if code, _, stderr := runCmd(t, ctx, "watch", "--target", "127.0.0.1:1"); code != 2 || !strings.Contains(stderr, "name the session") {
		t.Errorf("no session: exit %d, %q", code, stderr)
	}
	addr, _, _, release, _ := heldSession(t, ctx, 10000)
	release()
	code, _, stderr := runCmd(t, ctx, "watch", "no-such-session", "--token", "0123456789abcdef0123456789abcdef", "--target", addr)
	if code != 1 || !strings.Contains(stderr, "not found; field session_id") {
		t.Errorf("unknown session: exit %d, %q", code, stderr)
	}
}

// renderChecks lists the checks that do not pass first, and counts them.
func TestRenderChecks(t *testing.T) {
	var b bytes.Buffer
	n := renderChecks(&b, []check{
		{Name: "rhat", Status: "pass", Figure: "1.003", Sentence: "the chains agree"},
		{Name: "ess", Status: "warn", Figure: "212", Sentence: "fewer effective draws than asked"},
	})
	want := "warn  ess            212        fewer effective draws than asked\n" +
		"pass  rhat           1.003      the chains agree\n"
	if n != 1 || b.String() != want {
		t.Errorf("renderChecks: %d not passing, output\n%s\nwant\n%s", n, b.String(), want)
	}
}
