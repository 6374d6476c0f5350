package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"

	"sluice/client"
	sluicev1 "sluice/proto/sluice/v1"
)

// child is `sluice serve` running as a subprocess.
type child struct {
	cmd  *exec.Cmd
	addr string
	mu   sync.Mutex
	log  bytes.Buffer
	done chan error
}

func (c *child) logText() string {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.log.String()
}

// startChild builds the sluice command (without the race detector, whose
// shadow memory is never returned to the system and would make resident
// sizes meaningless), starts `sluice serve` with args on a loopback port
// the kernel picks and returns once it logged its address. The process
// is killed at cleanup if it is still running.
func startChild(t *testing.T, args ...string) *child {
	t.Helper()
	bin := filepath.Join(t.TempDir(), "sluice")
	bctx, bcancel := context.WithTimeout(context.Background(), 10*time.Minute)
	defer bcancel()
	if out, err := exec.CommandContext(bctx, "go", "build", "-o", bin, ".").CombinedOutput(); err != nil {
		t.Fatalf("go build: %v\n%s", err, out)
	}
	c := &child{done: make(chan error, 1)}
	c.cmd = exec.Command(bin, append([]string{"serve", "--addr", "127.0.0.1:0", "--log-level", "info"}, args...)...)
	stderr, err := c.cmd.StderrPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := c.cmd.Start(); err != nil {
		t.Fatal(err)
	}
	addrc := make(chan string, 1)
	go func() {
		sc := bufio.NewScanner(stderr)
		sc.Buffer(nil, 1<<20)
		for sc.Scan() {
			c.mu.Lock()
			c.log.Write(sc.Bytes())
			c.log.WriteByte('\n')
			c.mu.Unlock()
			var e struct{ Msg, Addr string }
			if json.Unmarshal(sc.Bytes(), &e) == nil && e.Msg == "serving" && e.Addr != "" {
				select {
				case addrc <- e.Addr:
				default:
				}
			}
		}
		c.done <- c.cmd.Wait()
	}()
	t.Cleanup(func() {
		if c.cmd.ProcessState == nil {
			_ = c.cmd.Process.Kill()
		}
	})
	select {
	case c.addr = <-addrc:
	case err := <-c.done:
		t.Fatalf("sluice serve exited before serving (%v):\n%s", err, c.logText())
	case <-time.After(3 * time.Minute):
		t.Fatalf("sluice serve did not report its address within 3 min:\n%s", c.logText())
	}
	return c
}

// rss reads the resident set size of process pid from /proc, in bytes.
func rss(t *testing.T, pid int) int64 {
	t.Helper()
	b, err := os.ReadFile("/proc/" + strconv.Itoa(pid) + "/status")
	if err != nil {
		t.Fatal(err)
	}
	for _, line := range strings.Split(string(b), "\n") {
		if f := strings.Fields(line); len(f) == 3 && f[0] == "VmRSS:" && f[2] == "kB" {
			kb, err := strconv.ParseInt(f[1], 10, 64)
			if err != nil {
				t.Fatal(err)
			}
			return kb << 10
		}
	}
	t.Fatal("no VmRSS in /proc status")
	return 0
}

func minusX(_ context.Context, b *client.Batch) error {
	for i, x := range b.Points {
		b.Grad[i] = -x
	}
	return nil
}

// sluice serve protects itself, as a process: 200 sessions of 8 × 10
// that their clients abort mid-run leave its resident memory within
// 64 MiB of where it stood after a first session, once the finished
// sessions' follow retention has passed; with a thousand streams open
// that never register, a good session still runs, and SIGTERM still
// makes the server exit (the wait of minutes is a safety net, not a
// timing assertion).
func TestServeSurvivesAbortsAndIdleStreams(t *testing.T) {
	srv := startChild(t, "--grace", "30s", "--follow-retention", "1s")
	conn, err := grpc.NewClient("passthrough:///"+srv.addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
	defer cancel()
	spec := client.Spec{Dim: 10, Chains: 8, Start: make([]float64, 10), Step: 0.1, DrawsPerChain: 100}
	if _, err := client.Run(ctx, conn, spec, minusX); err != nil {
		t.Fatalf("first session: %v\n%s", err, srv.logText())
	}
	pid := srv.cmd.Process.Pid
	base := rss(t, pid)

	const aborted, parallel = 200, 10
	spec.DrawsPerChain = 0 // runs until its client aborts
	var wg sync.WaitGroup
	sem := make(chan struct{}, parallel)
	errs := make(chan error, aborted)
	for range aborted {
		wg.Add(1)
		sem <- struct{}{}
		go func() {
			defer wg.Done()
			defer func() { <-sem }()
			sctx, scancel := context.WithCancel(ctx)
			defer scancel()
			rows := 0
			_, err := client.Run(sctx, conn, spec, minusX, client.OnDraws(func(d *client.Draws) {
				if rows += d.Rows; rows >= 8*50 {
					scancel()
				}
			}))
			if !errors.Is(err, context.Canceled) && status.Code(err) != codes.Canceled {
				errs <- err
			}
		}()
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		t.Fatalf("an aborted session ended with %v, want cancelled", err)
	}
	peak := rss(t, pid)
	// Settle: the retention (1 s) passes and the runtime returns freed
	// memory; read up to 600 times, 200 ms apart.
	after := peak
	for i := 0; i < 600 && after > base+64<<20; i++ {
		time.Sleep(200 * time.Millisecond)
		after = rss(t, pid)
	}
	t.Logf("RSS: %.1f MiB after the first session, %.1f MiB after %d aborted sessions, %.1f MiB settled",
		float64(base)/(1<<20), float64(peak)/(1<<20), aborted, float64(after)/(1<<20))
	if after > base+64<<20 {
		t.Fatalf("RSS %d bytes after %d aborted sessions, more than 64 MiB above %d", after, aborted, base)
	}

	// A thousand streams that never register, over four connections.
	const idle = 1000
	var conns []*grpc.ClientConn
	for range 4 {
		c, err := grpc.NewClient("passthrough:///"+srv.addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
		if err != nil {
			t.Fatal(err)
		}
		defer c.Close()
		conns = append(conns, c)
	}
	var streams []sluicev1.SluiceService_SessionClient
	for i := range idle {
		st, err := sluicev1.NewSluiceServiceClient(conns[i%len(conns)]).Session(ctx)
		if err != nil {
			t.Fatal(err)
		}
		streams = append(streams, st)
	}
	spec.DrawsPerChain = 50
	if sum, err := client.Run(ctx, conn, spec, minusX); err != nil || (sum.Reason != client.DrawsCollected && sum.Reason != client.CheckFailed) {
		t.Fatalf("good session beside %d idle streams: %v\n%s", idle, err, srv.logText())
	}
	if err := srv.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	select {
	case err := <-srv.done:
		if err != nil {
			t.Fatalf("sluice serve exited with %v after SIGTERM:\n%s", err, srv.logText())
		}
	case <-time.After(3 * time.Minute):
		t.Fatalf("sluice serve still running 3 min after SIGTERM with %d idle streams open", idle)
	}
	if !strings.Contains(srv.logText(), `"msg":"stopped"`) {
		t.Fatalf("log lacks the stop record:\n%s", srv.logText())
	}
	for i, st := range streams {
		if _, err := st.Recv(); err == nil {
			t.Fatalf("idle stream %d received a frame", i)
		}
	}
}
