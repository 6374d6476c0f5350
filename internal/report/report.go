// Package report owns the pictures and the page made from a finished
// run: it reads a draws file (CSV or NumPy .npy), the summary JSON and
// the progress history beside it, draws trace plots, marginal histograms
// with an interval marked, pair plots of the leading parameters, the
// running diagnostics against evaluations spent and, for many parameters,
// a compact overview, each as PNG and SVG, and bundles them with the
// summary table and the verdict in an index.html that works offline.
package report

import (
	"cmp"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"regexp"
	"slices"
	"strings"

	"gonum.org/v1/plot/vg"
)

// Options adjust Write.
type Options struct {
	// Dir is the folder written to; it is created if missing.
	Dir string
	// Level is the probability of the equal-tailed interval marked on
	// the marginals and given in the table (0: 0.9).
	Level float64
}

// ManyParameters is the number of parameters above which the report
// draws an overview of every parameter and detailed panels for the four
// with the worst R-hat only.
const ManyParameters = 12

// Written lists what Write made, relative to Options.Dir.
type Written struct {
	Index  string
	Images []string
}

// Write draws the figures of r into o.Dir and writes index.html there.
func Write(r *Run, o Options) (*Written, error) {
	if o.Level == 0 {
		o.Level = 0.9
	}
	if !(o.Level > 0 && o.Level < 1) {
		return nil, fmt.Errorf("report: interval level %g, want between 0 and 1", o.Level)
	}
	if o.Dir == "" {
		return nil, fmt.Errorf("report: no output folder")
	}
	if err := os.MkdirAll(o.Dir, 0o755); err != nil {
		return nil, err
	}
	stats := computeStats(r, o.Level)
	pg := &page{Run: r, Stats: stats, Level: o.Level}
	out := &Written{Index: "index.html"}
	add := func(f figure, base string) (string, error) {
		files, err := f.save(o.Dir, base)
		if err != nil {
			return "", err
		}
		out.Images = append(out.Images, files...)
		return base, nil
	}

	if f := runningPlots(r.History); f != nil {
		base, err := add(*f, "progress")
		if err != nil {
			return nil, err
		}
		pg.Progress = base
	}

	detail := make([]int, len(stats))
	for i := range detail {
		detail[i] = i
	}
	if len(stats) > ManyParameters {
		wantRhat, wantESS := 1.01, 100*float64(r.Chains())
		if t := lastTargets(r); t != nil {
			wantRhat, wantESS = t["rhat"], t["ess"]
		}
		base, err := add(overviewPlots(stats, wantRhat, wantESS), "overview")
		if err != nil {
			return nil, err
		}
		pg.Overview = base
		pg.OverviewAims = fmt.Sprintf("R-hat %g, ESS %g", wantRhat, wantESS)
		// The four with the worst R-hat (not available counts as worst).
		slices.SortStableFunc(detail, func(a, b int) int {
			return cmp.Compare(badness(stats[b].Rhat), badness(stats[a].Rhat))
		})
		detail = detail[:4]
		slices.Sort(detail)
		pg.DetailNote = "the four parameters with the worst R-hat"
	}
	for _, i := range detail {
		s := stats[i]
		slug := fmt.Sprintf("%03d-%s", i, slugOf(s.Name))
		tb, err := add(single(tracePlot(s.Name, r.Draws[i]), 7.2*vg.Inch, 2.6*vg.Inch), "trace-"+slug)
		if err != nil {
			return nil, err
		}
		mb, err := add(single(histPlot(s, pool(r.Draws[i]), o.Level), 4.2*vg.Inch, 2.6*vg.Inch), "marginal-"+slug)
		if err != nil {
			return nil, err
		}
		pg.Params = append(pg.Params, paramFigs{Name: s.Name, Trace: tb, Marginal: mb})
	}
	if k := min(4, len(stats)); k >= 2 {
		base, err := add(pairGrid(r, stats, k).figure, "pairs")
		if err != nil {
			return nil, err
		}
		pg.Pairs, pg.PairNames = base, namesOfStats(stats[:k])
	}
	if err := pg.write(filepath.Join(o.Dir, out.Index)); err != nil {
		return nil, err
	}
	return out, nil
}

// lastTargets returns the targets of the last history record that has
// any, keyed "rhat", "ess", "ksd", "eps" (0 where absent), or nil.
func lastTargets(r *Run) map[string]float64 {
	for i := len(r.History) - 1; i >= 0; i-- {
		if len(r.History[i].Targets) == 0 {
			continue
		}
		out := map[string]float64{}
		for _, t := range r.History[i].Targets {
			for _, k := range []string{"rhat", "ess", "ksd", "eps"} {
				if strings.Contains(t.Name, k) && t.Want.Valid() {
					out[k] = math.Max(out[k], float64(t.Want))
				}
			}
		}
		return out
	}
	return nil
}

func badness(rhat float64) float64 {
	if math.IsNaN(rhat) {
		return math.Inf(1)
	}
	return rhat
}

var unsafeChars = regexp.MustCompile(`[^A-Za-z0-9_.-]+`)

func slugOf(name string) string {
	s := strings.Trim(unsafeChars.ReplaceAllString(name, "_"), "_.")
	if len(s) > 40 {
		s = s[:40]
	}
	if s == "" {
		s = "p"
	}
	return s
}

func namesOfStats(s []Stat) []string {
	out := make([]string, len(s))
	for i := range s {
		out[i] = s[i].Name
	}
	return out
}
