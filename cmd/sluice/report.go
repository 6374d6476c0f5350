package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"math"
	"path/filepath"
	"strings"

	"sluice/client"
	"sluice/internal/history"
	"sluice/internal/report"
)

// report runs "sluice report DRAWS [--out DIR] [--interval P] [--history FILE]".
func runReport(_ context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("report", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprint(fs.Output(), `Usage: sluice report DRAWS [flags]

Draws the pictures of a run and a page bundling them (index.html, works
offline). DRAWS is a .csv (chain,iteration,<names>) or a .npy (chains ×
draws × dim, names from the summary JSON beside it); the summary and the
progress history beside it are read when present.

`)
		fs.PrintDefaults()
	}
	out := fs.String("out", "", "folder to write into (default: DRAWS without its extension, plus \"-report\")")
	level := fs.Float64("interval", 0.9, "probability of the interval marked on each parameter's histogram")
	hist := fs.String("history", "", "progress history to read (default: DRAWS.history.jsonl or its .csv/.npy-less twin, if present)")
	// Flags may come before or after the draws file.
	var draws string
	if len(args) > 0 && !strings.HasPrefix(args[0], "-") {
		draws, args = args[0], args[1:]
	}
	if err := fs.Parse(args); err != nil {
		if err == flag.ErrHelp {
			return err
		}
		return usageError{err}
	}
	if draws == "" && fs.NArg() > 0 {
		draws = fs.Arg(0)
		if err := fs.Parse(fs.Args()[1:]); err != nil {
			return usageError{err}
		}
	}
	if fs.NArg() > 0 {
		return usagef("unexpected argument %q", fs.Arg(0))
	}
	if draws == "" {
		return usagef("name the draws file: sluice report DRAWS [--out DIR]")
	}
	if !(*level > 0 && *level < 1) {
		return usagef("--interval %g: want a probability between 0 and 1", *level)
	}
	if *out == "" {
		*out = strings.TrimSuffix(strings.TrimSuffix(draws, ".csv"), ".npy") + "-report"
	}
	run, err := report.Load(draws, *hist)
	if err != nil {
		return err
	}
	w, err := report.Write(run, report.Options{Dir: *out, Level: *level})
	if err != nil {
		return err
	}
	fmt.Fprintf(stdout, "report written to %s (%d pictures)\n", filepath.Join(*out, w.Index), len(w.Images))
	return nil
}

// sidecar names a companion file beside a draws file: draws.csv →
// draws.csv.<suffix>.
func sidecar(out, suffix string) string { return out + "." + suffix }

// historyRecord turns a progress report into a line of the progress
// history; kind is history.KindProgress, or history.KindFinish for the
// last one (with the reason and message).
func historyRecord(kind string, p *client.Progress, reason client.Reason, message string) *history.Record {
	r := &history.Record{Kind: kind, State: string(p.State), Steps: p.Steps,
		EvaluationsUsed: p.EvaluationsUsed, EvaluationsLeft: p.EvaluationsLeft,
		ElapsedSeconds: p.Elapsed.Seconds(), SecondsLeft: -1, DrawsSent: p.DrawsSent,
		Reason: string(reason), Message: message}
	if p.TimeLeft >= 0 {
		r.SecondsLeft = p.TimeLeft.Seconds()
	}
	for _, d := range p.Parameters {
		r.Params = append(r.Params, history.Param{Name: d.Name, Rhat: history.Num(d.Rhat),
			BulkESS: history.Num(d.BulkESS), TailESS: history.Num(d.TailESS)})
	}
	r.Summarise()
	if st := p.Stein; st != nil && st.KSD >= 0 {
		// The KSD's standard error on the scale of KSD (delta method on
		// √U: SE(U)/(2√U)), and its upper 95 % bound.
		se := math.NaN()
		if st.KSD > 0 {
			se = st.SE / (2 * st.KSD)
		}
		r.Stein = &history.Stein{Value: history.Num(st.KSD), SE: history.Num(se), Upper: history.Num(st.Upper95)}
	} else if p.KSD >= 0 {
		nan := history.Num(math.NaN())
		r.Stein = &history.Stein{Value: history.Num(p.KSD), SE: nan, Upper: nan}
	}
	if b := p.Bound; b != nil {
		r.Bound = &history.Bound{Metric: string(b.Metric), Value: history.Num(b.Value), Guaranteed: b.Guaranteed, Label: b.Label}
	}
	for _, t := range p.Targets {
		r.Targets = append(r.Targets, history.Target{Name: t.Name, Want: history.Num(t.Want), Current: history.Num(t.Current),
			Met: t.Met, ProjectedEvaluations: t.ProjectedEvaluations})
	}
	return r
}
