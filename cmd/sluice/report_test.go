package main

import (
	"context"
	"encoding/json"
	"math"
	"net"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	"sluice/client"
	"sluice/client/history"
	"sluice/internal/report"
	"sluice/server"
	"sluice/server/session"
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

// TestGoClientWritesWhatReportReads runs a session with the Go client's
// WriteHistory and WriteDraws on a server on 127.0.0.1, then reads the
// files back as `sluice report` does (report.Load) and runs the command:
// the names and every draw bit for bit (the client's own KeepDraws copy is
// the reference), one record per progress report the client saw plus the
// finish record with the summary's reason, and the summary's verdict on
// the page, taken from the history (no summary file is written).
func TestGoClientWritesWhatReportReads(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	// Every report measured (DiagnosticsShare −1), so the reports fall at
	// the steps asked for whatever the machine's load.
	srv := server.New(server.Options{Limits: session.Limits{DiagnosticsShare: -1}})
	go func() { _ = srv.Serve(lis) }()
	defer srv.Stop()
	cc, err := grpc.NewClient(lis.Addr().String(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer cc.Close()

	dir := t.TempDir()
	drawsPath := filepath.Join(dir, "run.csv")
	names := []string{"left", "right"}
	h, err := history.Create(drawsPath + ".history.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	d, err := history.CreateDraws(drawsPath, names)
	if err != nil {
		t.Fatal(err)
	}
	// A standard Gaussian (∇log π = −x); 50 burn-in steps and 100 kept,
	// a report every 30 steps.
	spec := client.Spec{Dim: 2, Chains: 4, Start: []float64{1, -1}, Step: 0.2, BurnIn: 50, DrawsPerChain: 100, Seed: 11,
		ProgressEverySteps: 30, Names: names, MaxEvaluations: 100000}
	reports := 0
	sum, err := client.Run(ctx, cc, spec, func(ctx context.Context, b *client.Batch) error {
		for i, x := range b.Points {
			b.Grad[i] = -x
		}
		return nil
	}, client.WriteHistory(h), client.WriteDraws(d), client.KeepDraws(), client.OnProgress(func(*client.Progress) { reports++ }))
	if err != nil {
		t.Fatal(err)
	}
	if err := h.Close(); err != nil {
		t.Fatal(err)
	}
	if err := d.Close(); err != nil {
		t.Fatal(err)
	}
	if len(sum.Checks) == 0 {
		t.Fatal("the session's summary has no verdict to compare")
	}

	run, err := report.Load(drawsPath, "")
	if err != nil {
		t.Fatal(err)
	}
	if strings.Join(run.Names, ",") != "left,right" || run.Chains() != 4 || run.Len() != 100 || run.Dropped != 0 {
		t.Fatalf("draws: names %v, %d chains of %d (%d dropped); want [left right], 4 of 100", run.Names, run.Chains(), run.Len(), run.Dropped)
	}
	seen := make([]int, 4)
	for i := range sum.Draws.Rows() {
		ch := sum.Draws.Chains[i]
		for p, want := range sum.Draws.Row(i) {
			if got := run.Draws[p][ch][seen[ch]]; math.Float64bits(got) != math.Float64bits(want) {
				t.Fatalf("draw %d of chain %d, %s: %v in the file, %v received", seen[ch], ch, names[p], got, want)
			}
		}
		seen[ch]++
	}

	recs := run.History
	if reports == 0 || len(recs) != reports+1 {
		t.Fatalf("history: %d records for %d reports; want one per report and the finish", len(recs), reports)
	}
	last := recs[len(recs)-1]
	if last.Kind != history.KindFinish || last.Reason != string(sum.Reason) || last.EvaluationsUsed != sum.Progress.EvaluationsUsed ||
		last.DrawsSent != 400 || len(last.Params) != 2 {
		t.Errorf("finish record %+v; want reason %q, %d evaluations, 400 draws, 2 parameters", last, sum.Reason, sum.Progress.EvaluationsUsed)
	}
	if len(run.Verdict) != len(sum.Checks) {
		t.Fatalf("verdict of %d checks read, the summary has %d", len(run.Verdict), len(sum.Checks))
	}
	for i, c := range sum.Checks {
		v := run.Verdict[i]
		if v.Name != c.Name || v.Status != string(c.Status) || v.Sentence != c.Message {
			t.Errorf("check %d read as %+v, want %+v", i, v, c)
		}
	}

	pages := filepath.Join(dir, "pages")
	if code, _, stderr := runCmd(t, ctx, "report", drawsPath, "--out", pages); code != 0 {
		t.Fatalf("report: exit %d\n%s", code, stderr)
	}
	page, err := os.ReadFile(filepath.Join(pages, "index.html"))
	if err != nil {
		t.Fatal(err)
	}
	for _, s := range append([]string{"Verdict", "progress.png", "left", "right"}, sum.Checks[0].Name) {
		if !strings.Contains(string(page), s) {
			t.Errorf("index.html lacks %q", s)
		}
	}
}
