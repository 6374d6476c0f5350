package report

import (
	"bytes"
	"encoding/binary"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

func TestReadCSV(t *testing.T) {
	// Two chains, interleaved as the demo writes them; chain 1 one draw
	// longer than chain 0, so one draw is left out when squared.
	in := "chain,iteration,a,b\n" +
		"0,10,1.5,-2\n1,10,3,4e-1\n0,20,2.5,-3\n1,20,5,0.5\n1,30,7,0.25\n"
	names, byChain, err := ReadCSV(strings.NewReader(in))
	if err != nil {
		t.Fatal(err)
	}
	if strings.Join(names, ",") != "a,b" || len(byChain) != 2 || len(byChain[0]) != 2 || len(byChain[1]) != 3 {
		t.Fatalf("names %v, chains %d, lengths %d/%d", names, len(byChain), len(byChain[0]), len(byChain[1]))
	}
	draws, dropped := square(byChain, 2)
	if dropped != 1 {
		t.Errorf("dropped %d, want 1", dropped)
	}
	// [parameter][chain][draw], read off the rows above by hand.
	want := [][][]float64{{{1.5, 2.5}, {3, 5}}, {{-2, -3}, {0.4, 0.5}}}
	for i := range want {
		for c := range want[i] {
			for d := range want[i][c] {
				if draws[i][c][d] != want[i][c][d] {
					t.Errorf("draws[%d][%d][%d] = %g, want %g", i, c, d, draws[i][c][d], want[i][c][d])
				}
			}
		}
	}
	for _, bad := range []string{
		"", "iteration,chain,a\n", "chain,iteration\n",
		"chain,iteration,a\nx,1,2\n", "chain,iteration,a\n0,1,oops\n", "chain,iteration,a\n0,1\n",
	} {
		if _, _, err := ReadCSV(strings.NewReader(bad)); err == nil {
			t.Errorf("ReadCSV(%q) accepted", bad)
		}
	}
}

// TestReadNPYFromNumPy reads a file NumPy wrote (testdata/README.md):
// element (c, t, i) is 0.5·(15c + 3t + i) − 3.
func TestReadNPYFromNumPy(t *testing.T) {
	r, err := Load(filepath.Join("testdata", "small.npy"), "")
	if err != nil {
		t.Fatal(err)
	}
	if strings.Join(r.Names, ",") != "alpha,beta,gamma" {
		t.Errorf("names %v, want those of the summary beside the file", r.Names)
	}
	if r.Chains() != 2 || r.Len() != 5 {
		t.Fatalf("%d chains of %d, want 2 of 5", r.Chains(), r.Len())
	}
	for i := range 3 {
		for c := range 2 {
			for d := range 5 {
				want := 0.5*float64(15*c+3*d+i) - 3
				if got := r.Draws[i][c][d]; got != want {
					t.Errorf("draw (%d, %d, %d) = %g, want %g", c, d, i, got, want)
				}
			}
		}
	}
	if r.History != nil || r.SummaryPath == "" {
		t.Errorf("history %v (want none), summary path %q", r.History, r.SummaryPath)
	}
}

// npyBytes builds a .npy file by hand from the format's layout (NumPy's
// format specification, "NEP 1"): version 2.0 here, with its 4-byte
// header length.
func npyBytes(header string, data []float64) []byte {
	var b bytes.Buffer
	b.WriteString("\x93NUMPY\x02\x00")
	binary.Write(&b, binary.LittleEndian, uint32(len(header)))
	b.WriteString(header)
	binary.Write(&b, binary.LittleEndian, data)
	return b.Bytes()
}

func TestReadNPYVersion2AndErrors(t *testing.T) {
	a, err := ReadNPY(bytes.NewReader(npyBytes("{'descr': '<f8', 'fortran_order': False, 'shape': (1, 2, 1), }\n", []float64{math.Pi, -1})))
	if err != nil {
		t.Fatal(err)
	}
	if a.Chains != 1 || a.Draws != 2 || a.Dim != 1 || a.Data[0] != math.Pi || a.Data[1] != -1 {
		t.Errorf("got %+v", a)
	}
	for name, b := range map[string][]byte{
		"magic":   []byte("NUMPY\x01\x00\x00\x00"),
		"dtype":   npyBytes("{'descr': '<f4', 'fortran_order': False, 'shape': (1, 1, 1), }\n", []float64{1}),
		"fortran": npyBytes("{'descr': '<f8', 'fortran_order': True, 'shape': (1, 1, 1), }\n", []float64{1}),
		"rank":    npyBytes("{'descr': '<f8', 'fortran_order': False, 'shape': (2, 1), }\n", []float64{1, 2}),
		"short":   npyBytes("{'descr': '<f8', 'fortran_order': False, 'shape': (1, 2, 2), }\n", []float64{1, 2, 3}),
	} {
		if _, err := ReadNPY(bytes.NewReader(b)); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
}

func TestLoadFindsSidecars(t *testing.T) {
	dir := t.TempDir()
	draws := filepath.Join(dir, "run.csv")
	var b strings.Builder
	b.WriteString("chain,iteration,x\n")
	for d := range 6 {
		for c := range 2 {
			b.WriteString(strings.Join([]string{strconv.Itoa(c), strconv.Itoa(d), strconv.Itoa(d * (c + 1))}, ",") + "\n")
		}
	}
	must(t, os.WriteFile(draws, []byte(b.String()), 0o644))
	// The older summary name (run.summary.json) and the history under the
	// draws file's full name.
	must(t, os.WriteFile(filepath.Join(dir, "run.summary.json"),
		[]byte(`{"reason":"draws collected","verdict":{"checks":[{"name":"mixing","status":"warn","figure":1.02,"sentence":"Chains agree only roughly."}]}}`), 0o644))
	must(t, os.WriteFile(draws+".history.jsonl", []byte(`{"kind":"progress","evals_used":5}`+"\n"+`{"kind":"finish","evals_used":9,"reason":"draws collected"}`+"\n"), 0o644))
	r, err := Load(draws, "")
	if err != nil {
		t.Fatal(err)
	}
	if len(r.History) != 2 || r.History[1].Reason != "draws collected" {
		t.Errorf("history %+v", r.History)
	}
	if len(r.Verdict) != 1 || r.Verdict[0].Status != "warn" || r.Verdict[0].Figure != 1.02 {
		t.Errorf("verdict %+v", r.Verdict)
	}
	if r.Summary["reason"] != "draws collected" {
		t.Errorf("summary %v", r.Summary)
	}
	if _, err := Load(draws, filepath.Join(dir, "absent.jsonl")); err == nil {
		t.Error("a named history that does not exist was not an error")
	}
	if _, err := Load(filepath.Join(dir, "run.txt"), ""); err == nil {
		t.Error("a draws file that is neither .csv nor .npy was accepted")
	}
}

func TestQuantile7(t *testing.T) {
	// Hyndman and Fan (1996) type 7, worked by hand: h = q(n−1) on
	// 1, 2, 3, 4 gives 1.75 at q = 0.25 and 3.7 at q = 0.9.
	x := []float64{1, 2, 3, 4}
	for _, c := range []struct{ q, want float64 }{{0, 1}, {0.25, 1.75}, {0.5, 2.5}, {0.9, 3.7}, {1, 4}} {
		if got := quantile7(x, c.q); math.Abs(got-c.want) > 1e-12 {
			t.Errorf("quantile7(%g) = %g, want %g", c.q, got, c.want)
		}
	}
}

func must(t *testing.T, err error) {
	t.Helper()
	if err != nil {
		t.Fatal(err)
	}
}

// The verdict is read from the summary sluice demo writes: a "checks"
// list whose entries carry "message" (and from an older "verdict" with
// "sentence").
func TestVerdictFromDemoSummary(t *testing.T) {
	demo := map[string]any{"checks": []any{
		map[string]any{"name": "mixing", "status": "warn", "figure": 1.02, "message": "R-hat 1.02 is above 1.01"},
	}}
	got := verdictOf(demo)
	if len(got) != 1 || got[0].Name != "mixing" || got[0].Status != "warn" || got[0].Sentence != "R-hat 1.02 is above 1.01" {
		t.Fatalf("checks: %+v", got)
	}
	older := map[string]any{"verdict": map[string]any{"checks": []any{
		map[string]any{"name": "bias", "status": "pass", "figure": nil, "sentence": "fine"},
	}}}
	if got := verdictOf(older); len(got) != 1 || got[0].Sentence != "fine" {
		t.Fatalf("verdict: %+v", got)
	}
}
