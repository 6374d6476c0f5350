package history

import (
	"bytes"
	"encoding/csv"
	"encoding/json"
	"math"
	"os"
	"path/filepath"
	"strconv"
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
		ElapsedSeconds: 0.5, SecondsLeft: -1, Reason: "draws collected",
		Checks: []Check{{Name: "mixing", Status: "pass", Figure: 1.004, Sentence: "R-hat is below 1.01."},
			{Name: "guarantee", Status: "warn", Figure: nan, Sentence: "no curvature declared"}}}
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
	if c := out[1].Checks; len(c) != 2 || c[0] != in[1].Checks[0] || c[1].Name != "guarantee" || c[1].Status != "warn" || c[1].Figure.Valid() {
		t.Errorf("finish record's checks = %+v, want %+v", c, in[1].Checks)
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

// TestDrawsCSV reads what DrawsWriter wrote with encoding/csv and
// strconv: the header, and every value bit for bit ('g' with precision −1
// is the shortest form that parses back to the same float64, as the
// strconv documentation states).
func TestDrawsCSV(t *testing.T) {
	path := filepath.Join(t.TempDir(), "draws.csv")
	d, err := CreateDraws(path, []string{"a", "b"})
	if err != nil {
		t.Fatal(err)
	}
	rows := [][]float64{{0.1, -1e-300}, {math.Pi, 1.0 / 3}, {math.Copysign(0, -1), 12345678.9}}
	for i, r := range rows {
		d.Row(i%2, int64(10*i), r)
	}
	if err := d.Close(); err != nil {
		t.Fatal(err)
	}
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	recs, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if len(recs) != 4 || strings.Join(recs[0], ",") != "chain,iteration,a,b" {
		t.Fatalf("read %q", recs)
	}
	for i, r := range rows {
		rec := recs[i+1]
		if rec[0] != strconv.Itoa(i%2) || rec[1] != strconv.Itoa(10*i) {
			t.Errorf("row %d: chain, iteration %q, want %d, %d", i, rec[:2], i%2, 10*i)
		}
		for j, want := range r {
			got, err := strconv.ParseFloat(rec[2+j], 64)
			if err != nil || math.Float64bits(got) != math.Float64bits(want) {
				t.Errorf("row %d value %d: %q, want %v bit for bit", i, j, rec[2+j], want)
			}
		}
	}
}

func TestDrawsWrongLengthIsAnError(t *testing.T) {
	var buf bytes.Buffer
	d := NewDrawsWriter(&buf, []string{"a", "b"})
	d.Row(0, 0, []float64{1, 2, 3})
	d.Row(0, 1, []float64{1, 2})
	if err := d.Close(); err == nil || !strings.Contains(err.Error(), "3 values for 2 names") {
		t.Errorf("Close = %v, want an error naming 3 values for 2 names", err)
	}
	if buf.String() != "chain,iteration,a,b\n" {
		t.Errorf("wrote %q, want the header alone (nothing after the error)", buf.String())
	}
}
