package python_test

import (
	"bufio"
	"bytes"
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"
)

// resumeScript runs one session with the Python client and saves its draws
// (an .npy file, argv[1]). When KILL_AT > 0, the gradient function prints
// KILL at its KILL_AT-th call and waits (at most 2 min) for the file named
// by RESTARTED: the test kills the server with SIGKILL meanwhile and
// restarts it on the same state and port. The client must then resume by
// itself; it prints RESUMES n at the end.
const resumeScript = `
import os, sys, time
import numpy as np
import sluice_client as sc

kill_at = int(os.environ["KILL_AT"])
calls = [0]

def grad(x):
    calls[0] += 1
    if calls[0] == kill_at:
        print("KILL", flush=True)
        for _ in range(12000):
            if os.path.exists(os.environ["RESTARTED"]):
                break
            time.sleep(0.01)
        else:
            sys.exit("the server was not restarted within 2 min")
    return -x

spec = sc.Spec(dim=2, chains=4, start=[0.0, 0.0], step=0.2, seed=4242, burn_in=10, draws_per_chain=150,
               checkpoint_every_steps=7)
s = sc.Session(os.environ["SLUICE_TARGET"], spec, grad, resume=sc.ResumePolicy(attempts=40, first=0.02, max_wait=1.0))
with s:
    for _ in s:
        pass
assert s.summary is not None and s.summary.reason in (sc.FinishReason.DRAWS_COLLECTED, sc.FinishReason.CHECK_FAILED), s.summary
np.save(sys.argv[1], s.summary.draws)
print("RESUMES", s.resumes, flush=True)
`

// The Python client resumes by itself after the server is killed with
// SIGKILL and restarted on the same state directory and port: its draws
// are byte-identical to an uninterrupted session's, and it raises no
// DrawsLostError (no draw lost or repeated). Three kill points.
func TestPythonClientResumesAfterKill(t *testing.T) {
	checkPython(t)
	root := moduleRoot(t)
	dir := filepath.Join(root, "client", "python")
	state := t.TempDir()
	srv := startServer(t, root, "--state-dir", state)
	tmp := t.TempDir()
	ref := filepath.Join(tmp, "ref.npy")
	if out, err := runResume(t, dir, srv.addr, 0, "", ref, nil); err != nil {
		t.Fatalf("uninterrupted session: %v\n%s", err, out)
	}
	want, err := os.ReadFile(ref)
	if err != nil {
		t.Fatal(err)
	}
	for i, k := range []int{3, 57, 141} { // gradient requests: 160 steps, one each
		got := filepath.Join(tmp, "got"+strconv.Itoa(i)+".npy")
		restarted := filepath.Join(tmp, "restarted"+strconv.Itoa(i))
		cur := srv
		out, err := runResume(t, dir, srv.addr, k, restarted, got, func() {
			cur.killed = true
			_ = cur.cmd.Process.Kill()
			<-cur.done
			cur = startServer(t, root, "--state-dir", state, "--addr", srv.addr)
			if err := os.WriteFile(restarted, nil, 0o600); err != nil {
				t.Error(err)
			}
		})
		if err != nil {
			t.Fatalf("kill at request %d: %v\n%s\nserver log:\n%s", k, err, out, cur.logText())
		}
		if !strings.Contains(out, "RESUMES 1") {
			t.Fatalf("kill at request %d: want one resumption:\n%s", k, out)
		}
		b, err := os.ReadFile(got)
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(b, want) {
			t.Fatalf("kill at request %d: draws differ from the uninterrupted session", k)
		}
		srv = cur
	}
}

// runResume runs resumeScript, calling onKill when the script asks for the
// kill; it returns the script's output.
func runResume(t *testing.T, dir, addr string, killAt int, restarted, out string, onKill func()) (string, error) {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	cmd := exec.CommandContext(ctx, python, "-c", resumeScript, out)
	cmd.Dir = dir
	cmd.Env = append(os.Environ(), "PYTHONPATH="+dir, "PYTHONDONTWRITEBYTECODE=1", "SLUICE_TARGET="+addr,
		"KILL_AT="+strconv.Itoa(killAt), "RESTARTED="+restarted)
	cmd.WaitDelay = 5 * time.Second
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		return "", err
	}
	var errBuf bytes.Buffer
	cmd.Stderr = &errBuf
	if err := cmd.Start(); err != nil {
		return "", err
	}
	var text strings.Builder
	sc := bufio.NewScanner(stdout)
	for sc.Scan() {
		line := sc.Text()
		text.WriteString(line + "\n")
		if line == "KILL" && onKill != nil {
			onKill()
		}
	}
	err = cmd.Wait()
	return text.String() + errBuf.String(), err
}
