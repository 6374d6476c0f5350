package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"path/filepath"
	"strings"

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
