package server_test

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"sync"
	"syscall"
	"testing"
	"time"

	"sluice/client"
	"sluice/server"
	"sluice/server/session"
)

// sluiceBinary builds the sluice command once per test binary.
var sluiceBinary = sync.OnceValues(func() (string, error) {
	dir, err := os.MkdirTemp("", "sluice-survive-")
	if err != nil {
		return "", err
	}
	bin := filepath.Join(dir, "sluice")
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	out, err := exec.CommandContext(ctx, "go", "build", "-o", bin, "sluice/cmd/sluice").CombinedOutput()
	if err != nil {
		return "", fmt.Errorf("go build sluice/cmd/sluice: %v\n%s", err, out)
	}
	return bin, nil
})

// serveProcess is a `sluice serve` subprocess.
type serveProcess struct {
	cmd  *exec.Cmd
	addr string
	done chan struct{}
	mu   sync.Mutex
	log  bytes.Buffer
}

// startServe starts `sluice serve` on addr (127.0.0.1:0 for a free port)
// with args and returns once it logged the address it listens on.
func startServe(t *testing.T, addr string, args ...string) *serveProcess {
	t.Helper()
	bin, err := sluiceBinary()
	if err != nil {
		t.Fatal(err)
	}
	p := &serveProcess{done: make(chan struct{})}
	p.cmd = exec.Command(bin, append([]string{"serve", "--addr", addr, "--log-level", "info", "--grace", "5s"}, args...)...)
	stderr, err := p.cmd.StderrPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := p.cmd.Start(); err != nil {
		t.Fatal(err)
	}
	addrc := make(chan string, 1)
	go func() {
		defer close(p.done)
		sc := bufio.NewScanner(stderr)
		for sc.Scan() {
			line := sc.Bytes()
			p.mu.Lock()
			p.log.Write(line)
			p.log.WriteByte('\n')
			p.mu.Unlock()
			var entry struct{ Msg, Addr string }
			if json.Unmarshal(line, &entry) == nil && entry.Msg == "serving" && entry.Addr != "" {
				select {
				case addrc <- entry.Addr:
				default:
				}
			}
		}
		_, _ = io.Copy(io.Discard, stderr)
	}()
	select {
	case p.addr = <-addrc:
	case <-p.done:
		_ = p.cmd.Wait()
		t.Fatalf("sluice serve exited before serving:\n%s", p.logText())
	case <-time.After(3 * time.Minute):
		p.kill()
		t.Fatalf("sluice serve did not report its address within 3 min:\n%s", p.logText())
	}
	return p
}

func (p *serveProcess) logText() string {
	p.mu.Lock()
	defer p.mu.Unlock()
	return p.log.String()
}

// kill ends the process with SIGKILL (by its PID) and reaps it.
func (p *serveProcess) kill() {
	_ = p.cmd.Process.Signal(syscall.SIGKILL)
	<-p.done
	_ = p.cmd.Wait()
}

// survivalSpec is the session every trial runs: 4 chains, 150 kept steps
// after 10 of burn-in, a checkpoint every 7 steps (and one per second of
// wall time, which only decides when, never what).
func survivalSpec() client.Spec {
	return client.Spec{Dim: 2, Chains: 4, Start: []float64{0, 0}, Step: 0.2, Seed: 4242, BurnIn: 10,
		DrawsPerChain: 150, CheckpointEverySteps: 7}
}

// The server is killed with SIGKILL at a random step (fixed seed) and
// restarted on the same state and port; the client and a Follow consumer
// resume by themselves. Across every trial, neither loses or repeats a
// draw, and both see draws bit-identical to a run that was never
// interrupted. 20 trials on bbolt (3 with -short), and as many on
// PostgreSQL when SLUICE_TEST_POSTGRES_URL is set (scripts/test sets it
// through scripts/pg-test-cluster).
func TestSessionsSurviveKill(t *testing.T) {
	trials := 20
	if testing.Short() {
		trials = 3
	}
	ref := uninterrupted(t)
	t.Run("bbolt", func(t *testing.T) {
		surviveTrials(t, trials, ref, func(t *testing.T) []string { return []string{"--state-dir", t.TempDir()} })
	})
	t.Run("postgres", func(t *testing.T) {
		url := os.Getenv("SLUICE_TEST_POSTGRES_URL")
		if url == "" {
			if os.Getenv("SLUICE_TEST_POSTGRES") == "require" {
				t.Fatal("SLUICE_TEST_POSTGRES=require but SLUICE_TEST_POSTGRES_URL is empty")
			}
			t.Skip("SLUICE_TEST_POSTGRES_URL not set: run under scripts/pg-test-cluster for the PostgreSQL trials")
		}
		surviveTrials(t, trials, ref, func(*testing.T) []string { return []string{"--state-postgres", url} })
	})
}

