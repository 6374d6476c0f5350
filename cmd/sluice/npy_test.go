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
// for draw (numpy's own reader is the reference for the format); each
// file gets its own JSON summary (name + ".summary.json"), the .npy one
// naming the array's axes and parameters; and the summary's mean,
// spread, median and interval equal numpy's mean, std (ddof = 1) and
// quantiles (numpy's default linear method) of the same draws.
func TestNPYMatchesCSVReadByNumpy(t *testing.T) {
	dir := t.TempDir()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	for _, name := range []string{"d.csv", "d.npy"} {
		args := []string{"demo", "--seed", "21", "--chains", "3", "--draws", "40", "--burn-in", "20", "--keep-every", "2", "--quiet",
			"--interval", "0.8", "--out", filepath.Join(dir, name)}
		if code, _, stderr := runCmd(t, ctx, args...); code != 0 {
			t.Fatalf("%v: exit %d: %s", args, code, stderr)
		}
	}
	for _, s := range []string{"d.csv.summary.json", "d.npy.summary.json"} {
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
import json
with open(sys.argv[3]) as f:
    s = json.load(f)
d = s['draws_file']
assert d['format'] == 'npy' and d['shape'] == list(a.shape) and d['summary'] == sys.argv[3], d
assert d['parameter_names'] == ['intercept', 'temperature', 'cooling_rate'], d
for i, p in enumerate(s['parameters']):
    x = a[:, :, i].ravel()
    assert p['name'] == d['parameter_names'][i]
    assert abs(p['mean'] - x.mean()) <= 1e-12 * max(1, abs(x.mean())), (p['mean'], x.mean())
    assert abs(p['spread'] - x.std(ddof=1)) <= 1e-12, (p['spread'], x.std(ddof=1))
    assert abs(p['median'] - np.quantile(x, 0.5)) <= 1e-12, p['median']
    iv = p['interval']
    assert iv['level'] == 0.8
    assert abs(iv['low'] - np.quantile(x, 0.1)) <= 1e-12 and abs(iv['high'] - np.quantile(x, 0.9)) <= 1e-12, iv
    assert p['mean_error'] > 0 and set(p['mixing']) == {'rhat', 'ess_bulk', 'ess_tail'}, p
with open(sys.argv[4]) as f:
    c = json.load(f)
assert c['draws_file']['format'] == 'csv' and c['draws_file']['parameter_names'] == d['parameter_names'], c['draws_file']
print('ok')
`
	out, err := exec.CommandContext(ctx, python3, "-c", script, filepath.Join(dir, "d.npy"), filepath.Join(dir, "d.csv"),
		filepath.Join(dir, "d.npy.summary.json"), filepath.Join(dir, "d.csv.summary.json")).CombinedOutput()
	if err != nil || strings.TrimSpace(string(out)) != "ok" {
		t.Fatalf("numpy check: %v\n%s", err, out)
	}
}
