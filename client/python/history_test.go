package python_test

import (
	"math"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"sluice/internal/report"
)

// writeFilesPy runs a session from Python and writes the draws (with
// names) and the progress history beside them, as `sluice demo --out`
// does, so that `sluice report` reads them.
const writeFilesPy = `
import os, sys
import numpy as np
import sluice_client as sc

out = sys.argv[1]
spec = sc.Spec(dim=2, chains=4, start=np.zeros(2), step=0.2, burn_in=50, draws_per_chain=100,
               seed=3, names=["left", "right"], progress_every_steps=30)
with sc.HistoryWriter(out + ".history.jsonl") as h:
    summary = sc.run(os.environ["SLUICE_TARGET"], spec, lambda x: -x, on_progress=h.write, timeout=120)
    h.finish(summary)
summary.save(out)
print("reason:", summary.reason.value)
print("checks:", ";".join(f"{c.name}={c.status.value}" for c in summary.checks))
`

// TestPythonWritesFilesTheReportReads checks that the draws and the
// progress history written by the Python client are read by the Go
// reader behind `sluice report` (internal/report.Load, which reads the
// history with client/history): the names, every draw, and one record
// per report (floor(150/30) = 5 reports at steps 30, 60, …, 150, the
// session's own cadence) plus the finish record with its reason and the
// session's verdict, which the report shows.
func TestPythonWritesFilesTheReportReads(t *testing.T) {
	checkPython(t)
	root := moduleRoot(t)
	dir := filepath.Join(root, "client", "python")
	srv := startServer(t, root)
	draws := filepath.Join(t.TempDir(), "draws.csv")
	out, err := runPython(t, dir, srv.addr, 5*time.Minute, "-c", writeFilesPy, draws)
	if err != nil {
		t.Fatalf("python: %v\n%s\nserver log:\n%s", err, out, srv.logText())
	}
	run, err := report.Load(draws, "")
	if err != nil {
		t.Fatal(err)
	}
	if len(run.Names) != 2 || run.Names[0] != "left" || run.Names[1] != "right" || len(run.Draws[0]) != 4 || len(run.Draws[0][0]) != 100 {
		t.Fatalf("draws: names %v, %d chains of %d draws; want [left right], 4 of 100", run.Names, len(run.Draws[0]), len(run.Draws[0][0]))
	}
	h := run.History
	if len(h) != 6 {
		t.Fatalf("history: %d records, want 5 reports and the finish\n%+v", len(h), h)
	}
	for i, r := range h[:5] {
		if r.Kind != "progress" || r.Steps != int64(30*(i+1)) || r.EvaluationsLeft != -1 {
			t.Errorf("record %d: %+v", i, r)
		}
	}
	last := h[5]
	// A run of 100 draws per chain may end with a failed check of the
	// verdict (R-hat over 1.1 at a bulk ESS near 10 per chain is a matter
	// of chance); every draw still arrives, and the files are what is
	// checked here.
	if last.Kind != "finish" || (last.Reason != "draws collected" && last.Reason != "check failed") || last.State != "finished" || last.DrawsSent != 400 ||
		len(last.Params) != 2 || last.Params[1].Name != "right" || !last.WorstRhat.Valid() || !last.SmallestESS.Valid() {
		t.Fatalf("finish record %+v", last)
	}
	// worst_rhat and least_ess are the extremes of the per-parameter
	// figures, as the Go writer computes them (history.Record.Summarise).
	var checks []string
	for _, c := range run.Verdict {
		checks = append(checks, c.Name+"="+c.Status)
	}
	if len(checks) == 0 || !strings.Contains(string(out), "checks: "+strings.Join(checks, ";")+"\n") {
		t.Errorf("verdict read from the history %v; Python printed\n%s", checks, out)
	}
	want := last
	want.Summarise()
	if math.Abs(float64(want.WorstRhat-last.WorstRhat)) > 0 || math.Abs(float64(want.SmallestESS-last.SmallestESS)) > 0 {
		t.Errorf("worst R-hat %v, least ESS %v; from the parameters: %v, %v", last.WorstRhat, last.SmallestESS, want.WorstRhat, want.SmallestESS)
	}
}
