package python_test

// This file runs the Python client's tests (client/python/tests, with
// pytest) and its example against a real server: it builds the sluice command, starts
// `sluice serve` on a free loopback port, and runs /usr/bin/python3 with
// the server's address in SLUICE_TARGET. Missing Python modules fail the
// test (scripts/test installs them); they are never a reason to skip.

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"sluice/client"
)

// python is the interpreter the client targets: Debian's, which has the
// python3-grpcio, python3-protobuf and python3-numpy packages (another
// python3 earlier on PATH may lack them).
const python = "/usr/bin/python3"

// checkPython fails the test when the interpreter or a module the client
// needs is missing.
func checkPython(t testing.TB) {
	t.Helper()
	if _, err := os.Stat(python); err != nil {
		t.Fatalf("%s: %v (apt-get install python3 python3-grpcio python3-protobuf python3-numpy)", python, err)
	}
	// pip and setuptools are looked up, not imported: importing both into
	// one interpreter trips setuptools' distutils shim. ensurepip comes with
	// python3-venv, which the install test's virtual environment needs.
	out, err := exec.Command(python, "-c", "import grpc, google.protobuf, numpy, pytest, ensurepip, distributed, mpi4py\n"+
		"import importlib.util as u\nassert u.find_spec('pip') and u.find_spec('setuptools')").CombinedOutput()
	if err == nil {
		if _, lerr := exec.LookPath("mpiexec"); lerr != nil {
			err = lerr
		}
	}
	if err != nil {
		t.Fatalf("%s lacks grpc, google.protobuf, numpy, pytest, ensurepip, pip, setuptools, distributed, mpi4py or mpiexec: %v\n%s"+
			"(apt-get install python3-grpcio python3-protobuf python3-numpy python3-pytest python3-pip python3-setuptools python3-venv "+
			"python3-distributed python3-mpi4py openmpi-bin)", python, err, out)
	}
}

// moduleRoot returns the directory of the main module's go.mod.
func moduleRoot(t testing.TB) string {
	t.Helper()
	out, err := exec.Command("go", "env", "GOMOD").Output()
	if err != nil {
		t.Fatalf("go env GOMOD: %v", err)
	}
	gomod := strings.TrimSpace(string(out))
	if gomod == "" || gomod == os.DevNull {
		t.Fatalf("go env GOMOD: not inside a module (%q)", gomod)
	}
	return filepath.Dir(gomod)
}

// server is a running `sluice serve`.
type server struct {
	addr string
	cmd  *exec.Cmd
	mu   sync.Mutex
	log  bytes.Buffer
	done chan struct{} // closed when stderr is drained
	// killed is set when a test ended the server with SIGKILL on purpose.
	killed bool
}

func (s *server) logText() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.log.String()
}

