package main

import (
	"context"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

// python3 is Debian's interpreter, which has numpy (scripts/test installs
// python3-numpy); the test fails, not skips, when it is missing.
const python3 = "/usr/bin/python3"

// The .npy file read back by numpy equals the CSV of the same run, draw
// for draw (numpy's own reader is the reference for the format), and a
// JSON summary sits beside each file.
func TestNPYMatchesCSVReadByNumpy(t *testing.T) {
	dir := t.TempDir()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	for _, name := range []string{"d.csv", "d.npy"} {
		args := []string{"demo", "--seed", "21", "--chains", "3", "--draws", "40", "--burn-in", "20", "--keep-every", "2", "--quiet", "--out", filepath.Join(dir, name)}
		if code, _, stderr := runCmd(t, ctx, args...); code != 0 {
			t.Fatalf("%v: exit %d: %s", args, code, stderr)
		}
	}
	for _, s := range []string{"d.summary.json"} {
		if _, err := os.Stat(filepath.Join(dir, s)); err != nil {
			t.Fatalf("summary beside the draws: %v", err)
		}
	}
	script := `
import sys, numpy as np
a = np.load(sys.argv[1])
assert a.dtype == np.dtype('<f8') and a.shape == (3, 40, 3), (a.dtype, a.shape)
c = np.loadtxt(sys.argv[2], delimiter=',', skiprows=1)
with open(sys.argv[2]) as f:
    assert f.readline().strip() == 'chain,iteration,intercept,temperature,cooling_rate'
for ch in range(3):
    rows = c[c[:, 0] == ch]
    rows = rows[np.argsort(rows[:, 1])]
    assert rows.shape == (40, 5), rows.shape
    assert (rows[:, 1] == 20 + 2 * np.arange(1, 41)).all(), rows[:, 1]
    assert np.array_equal(rows[:, 2:], a[ch]), ch
print('ok')
`
	out, err := exec.CommandContext(ctx, python3, "-c", script, filepath.Join(dir, "d.npy"), filepath.Join(dir, "d.csv")).CombinedOutput()
	if err != nil || strings.TrimSpace(string(out)) != "ok" {
		t.Fatalf("numpy check: %v\n%s", err, out)
	}
}
