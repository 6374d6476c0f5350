package main

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strings"
	"time"

	"sluice/internal/benchkit"
)

// bench measures, in one run on loopback, how close sluice comes to its
// floors, each figure beside the floor it is compared to.
func bench(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("bench", flag.ContinueOnError)
	fs.SetOutput(stderr)
	asJSON := fs.Bool("json", false, "print the figures as one JSON object")
	quick := fs.Bool("quick", false, "a short run with tiny sizes and a handful of steps, without Python: checks that everything runs; its figures say nothing about speed")
	noPython := fs.Bool("no-python", false, "skip the Python client comparison")
	rounds := fs.Int("rounds", 0, "alternating rounds of every comparison (0: 15 for Go and 7 for Python, 3 with --quick)")
	python := fs.String("python", benchkit.Python, "Python interpreter with grpc and numpy")
	pyDir := fs.String("python-dir", "", "directory of the Python client (bench.py, sluice_client); default: client/python of the source tree around the working directory")
	quiet := fs.Bool("quiet", false, "do not report on stderr what is being measured")
	groups := fs.Int("groups", 0, "chain groups of the measured sessions (0: the server chooses; 1: one request at a time)")
	setHelp(fs, help{
		usage: "sluice bench [--quick] [--json] [--no-python] [flags]",
		about: "Measures, in one run on loopback, what sluice costs next to the least it could cost, each figure beside " +
			"its floor measured side by side: a session step of the lmc kernel (server and Go client in this process, " +
			"over TCP) against a bare gRPC echo of the same values, one message each way per step, its frames encoded and " +
			"decoded as a session's are (no engine behind it), at 8 chains × dim 10, " +
			"64 × 100 and 64 × 1000; the lmc kernel driven in-process against a plain fused Go loop doing the same " +
			"arithmetic with the same random stream; the Python client against a numpy loop doing the same steps in its " +
			"own process, at 64 × 1000, with a free gradient and with one that sleeps 5 ms per batch (needs " +
			"/usr/bin/python3 with grpc and numpy and the client's sources); and the live heap of one session over " +
			"10⁶ draws, at a tenth of the draws and at the end, to show whether it stays flat. Compared runs alternate " +
			"in many short rounds, each from collected garbage with the collector off; each time is the median of the " +
			"rounds, each ratio the median of the rounds' own ratios, " +
			"printed with their quartiles, so load that changes during the run weighs on both sides alike. Beside each Go " +
			"ratio of wall times stands the ratio of the process's CPU time over the same runs, which leaves out the waits " +
			"for a core on a busy machine. The target is a Gaussian with a diagonal " +
			"precision, whose gradient costs little next to the transport. A full run takes a few minutes.",
		examples: []string{
			"sluice bench",
			"sluice bench --no-python --rounds 7",
			"sluice bench --json > bench.json",
			"sluice bench --quick --json   # a few seconds: checks that every part runs",
		},
	})
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *rounds < 0 {
		return usagef("--rounds must be ≥ 1 (0: the default)")
	}
	if *groups < 0 {
		return usagef("--groups must be ≥ 0 (0: the server chooses)")
	}
	cfg := benchkit.DefaultConfig()
	if *quick {
		cfg = benchkit.QuickConfig()
	}
	if *rounds > 0 {
		cfg.Rounds = *rounds
		cfg.Python.Rounds = *rounds
	}
	cfg.Groups = *groups
	cfg.Python.Interpreter = *python
	cfg.Python.Dir = *pyDir
	if cfg.Python.Dir == "" {
		cfg.Python.Dir = findPythonClient()
	}
	if *noPython && cfg.SkipPython == "" {
		cfg.SkipPython = "--no-python given"
	}
	if !*quiet {
		cfg.Log = func(format string, args ...any) {
			fmt.Fprintf(stderr, "sluice bench: "+format+"\n", args...)
		}
	}
	ctx, cancel := context.WithTimeout(ctx, time.Hour)
	defer cancel()
	rep, err := benchkit.Run(ctx, cfg)
	if err != nil {
		return err
	}
	if *asJSON {
		enc := json.NewEncoder(stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(rep)
	}
	printBench(stdout, rep, *quick)
	return nil
}

// findPythonClient returns client/python of the sluice source tree that
// holds the working directory, or "".
func findPythonClient() string {
	dir, err := os.Getwd()
	if err != nil {
		return ""
	}
	for range 64 {
		cand := filepath.Join(dir, "client", "python")
		if _, err := os.Stat(filepath.Join(cand, "bench.py")); err == nil {
			if _, err := os.Stat(filepath.Join(dir, "go.mod")); err == nil {
				return cand
			}
		}
		parent := filepath.Dir(dir)
		if parent == dir {
			break
		}
		dir = parent
	}
	return ""
}

// printBench writes the report as text.
func printBench(w io.Writer, r *benchkit.Report, quick bool) {
	m := r.Machine
	fmt.Fprintf(w, "sluice bench: loopback, %d CPUs (GOMAXPROCS %d), %s %s/%s; medians of %d alternating rounds\n",
		m.CPUs, m.GOMAXPROCS, m.GoVersion, m.GOOS, m.GOARCH, r.Rounds)
	fmt.Fprintln(w, "ratio: the median of the rounds' own ratios; middle half: their quartiles")
	if m.LoadStart >= 0 {
		fmt.Fprintf(w, "load average %.1f at the start, %.1f at the end", m.LoadStart, m.LoadEnd)
		if max(m.LoadStart, m.LoadEnd) > float64(m.CPUs) {
			fmt.Fprintf(w, ": the machine was busy; times are slower than on an idle one and vary from round to round (see the middle half of each ratio)")
		}
		fmt.Fprintln(w)
	}
	if quick {
		fmt.Fprintln(w, "--quick: tiny sizes and a handful of steps; these figures say nothing about speed")
	}

	groups := "chain groups chosen by the server"
	if len(r.Transport) > 0 && r.Transport[0].Groups > 0 {
		groups = fmt.Sprintf("%d chain groups", r.Transport[0].Groups)
	}
	fmt.Fprintf(w, "\nsession step (lmc, Go client, loopback TCP) vs bare gRPC echo of the same values, one message each way, frames coded as a session's; %s\n", groups)
	fmt.Fprintf(w, "  %-12s %7s %15s %15s %7s %13s %10s %13s %11s\n", "chains × dim", "steps", "session µs/step", "echo µs/step", "ratio", "middle half",
		"CPU ratio", "middle half", "summary ms")
	for _, t := range r.Transport {
		fmt.Fprintf(w, "  %-12s %7d %15.1f %15.1f %7.2f %13s %s %11.1f\n", t.Shape, t.Steps, t.Session.Median, t.Echo.Median, t.Ratio,
			middleHalf(t.RatioRounds), cpuColumns(t.CPU), t.SummaryMS)
	}
	fmt.Fprintln(w, "  (session time: open to last draw; the final summary, once per session, apart.")
	fmt.Fprintln(w, "  CPU ratio: of the process's CPU time, every thread, over the same runs: it leaves out the waits for a core)")

	fmt.Fprintln(w, "\nkernel step (lmc in-process, no transport) vs fused Go loop, same arithmetic and random stream")
	fmt.Fprintf(w, "  %-12s %7s %15s %15s %7s %13s %10s %13s\n", "chains × dim", "steps", "kernel µs/step", "fused µs/step", "ratio", "middle half",
		"CPU ratio", "middle half")
	for _, k := range r.Kernel {
		fmt.Fprintf(w, "  %-12s %7d %15.2f %15.2f %7.2f %13s %s\n", k.Shape, k.Steps, k.Kernel.Median, k.Fused.Median, k.Ratio,
			middleHalf(k.RatioRounds), cpuColumns(k.CPU))
	}

	p := r.Python
	if p.Skipped != "" {
		fmt.Fprintf(w, "\nPython client vs numpy loop: skipped (%s)\n", p.Skipped)
	} else {
		fmt.Fprintf(w, "\nPython client (through sluice) vs numpy loop in-process, %v, %d steps per run\n", p.Shape, p.Steps)
		fmt.Fprintf(w, "  %-20s %15s %15s %7s %13s\n", "gradient", "client ms/step", "numpy ms/step", "ratio", "middle half")
		for _, c := range p.Cases {
			name := "free"
			if c.GradCostMS > 0 {
				name = fmt.Sprintf("%g ms sleep per batch", c.GradCostMS)
			}
			fmt.Fprintf(w, "  %-20s %15.3f %15.3f %7.2f %13s\n", name, c.Client.Median, c.Numpy.Median, c.Ratio, middleHalf(c.RatioRounds))
		}
	}

	mem := r.Memory
	mib := func(b int64) string { return fmt.Sprintf("%.1f MiB", float64(b)/(1<<20)) }
	fmt.Fprintf(w, "\nmemory of one session (%v, %s draws, loopback, follow buffer %d rows): live heap growth over the heap before it\n",
		mem.Shape, countWord(mem.Draws), benchkit.FollowBuffer)
	flat := "flat"
	if !mem.Flat {
		flat = "NOT flat"
	}
	fmt.Fprintf(w, "  at %s draws %s, at %s draws %s: ratio %.2f, %s\n", countWord(mem.Draws/10), mib(mem.AtTenth),
		countWord(mem.Draws), mib(mem.AtEnd), mem.Ratio, flat)
	fmt.Fprintf(w, "  peak live %s; peak with uncollected garbage %s; baseline %s; %.1f s\n",
		mib(mem.PeakLive), mib(mem.PeakWithGarbage), mib(int64(mem.BaselineBytes)), mem.Seconds)
	fmt.Fprintf(w, "\n%.0f s in all\n", r.Seconds)
}

// middleHalf writes the first and third quartiles of the ratios.
func middleHalf(rs []float64) string {
	return fmt.Sprintf("%.2f–%.2f", benchkit.Quantile(rs, 0.25), benchkit.Quantile(rs, 0.75))
}

// cpuColumns writes the CPU ratio and its middle half, or n/a.
func cpuColumns(c *benchkit.CPUComparison) string {
	if c == nil {
		return fmt.Sprintf("%10s %13s", "n/a", "")
	}
	return fmt.Sprintf("%10.2f %13s", c.Ratio, middleHalf(c.RatioRounds))
}

// countWord writes a count, powers of ten as 10ⁿ.
func countWord(n int64) string {
	if n >= 10 {
		e := math.Log10(float64(n))
		if e == math.Trunc(e) {
			sup := strings.NewReplacer("0", "⁰", "1", "¹", "2", "²", "3", "³", "4", "⁴", "5", "⁵", "6", "⁶", "7", "⁷", "8", "⁸", "9", "⁹")
			return "10" + sup.Replace(fmt.Sprint(int(e)))
		}
	}
	return fmt.Sprint(n)
}
