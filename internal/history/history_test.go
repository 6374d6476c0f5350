package history

import (
	"bytes"
	"encoding/json"
	"math"
	"path/filepath"
	"strings"
	"testing"
)

func sample() []Record {
	nan := Num(math.NaN())
	p := Record{Kind: KindProgress, State: "sampling", Steps: 200, EvaluationsUsed: 1600, EvaluationsLeft: -1,
		ElapsedSeconds: 0.25, SecondsLeft: 49.75, DrawsSent: 80,
		Params:  []Param{{Name: "a", Rhat: 1.2, BulkESS: 40, TailESS: 35}, {Name: "b", Rhat: 1.05, BulkESS: nan, TailESS: 60}},
		Stein:   &Stein{Value: 0.3, SE: nan, Upper: nan},
		Bound:   &Bound{Metric: "tv", Value: 0.9, Guaranteed: true, Label: "guaranteed"},
		Targets: []Target{{Name: "rhat", Want: 1.01, Current: 1.2, ProjectedEvaluations: -1}}}
	p.Summarise()
	f := Record{Kind: KindFinish, State: "finished", Steps: 400, EvaluationsUsed: 3200, EvaluationsLeft: -1,
		ElapsedSeconds: 0.5, SecondsLeft: -1, Reason: "draws collected"}
	f.Summarise()
	return []Record{p, f}
}

func TestRoundTrip(t *testing.T) {
	path := filepath.Join(t.TempDir(), "h.jsonl")
	w, err := Create(path)
	if err != nil {
		t.Fatal(err)
	}
	in := sample()
	for i := range in {
		if err := w.Write(&in[i]); err != nil {
			t.Fatal(err)
		}
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	out, err := ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if len(out) != 2 {
		t.Fatalf("read %d records, want 2", len(out))
	}
	// Worst R-hat and smallest ESS by hand: max(1.2, 1.05), min(40, 35, 60).
	if out[0].WorstRhat != 1.2 || out[0].SmallestESS != 35 {
		t.Errorf("worst R-hat %v, least ESS %v; want 1.2, 35", out[0].WorstRhat, out[0].SmallestESS)
	}
	if !math.IsNaN(float64(out[0].Params[1].BulkESS)) || out[0].Params[1].TailESS != 60 {
		t.Errorf("param b = %+v, want bulk NaN (null), tail 60", out[0].Params[1])
	}
	if out[0].Bound == nil || out[0].Bound.Value != 0.9 || !out[0].Bound.Guaranteed || out[0].Targets[0].Want != 1.01 {
		t.Errorf("bound or targets lost: %+v %+v", out[0].Bound, out[0].Targets)
	}
	if out[1].Kind != KindFinish || out[1].Reason != "draws collected" || out[1].EvaluationsUsed != 3200 {
		t.Errorf("finish record = %+v", out[1])
	}
	if !math.IsNaN(float64(out[1].WorstRhat)) {
		t.Errorf("finish record without params has worst R-hat %v, want NaN", out[1].WorstRhat)
	}
}

func TestLinesAreJSONWithOurKeys(t *testing.T) {
	var buf bytes.Buffer
	w := NewWriter(&buf)
	in := sample()
	if err := w.Write(&in[0]); err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimSuffix(buf.String(), "\n"), "\n")
	if len(lines) != 1 {
		t.Fatalf("%d lines, want 1", len(lines))
	}
	var m map[string]any
	if err := json.Unmarshal([]byte(lines[0]), &m); err != nil {
		t.Fatal(err)
	}
	for _, k := range []string{"kind", "evals_used", "evals_left", "elapsed_s", "params", "worst_rhat", "least_ess", "stein", "bound", "targets"} {
		if _, ok := m[k]; !ok {
			t.Errorf("key %q missing from %s", k, lines[0])
		}
	}
	if s := m["stein"].(map[string]any); s["se"] != nil {
		t.Errorf("stein.se = %v, want null for NaN", s["se"])
	}
}

func TestReadCutShortAndBad(t *testing.T) {
	good := `{"kind":"progress","evals_used":10}` + "\n"
	recs, err := Read(strings.NewReader(good + "\n" + `{"kind":"progr`))
	if err != nil || len(recs) != 1 || recs[0].EvaluationsUsed != 10 {
		t.Errorf("cut-short last line: %v records, err %v; want 1, nil", len(recs), err)
	}
	if _, err := Read(strings.NewReader(good + "not json\n" + good)); err == nil || !strings.Contains(err.Error(), "line 2") {
		t.Errorf("bad middle line: err %v, want one naming line 2", err)
	}
	if _, err := Read(strings.NewReader(`{"kind":"other"}` + "\n")); err == nil {
		t.Error("unknown kind accepted")
	}
}