// uninterrupted runs the session once in-process, never stopped.
func uninterrupted(t *testing.T) []float64 {
	conn, _ := start(t, server.Options{Limits: session.Limits{FollowBuffer: 4096}})
	sum, err := client.Run(testCtx(t), conn, survivalSpec(), evaluator(gaussian2D(t)), client.KeepDraws())
	if err != nil || !collected(sum.Reason) {
		t.Fatalf("reference run: %v, %+v", err, sum)
	}
	return sum.Draws.Values
}

// seqCounter counts the draws a consumer saw by sequence number.
type seqCounter struct {
	seen              map[uint64]int
	values            map[uint64][]float64
	duplicated, total int
}

func newSeqCounter() *seqCounter {
	return &seqCounter{seen: map[uint64]int{}, values: map[uint64][]float64{}}
}

func (c *seqCounter) add(d *client.Draws) {
	for r := range d.Rows {
		s := d.Seq + uint64(r)
		c.seen[s]++
		c.total++
		if c.seen[s] > 1 {
			c.duplicated++
		}
		c.values[s] = append([]float64(nil), d.Values[r*d.Dim:(r+1)*d.Dim]...)
	}
}

// check compares what the consumer saw with the reference: it returns the
// lost and duplicated counts and the first differing row (−1 if none).
func (c *seqCounter) check(ref []float64, dim int) (lost, duplicated int, differ int) {
	differ = -1
	rows := len(ref) / dim
	for s := range rows {
		v, ok := c.values[uint64(s)]
		if !ok {
			lost++
			continue
		}
		for j := range dim {
			if math.Float64bits(v[j]) != math.Float64bits(ref[s*dim+j]) && differ < 0 {
				differ = s
			}
		}
	}
	return lost, c.duplicated, differ
}

func surviveTrials(t *testing.T, trials int, ref []float64, state func(*testing.T) []string) {
	rng := rand.New(rand.NewPCG(2026, 12))
	var lost, dup, flost, fdup, resumes, killedAt int
	for trial := range trials {
		// Requests: 160 steps of one gradient request each; kill after
		// the k-th answer was computed, k uniform in 1..150.
		k := 1 + rng.IntN(150)
		args := append(state(t), "--follow-buffer", "100000", "--checkpoint-every", "1s")
		srv := startServe(t, "127.0.0.1:0", args...)
		addr := srv.addr
		var (
			mu       sync.Mutex
			current  = srv
			requests int
		)
		t.Cleanup(func() {
			mu.Lock()
			defer mu.Unlock()
			current.kill()
		})
		cc, err := client.Dial(addr)
		if err != nil {
			t.Fatal(err)
		}
		ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
		tg := gaussian2D(t)
		eval := func(ctx context.Context, b *client.Batch) error {
			if err := evaluator(tg)(ctx, b); err != nil {
				return err
			}
			mu.Lock()
			defer mu.Unlock()
			requests++
			if requests == k {
				current.kill()
				current = startServe(t, addr, args...)
			}
			return nil
		}
		own, followed := newSeqCounter(), newSeqCounter()
		var wg sync.WaitGroup
		var fsum *client.Summary
		var ferr error
		policy := client.WithResume(client.ResumePolicy{Attempts: 40, First: 20 * time.Millisecond, MaxWait: time.Second})
		sum, err := client.Run(ctx, cc, survivalSpec(), eval, policy, client.OnDraws(own.add),
			client.OnRegistered(func(r *client.Registered) {
				wg.Add(1)
				go func() {
					defer wg.Done()
					fsum, ferr = client.Follow(ctx, cc, r.SessionID, r.Token, 0, policy, client.OnDraws(followed.add))
				}()
			}))
		wg.Wait()
		cancel()
		_ = cc.Close()
		mu.Lock()
		log := current.logText()
		mu.Unlock()
		if err != nil || !collected(sum.Reason) {
			t.Fatalf("trial %d (kill after request %d): session %v, reason %q\nrestarted server's log:\n%s", trial, k, err, sum.Reason, log)
		}
		if ferr != nil || !collected(fsum.Reason) {
			t.Fatalf("trial %d (kill after request %d): follower %v", trial, k, ferr)
		}
		if sum.Resumes < 1 {
			t.Fatalf("trial %d: the client never resumed", trial)
		}
		l, d, differ := own.check(ref, 2)
		fl, fd, fdiffer := followed.check(ref, 2)
		if differ >= 0 || fdiffer >= 0 {
			t.Fatalf("trial %d (kill after request %d): draws differ from the uninterrupted run at row %d (client), %d (follower)", trial, k, differ, fdiffer)
		}
		lost, dup, flost, fdup, resumes = lost+l, dup+d, flost+fl, fdup+fd, resumes+sum.Resumes
		killedAt += k
		mu.Lock()
		current.kill()
		mu.Unlock()
	}
	t.Logf("%d trials, %d draws each: client lost %d, duplicated %d; follower lost %d, duplicated %d; %d resumes; mean kill after request %.1f",
		trials, len(ref)/2, lost, dup, flost, fdup, resumes, float64(killedAt)/float64(trials))
	if lost+dup+flost+fdup != 0 {
		t.Fatalf("draws lost or duplicated")
	}
}