// startServer builds the sluice command into a temporary directory and
// starts `sluice serve` on 127.0.0.1 with a port the kernel picks; it
// returns once the server has logged the address it listens on. The
// server is stopped (SIGTERM, then killed) when the test ends. args are
// added to the command line (a later --addr replaces the free port).
func startServer(t testing.TB, root string, args ...string) *server {
	t.Helper()
	bin := filepath.Join(t.TempDir(), "sluice")
	bctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	build := exec.CommandContext(bctx, "go", "build", "-o", bin, "./cmd/sluice")
	build.Dir = root
	if out, err := build.CombinedOutput(); err != nil {
		t.Fatalf("go build ./cmd/sluice: %v\n%s", err, out)
	}

	s := &server{done: make(chan struct{})}
	// The Follow tests need draws kept for followers: --follow-buffer is
	// given explicitly (its default, 100000 rows, is on too).
	s.cmd = exec.Command(bin, append([]string{"serve", "--addr", "127.0.0.1:0", "--log-level", "info", "--grace", "5s",
		"--follow-buffer", "100000"}, args...)...)
	stderr, err := s.cmd.StderrPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := s.cmd.Start(); err != nil {
		t.Fatalf("starting sluice serve: %v", err)
	}
	addrc := make(chan string, 1)
	go func() {
		defer close(s.done)
		sc := bufio.NewScanner(stderr)
		for sc.Scan() {
			line := sc.Bytes()
			s.mu.Lock()
			s.log.Write(line)
			s.log.WriteByte('\n')
			s.mu.Unlock()
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
	t.Cleanup(func() { s.stop(t) })
	select {
	case s.addr = <-addrc:
	case <-s.done:
		t.Fatalf("sluice serve exited before serving:\n%s", s.logText())
	case <-time.After(3 * time.Minute):
		t.Fatalf("sluice serve did not report its address within 3 min:\n%s", s.logText())
	}
	return s
}

// stop sends SIGTERM and waits a bounded time for a graceful exit, then
// kills the server.
func (s *server) stop(t testing.TB) {
	_ = s.cmd.Process.Signal(syscall.SIGTERM)
	exited := make(chan error, 1)
	go func() { <-s.done; exited <- s.cmd.Wait() }()
	select {
	case err := <-exited:
		if err != nil && !s.killed {
			t.Errorf("sluice serve exited with %v after SIGTERM:\n%s", err, s.logText())
		}
	case <-time.After(2 * time.Minute):
		_ = s.cmd.Process.Kill()
		<-exited
		t.Errorf("sluice serve did not stop within 2 min of SIGTERM; killed")
	}
}

// runPython runs the interpreter in dir with the client package on the
// path and the server's address in SLUICE_TARGET, bounded by timeout.
func runPython(t testing.TB, dir, addr string, timeout time.Duration, args ...string) (string, error) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), timeout)
	defer cancel()
	cmd := exec.CommandContext(ctx, python, args...)
	cmd.Dir = dir
	cmd.Env = append(os.Environ(),
		"PYTHONPATH="+dir,
		"PYTHONDONTWRITEBYTECODE=1", // leave no __pycache__ in the source tree
		"SLUICE_TARGET="+addr,
	)
	cmd.WaitDelay = 5 * time.Second
	out, err := cmd.CombinedOutput()
	if errors.Is(ctx.Err(), context.DeadlineExceeded) {
		return string(out), errors.New("timed out after " + timeout.String())
	}
	return string(out), err
}

// pytestPassed matches pytest's closing line when every test passed (and
// at least one ran): "===== 42 passed in 3.1s =====".
var pytestPassed = regexp.MustCompile(`(?m)^=+ ([1-9][0-9]*) passed(, [0-9]+ warnings?)? in [0-9.]+s`)

func TestPythonClient(t *testing.T) {
	checkPython(t)
	root := moduleRoot(t)
	dir := filepath.Join(root, "client", "python")
	srv := startServer(t, root)

	t.Run("pytest", func(t *testing.T) {
		// -p no:cacheprovider: leave no .pytest_cache in the source tree.
		out, err := runPython(t, dir, srv.addr, 15*time.Minute, "-m", "pytest", "-p", "no:cacheprovider", "-v", "-rs", "tests")
		if err != nil || !pytestPassed.MatchString(out) {
			t.Fatalf("python -m pytest: %v\n%s\nserver log:\n%s", err, out, srv.logText())
		}
		t.Logf("%s", out)
	})

	t.Run("example", func(t *testing.T) {
		out, err := runPython(t, dir, srv.addr, 2*time.Minute, "examples/billet_cooling.py", "--target", srv.addr,
			"--chains", "4", "--draws", "150", "--burn-in", "150", "--seed", "5")
		// A short run may end with a failed check of the verdict: every
		// draw still arrives, and the example is what is checked here.
		if err != nil || !(strings.Contains(out, "reason: draws collected") || strings.Contains(out, "reason: check failed")) {
			t.Fatalf("examples/billet_cooling.py: %v\n%s\nserver log:\n%s", err, out, srv.logText())
		}
		t.Logf("%s", out)
	})

	t.Run("executor example", func(t *testing.T) {
		out, err := runPython(t, dir, srv.addr, 5*time.Minute, "examples/pond_algae.py", "--target", srv.addr,
			"--workers", "2", "--chains", "4", "--draws", "20", "--burn-in", "20", "--seed", "5")
		if err != nil || !strings.Contains(out, "draws collected") || !strings.Contains(out, "with 2 worker processes") {
			t.Fatalf("examples/pond_algae.py: %v\n%s\nserver log:\n%s", err, out, srv.logText())
		}
		t.Logf("%s", out)
	})
}

