package main

import (
	"bytes"
	"context"
	"math"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"sluice/client"
	"sluice/server"
)

// The batch script names the array, exports the environment the worker
// helpers read, reads the token from its file at run time and quotes the
// worker command.
func TestSlurmScriptTemplate(t *testing.T) {
	var out, errb bytes.Buffer
	err := slurmScript([]string{"--target", "10.0.0.5:7070", "--session", "abc", "--token-file", "/secrets/it's",
		"--workers", "4", "--", "/opt/model/worker", "--case", "two words"}, &out, &errb)
	if err != nil {
		t.Fatalf("%v\n%s", err, errb.String())
	}
	s := out.String()
	for _, want := range []string{"#SBATCH --array=0-3\n", "export SLUICE_TARGET='10.0.0.5:7070'\n",
		"export SLUICE_SESSION_ID='abc'\n", `SLUICE_TOKEN=$(cat '/secrets/it'\''s')` + "\n", "export SLUICE_TOKEN\n",
		"export SLUICE_WORKER_INDEX=${SLURM_ARRAY_TASK_ID:-0}\n", "exec '/opt/model/worker' '--case' 'two words'\n"} {
		if !strings.Contains(s, want) {
			t.Errorf("script lacks %q:\n%s", want, s)
		}
	}
	if err := slurmScript([]string{"--target", "h:1", "--session", "abc", "--token-file", "f"}, &out, &errb); err == nil {
		t.Error("a script without a worker command was printed")
	}
}

// A session served by a 4-task Slurm job array of workers, one of which
// is cancelled (scancel) in the middle of the run: nothing is lost and the
// draws equal a one-client run's. It needs a Slurm cluster
// (scripts/slurm-cluster run, which sets SLUICE_REQUIRE_SLURM=1).
func TestSlurmArrayServesASession(t *testing.T) {
	if os.Getenv("SLUICE_REQUIRE_SLURM") != "1" {
		t.Skip("no Slurm cluster: run under scripts/slurm-cluster run (SLUICE_REQUIRE_SLURM=1) to test serving a session from a job array")
	}
	for _, c := range []string{"sbatch", "squeue", "scancel"} {
		if _, err := exec.LookPath(c); err != nil {
			t.Fatalf("SLUICE_REQUIRE_SLURM=1 but %s is missing: %v", c, err)
		}
	}
	dir := t.TempDir()
	worker := filepath.Join(dir, "worker")
	if out, err := exec.Command("go", "build", "-o", worker, "./testdata/slurmworker").CombinedOutput(); err != nil {
		t.Fatalf("building the worker: %v\n%s", err, out)
	}
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	srv := server.New(server.Options{})
	served := make(chan struct{})
	go func() { _ = srv.Serve(lis); close(served) }()
	defer func() { srv.Stop(); <-served }()
	cc, err := client.Dial(lis.Addr().String())
	if err != nil {
		t.Fatal(err)
	}
	defer cc.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()

	spec := client.Spec{Dim: 3, Chains: 16, Start: []float64{1, -1, 0.5}, Step: 0.1, Seed: 31,
		BurnIn: 10, DrawsPerChain: 300, ProgressEverySteps: 1}
	collect := func(values *[]float64) client.Option {
		return client.OnDraws(func(d *client.Draws) { *values = append(*values, d.Values...) })
	}
	var want []float64
	if _, err := client.Run(ctx, cc, spec, func(_ context.Context, b *client.Batch) error {
		for i, x := range b.Points {
			b.Grad[i] = -x
		}
		return nil
	}, collect(&want)); err != nil {
		t.Fatal(err)
	}

	spec.WorkersOnly = true
	var got []float64
	var steps atomic.Int64
	var job string
	var wg sync.WaitGroup
	cancelled := make(chan string, 1)
	sum, err := client.Run(ctx, cc, spec, nil, collect(&got),
		client.OnProgress(func(p *client.Progress) { steps.Store(p.Steps) }),
		client.OnRegistered(func(r *client.Registered) {
			tokenFile := filepath.Join(dir, "token")
			if err := os.WriteFile(tokenFile, []byte(r.Token+"\n"), 0o600); err != nil {
				t.Error(err)
				return
			}
			var script, errb bytes.Buffer
			if err := slurmScript([]string{"--target", lis.Addr().String(), "--session", r.SessionID, "--token-file", tokenFile,
				"--workers", "4", "--", worker}, &script, &errb); err != nil {
				t.Errorf("%v: %s", err, errb.String())
				return
			}
			sb := exec.Command("sbatch", "--parsable")
			sb.Dir, sb.Stdin = dir, &script
			sb.Env = append(os.Environ(), "SLUICE_TEST_ROW_DELAY=1ms")
			out, err := sb.CombinedOutput()
			if err != nil {
				t.Errorf("sbatch: %v\n%s", err, out)
				return
			}
			job = strings.TrimSpace(strings.Split(string(out), ";")[0])
			wg.Add(1)
			go func() { // cancel one running task once the run is under way
				defer wg.Done()
				cancelled <- cancelOneTask(t, job, &steps)
			}()
		}))
	wg.Wait()
	if job != "" {
		_ = exec.Command("scancel", job).Run()
		waitQueueEmpty(t, job)
	}
	if err != nil {
		t.Fatalf("pool run: %v", err)
	}
	task := <-cancelled
	if task == "" {
		t.Fatal("no array task was cancelled mid-run")
	}
	if sum.DrawsReceived != int64(spec.Chains)*spec.DrawsPerChain {
		t.Fatalf("%d draws, want %d", sum.DrawsReceived, int64(spec.Chains)*spec.DrawsPerChain)
	}
	if len(got) != len(want) {
		t.Fatalf("%d values from the array, %d from one client", len(got), len(want))
	}
	for i := range want {
		if math.Float64bits(got[i]) != math.Float64bits(want[i]) {
			t.Fatalf("value %d: %v from the array, %v from one client", i, got[i], want[i])
		}
	}
	t.Logf("task %s cancelled at step ≥ 50; rows reissued %d, late answers %d, workers at the end %d",
		task, sum.Progress.RowsReissued, sum.Progress.AnswersLate, len(sum.Progress.Workers))
}

// cancelOneTask waits (bounded polling) until the session is 50 steps in
// and a task of job runs, then cancels that task and returns its id.
func cancelOneTask(t *testing.T, job string, steps *atomic.Int64) string {
	for range 6000 { // at most a minute
		if steps.Load() >= 50 {
			out, err := exec.Command("squeue", "-h", "-j", job, "-t", "RUNNING", "-o", "%i").Output()
			if err == nil {
				if f := strings.Fields(string(out)); len(f) > 0 {
					if err := exec.Command("scancel", f[0]).Run(); err != nil {
						t.Errorf("scancel %s: %v", f[0], err)
						return ""
					}
					return f[0]
				}
			}
		}
		time.Sleep(10 * time.Millisecond)
	}
	return ""
}

// waitQueueEmpty polls squeue (bounded) until job has left the queue.
func waitQueueEmpty(t *testing.T, job string) {
	for range 3000 {
		out, err := exec.Command("squeue", "-h", "-j", job, "-o", "%i").Output()
		if err != nil || strings.TrimSpace(string(out)) == "" {
			return
		}
		time.Sleep(20 * time.Millisecond)
	}
	t.Errorf("job %s still queued after a minute", job)
}
