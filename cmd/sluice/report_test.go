package main

import (
	"context"
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"sluice/client"
	"sluice/internal/history"
	"sluice/internal/report"
)

// The demo writes its progress history beside --out, and sluice report
// turns the draws (.npy, names from the summary), summary and history
// into a page.
func TestDemoHistoryAndReport(t *testing.T) {
	dir := t.TempDir()
	out := filepath.Join(dir, "kiln.npy")
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	code, _, stderr := runCmd(t, ctx, "demo", "--seed", "9", "--json", "--out", out, "--draws", "200", "--chains", "4", "--burn-in", "300")
	if code != 0 {
		t.Fatalf("demo: exit %d\n%s", code, stderr)
	}
	recs, err := history.ReadFile(out + ".history.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	if len(recs) < 2 {
		t.Fatalf("%d history records, want progress reports and a finish", len(recs))
	}
	// The summary under whichever name the demo gives it beside --out.
	var b []byte
	for _, p := range report.SidecarPaths(out, "summary.json") {
		if b, err = os.ReadFile(p); err == nil {
			break
		}
	}
	if err != nil {
		t.Fatal(err)
	}
	var res demoResult
	if err := json.Unmarshal(b, &res); err != nil {
		t.Fatal(err)
	}
	last := recs[len(recs)-1]
	if last.Kind != history.KindFinish || last.Reason != res.Reason || last.EvaluationsUsed != res.Evaluations {
		t.Errorf("last record %s/%q/%d evaluations, want finish/%q/%d as in the summary",
			last.Kind, last.Reason, last.EvaluationsUsed, res.Reason, res.Evaluations)
	}
	for i, r := range recs[:len(recs)-1] {
		if r.Kind != history.KindProgress {
			t.Errorf("record %d is %q, want progress", i, r.Kind)
		}
		if i > 0 && r.EvaluationsUsed < recs[i-1].EvaluationsUsed {
			t.Errorf("record %d: evaluations went down from %d to %d", i, recs[i-1].EvaluationsUsed, r.EvaluationsUsed)
		}
	}
	if len(last.Params) != 3 || last.Bound == nil {
		t.Errorf("finish record lacks the parameters or the bound: %+v", last)
	}

	rep := filepath.Join(dir, "pages")
	code, stdout, stderr := runCmd(t, ctx, "report", out, "--out", rep, "--interval", "0.8")
	if code != 0 {
		t.Fatalf("report: exit %d\n%s", code, stderr)
	}
	if !strings.Contains(stdout, "index.html") {
		t.Errorf("report said %q", stdout)
	}
	page, err := os.ReadFile(filepath.Join(rep, "index.html"))
	if err != nil {
		t.Fatal(err)
	}
	for _, s := range append(kilnNames, "80% interval", "progress.png", "pairs.png") {
		if !strings.Contains(string(page), s) {
			t.Errorf("index.html lacks %q", s)
		}
	}
}

func TestReportUsage(t *testing.T) {
	ctx := context.Background()
	for _, args := range [][]string{
		{"report"},
		{"report", "x.csv", "--interval", "1.5"},
		{"report", "x.csv", "y.csv"},
		{"report", "--nonsense", "x.csv"},
	} {
		if code, _, _ := runCmd(t, ctx, args...); code != 2 {
			t.Errorf("%v: exit %d, want 2", args, code)
		}
	}
	if code, _, _ := runCmd(t, ctx, "report", filepath.Join(t.TempDir(), "absent.csv")); code != 1 {
		t.Errorf("missing draws file: exit %d, want 1", code)
	}
	if code, _, _ := runCmd(t, ctx, "report", "-h"); code != 0 {
		t.Errorf("report -h: exit %d, want 0", code)
	}
}

func TestHistoryRecord(t *testing.T) {
	p := &client.Progress{State: client.Sampling, Steps: 40, EvaluationsUsed: 320, EvaluationsLeft: -1,
		Elapsed: 1500 * time.Millisecond, TimeLeft: -1, DrawsSent: 64, KSD: -1,
		Parameters: []client.Diagnostics{{Name: "a", Rhat: 1.3, BulkESS: 12, TailESS: 9}, {Name: "b", Rhat: 1.1, BulkESS: math.NaN(), TailESS: 30}},
		Targets:    []client.TargetStatus{{Name: "max_rhat", Want: 1.01, Current: 1.3, ProjectedEvaluations: -1}}}
	r := historyRecord(history.KindProgress, p, "", "")
	if r.Stein != nil {
		t.Errorf("Stein discrepancy %+v recorded where the server had none (−1)", r.Stein)
	}
	if r.WorstRhat != 1.3 || r.SmallestESS != 9 || r.ElapsedSeconds != 1.5 || r.SecondsLeft != -1 {
		t.Errorf("worst R-hat %v, least ESS %v, elapsed %v, left %v; want 1.3, 9, 1.5, −1", r.WorstRhat, r.SmallestESS, r.ElapsedSeconds, r.SecondsLeft)
	}
	if len(r.Targets) != 1 || r.Targets[0].Want != 1.01 {
		t.Errorf("targets %+v", r.Targets)
	}
	p.KSD = 0.25
	if r := historyRecord(history.KindFinish, p, client.TargetMet, ""); r.Stein == nil || r.Stein.Value != 0.25 || r.Reason != "target met" {
		t.Errorf("finish record %+v", r)
	}
}