// BenchmarkPythonClient compares, at dim 1000 with 64 chains (a Gaussian
// with diagonal precision), the Python client sampling through sluice with
// a hand-written numpy LMC loop making the same steps in-process (bench.py
// measures both and prints their ratio), and, for scale, the Go client
// through the same server. Run with -benchtime 1x:
//
//	go test -run XXX -bench PythonClient -benchtime 1x ./client/python/
func BenchmarkPythonClient(b *testing.B) {
	checkPython(b)
	root := moduleRoot(b)
	dir := filepath.Join(root, "client", "python")
	srv := startServer(b, root)
	const dim, chains, steps = 1000, 64, 300

	b.Run("python-vs-numpy", func(b *testing.B) {
		b.ReportAllocs()
		var res struct {
			SluiceDrawsPerSecond float64 `json:"sluice_draws_per_second"`
			NumpyDrawsPerSecond  float64 `json:"numpy_draws_per_second"`
			SluiceMsPerStep      float64 `json:"sluice_ms_per_step"`
			NumpyMsPerStep       float64 `json:"numpy_ms_per_step"`
			Ratio                float64 `json:"ratio"`
		}
		for b.Loop() {
			out, err := runPython(b, dir, srv.addr, 10*time.Minute, "bench.py", "--target", srv.addr, "--json",
				"--dim", strconv.Itoa(dim), "--chains", strconv.Itoa(chains), "--steps", strconv.Itoa(steps))
			if err != nil {
				b.Fatalf("bench.py: %v\n%s", err, out)
			}
			if err := json.Unmarshal([]byte(lastLine(out)), &res); err != nil {
				b.Fatalf("bench.py output: %v\n%s", err, out)
			}
		}
		b.ReportMetric(res.SluiceDrawsPerSecond, "sluice-draws/s")
		b.ReportMetric(res.NumpyDrawsPerSecond, "numpy-draws/s")
		b.ReportMetric(res.SluiceMsPerStep, "sluice-ms/step")
		b.ReportMetric(res.NumpyMsPerStep, "numpy-ms/step")
		b.ReportMetric(res.Ratio, "numpy/sluice")
	})

	b.Run("go-client", func(b *testing.B) {
		b.ReportAllocs()
		cc, err := grpc.NewClient("passthrough:///"+srv.addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
		if err != nil {
			b.Fatal(err)
		}
		defer cc.Close()
		d := make([]float64, dim)
		for i := range d {
			d[i] = 1 + 9*float64(i)/float64(dim-1) // as bench.py: evenly spaced in [1, 10]
		}
		spec := client.Spec{Dim: dim, Chains: chains, Start: make([]float64, dim), Step: 0.05, KeepEvery: 1,
			DrawsPerChain: steps, Seed: 1, MaxMessageBytes: 16 << 20}
		eval := func(_ context.Context, bt *client.Batch) error {
			for i, x := range bt.Points {
				bt.Grad[i] = -d[i%dim] * x
			}
			return nil
		}
		var draws int64
		start := time.Now()
		for b.Loop() {
			ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
			sum, err := client.Run(ctx, cc, spec, eval)
			cancel()
			if err != nil {
				b.Fatal(err)
			}
			draws += sum.DrawsReceived
		}
		sec := time.Since(start).Seconds()
		b.ReportMetric(float64(draws)/sec, "draws/s")
		b.ReportMetric(sec*1e3/float64(int64(b.N)*steps), "ms/step")
	})
}

func lastLine(s string) string {
	lines := strings.Split(strings.TrimSpace(s), "\n")
	return lines[len(lines)-1]
}
