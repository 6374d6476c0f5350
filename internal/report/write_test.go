package report

import (
	"image/png"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"sluice/client/history"
)

// synthetic makes a run of dim parameters, chains AR(1) chains of n
// draws each (coefficient 0.5, stationary sd 1, mean i for parameter i),
// seeded, and a history of 6 records with targets.
func synthetic(dim, chains, n int) *Run {
	r := rand.New(rand.NewPCG(11, 12))
	run := &Run{Source: "synthetic.csv"}
	for i := range dim {
		run.Names = append(run.Names, "theta["+strconv.Itoa(i)+"]")
		var ps [][]float64
		for range chains {
			x := r.NormFloat64()
			c := make([]float64, n)
			for t := range n {
				x = 0.5*x + math.Sqrt(0.75)*r.NormFloat64()
				c[t] = float64(i) + x
			}
			ps = append(ps, c)
		}
		run.Draws = append(run.Draws, ps)
	}
	nan := history.Num(math.NaN())
	for k := range 6 {
		rec := history.Record{Kind: history.KindProgress, EvaluationsUsed: int64(1000 * (k + 1)), EvaluationsLeft: -1,
			Stein:   &history.Stein{Value: history.Num(1 / float64(k+1)), SE: history.Num(0.1 / float64(k+1)), Upper: nan},
			Bound:   &history.Bound{Metric: "tv", Value: history.Num(2 / float64(k+1)), Guaranteed: true},
			Targets: []history.Target{{Name: "max_rhat", Want: 1.01}, {Name: "min_bulk_ess", Want: 400}, {Name: "eps", Want: 0.5}}}
		for _, name := range run.Names {
			rec.Params = append(rec.Params, history.Param{Name: name, Rhat: history.Num(1 + 0.1/float64(k+1)),
				BulkESS: history.Num(100 * (k + 1)), TailESS: history.Num(80 * (k + 1))})
		}
		rec.Summarise()
		run.History = append(run.History, rec)
	}
	run.History[5].Kind, run.History[5].Reason = history.KindFinish, "target met"
	run.Verdict = []Check{{Name: "chains agree", Status: "pass", Figure: 1.004, Sentence: "R-hat is below 1.01 for every parameter."}}
	return run
}

// checkImages checks that every listed PNG decodes with a sensible size
// and every SVG is an SVG document with its fonts inside.
func checkImages(t *testing.T, dir string, files []string) {
	t.Helper()
	for _, name := range files {
		path := filepath.Join(dir, name)
		switch filepath.Ext(name) {
		case ".png":
			f, err := os.Open(path)
			if err != nil {
				t.Fatal(err)
			}
			img, err := png.Decode(f)
			f.Close()
			if err != nil {
				t.Errorf("%s: %v", name, err)
				continue
			}
			b := img.Bounds()
			if b.Dx() < 300 || b.Dy() < 200 || b.Dx() > 4000 || b.Dy() > 4000 {
				t.Errorf("%s: %d×%d pixels, want between 300×200 and 4000×4000", name, b.Dx(), b.Dy())
			}
		case ".svg":
			b, err := os.ReadFile(path)
			if err != nil {
				t.Fatal(err)
			}
			s := string(b)
			if !strings.Contains(s, "<svg") || !strings.Contains(s, "@font-face") {
				t.Errorf("%s: not an SVG with embedded fonts (%d bytes)", name, len(b))
			}
		default:
			t.Errorf("unexpected file %s", name)
		}
	}
}

var imgSrc = regexp.MustCompile(`<img src="([^"]+)"`)

func TestWriteFewParameters(t *testing.T) {
	dir := t.TempDir()
	run := synthetic(3, 4, 300)
	w, err := Write(run, Options{Dir: dir, Level: 0.8})
	if err != nil {
		t.Fatal(err)
	}
	// progress, pairs, and a trace and a histogram per parameter; PNG and SVG each.
	if want := 2 * (2 + 2*3); len(w.Images) != want {
		t.Errorf("%d images, want %d: %v", len(w.Images), want, w.Images)
	}
	checkImages(t, dir, w.Images)
	html, err := os.ReadFile(filepath.Join(dir, w.Index))
	if err != nil {
		t.Fatal(err)
	}
	page := string(html)
	for _, s := range []string{"theta[0]", "theta[2]", "80% interval", "chains agree", "R-hat is below 1.01", "target met"} {
		if !strings.Contains(page, s) {
			t.Errorf("index.html lacks %q", s)
		}
	}
	for _, m := range imgSrc.FindAllStringSubmatch(page, -1) {
		if _, err := os.Stat(filepath.Join(dir, m[1])); err != nil {
			t.Errorf("index.html shows %s, which was not written", m[1])
		}
	}
	if strings.Contains(page, "http://") || strings.Contains(page, "https://") || strings.Contains(page, "<link") {
		t.Error("index.html refers to something outside the folder")
	}
}

func TestWriteManyParameters(t *testing.T) {
	dir := t.TempDir()
	run := synthetic(ManyParameters+3, 2, 100)
	run.History = nil
	w, err := Write(run, Options{Dir: dir})
	if err != nil {
		t.Fatal(err)
	}
	var traces int
	var overview bool
	for _, f := range w.Images {
		traces += map[bool]int{true: 1}[strings.HasPrefix(f, "trace-") && strings.HasSuffix(f, ".png")]
		overview = overview || f == "overview.png"
		if strings.HasPrefix(f, "progress") {
			t.Errorf("%s drawn without a history", f)
		}
	}
	if !overview || traces != 4 {
		t.Errorf("overview %v, %d trace plots; want an overview and 4 traces", overview, traces)
	}
	checkImages(t, dir, w.Images)
	html, err := os.ReadFile(filepath.Join(dir, "index.html"))
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(string(html), "theta[14]") {
		t.Error("the table lacks the last parameter")
	}
}

func TestWriteRejectsBadLevel(t *testing.T) {
	if _, err := Write(synthetic(1, 2, 20), Options{Dir: t.TempDir(), Level: 1.5}); err == nil {
		t.Error("level 1.5 accepted")
	}
}

func TestPlainTicks(t *testing.T) {
	// Labels must give the tick values exactly, with no needless zeros.
	for _, c := range []struct{ lo, hi float64 }{{0, 50000}, {-0.1, 1.9}, {0.6, 1.8}, {-1.9, -0.6}, {1, 1.4}, {0.0001, 0.0009}} {
		decimals, zeroEnds := 0, 0
		for _, tk := range (plainTicks{}).Ticks(c.lo, c.hi) {
			if tk.Label == "" {
				continue
			}
			if strings.HasPrefix(tk.Label, "-") && !(tk.Value < 0) {
				t.Errorf("[%g, %g]: label %q for tick %g", c.lo, c.hi, tk.Label, tk.Value)
			}
			if strings.Contains(tk.Label, ".") {
				decimals++
				if strings.HasSuffix(tk.Label, "0") {
					zeroEnds++
				}
			}
			v, err := strconv.ParseFloat(tk.Label, 64)
			if err != nil || math.Abs(v-tk.Value) > 1e-9*math.Max(math.Abs(c.lo), math.Abs(c.hi)) {
				t.Errorf("[%g, %g]: label %q for tick %g", c.lo, c.hi, tk.Label, tk.Value)
			}
		}
		if decimals > 0 && zeroEnds == decimals {
			t.Errorf("[%g, %g]: every label ends in a needless zero", c.lo, c.hi)
		}
	}
}
