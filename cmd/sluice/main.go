// Command sluice runs the sluice sampling service and its demonstration.
//
//	sluice serve     serve the gRPC API (default 127.0.0.1:7070)
//	sluice demo      run a server and a client in one process on an invented
//	                 kiln-firing data set, and answer a question with the draws
//	sluice plan      step, iterations, evaluations and wall time needed for a
//	                 guaranteed accuracy, before sampling
//	sluice bench     what a session step costs next to the bare transport,
//	                 and other figures beside their floors, measured side by side
//	sluice version   the version, Go version and module build information
//	sluice report    pictures of a run's draws and progress, bundled in an
//	                 index.html that works offline
//	sluice watch     follow a running session from another terminal: a live
//	                 view of its budget, accuracy and warnings
//
// Run "sluice <command> -h" for a command's description, examples and flags.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"strings"
	"syscall"
)

const usage = `sluice hands out posterior draws to simulation codes in any language.

Usage:
  sluice serve [flags]   serve the gRPC API
  sluice demo [flags]    sample an invented kiln-firing model end to end
  sluice plan [flags]    what a guaranteed accuracy costs, before sampling
  sluice bench [flags]   figures beside their floors, measured side by side
  sluice slurm-script [flags] -- WORKER...  a Slurm job array serving a session
  sluice version         version, Go version and build information
  sluice report DRAWS    pictures and a page (index.html) of a run's draws
  sluice watch SESSION   a live view of a running session, from another terminal

Run "sluice <command> -h" for a command's description, examples and flags.
`

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	os.Exit(run(ctx, os.Args[1:], os.Stdout, os.Stderr))
}

// run executes one command and returns the process exit code: 0 success,
// 1 failure, 2 bad usage.
func run(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	if len(args) == 0 {
		fmt.Fprint(stderr, usage)
		return 2
	}
	var err error
	switch args[0] {
	case "serve":
		err = serve(ctx, args[1:], stderr)
	case "demo":
		err = demo(ctx, args[1:], stdout, stderr)
	case "plan":
		err = plan(ctx, args[1:], stdout, stderr)
	case "bench":
		err = bench(ctx, args[1:], stdout, stderr)
	case "slurm-script":
		err = slurmScript(args[1:], stdout, stderr)
	case "version", "-version", "--version":
		err = version(args[1:], stdout, stderr)
	case "report":
		err = runReport(ctx, args[1:], stdout, stderr)
	case "watch":
		err = watch(ctx, args[1:], stdout, stderr)
	case "-h", "--help", "help":
		fmt.Fprint(stdout, usage)
		return 0
	default:
		fmt.Fprintf(stderr, "sluice: unknown command %q\n\n%s", args[0], usage)
		return 2
	}
	switch {
	case err == nil:
		return 0
	case errors.Is(err, flag.ErrHelp):
		return 0
	case errors.As(err, new(usageError)):
		fmt.Fprintf(stderr, "sluice %s: %s\n", args[0], describeError(err))
		return 2
	default:
		fmt.Fprintf(stderr, "sluice %s: %s\n", args[0], describeError(err))
		return 1
	}
}

// usageError marks a bad flag or argument.
type usageError struct{ error }

func (e usageError) Unwrap() error { return e.error }

func usagef(format string, a ...any) error { return usageError{fmt.Errorf(format, a...)} }

// parseFlags parses args, turning flag errors into usage errors.
func parseFlags(fs *flag.FlagSet, args []string) error {
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return err
		}
		return usageError{err}
	}
	if fs.NArg() > 0 {
		return usagef("unexpected argument %q", fs.Arg(0))
	}
	return nil
}

// help is what "sluice <command> -h" prints above the flags.
type help struct {
	usage    string   // the synopsis, e.g. "sluice plan [flags]"
	about    string   // one paragraph on what the command does
	examples []string // command lines, one per line
	kernels  string   // a sentence introducing the kernel names
}

// setHelp makes fs print h, the flags and the kernel names on -h (and
// after a flag error), on fs's output.
func setHelp(fs *flag.FlagSet, h help) {
	fs.Usage = func() {
		w := fs.Output()
		fmt.Fprintf(w, "Usage: %s\n\n%s\n\nExamples:\n", h.usage, wrap(h.about, 76))
		for _, e := range h.examples {
			fmt.Fprintf(w, "  %s\n", e)
		}
		if h.kernels != "" {
			fmt.Fprintf(w, "\n%s\n", wrap(h.kernels+" "+strings.Join(kernelNames(), ", ")+".", 76))
		}
		has := false
		fs.VisitAll(func(*flag.Flag) { has = true })
		if has {
			fmt.Fprintln(w, "\nFlags:")
			fs.PrintDefaults()
		}
	}
}

// wrap breaks s into lines of at most width runes at spaces.
func wrap(s string, width int) string {
	var b strings.Builder
	n := 0
	for i, word := range strings.Fields(s) {
		l := len([]rune(word))
		if i > 0 {
			if n+1+l > width {
				b.WriteByte('\n')
				n = 0
			} else {
				b.WriteByte(' ')
				n++
			}
		}
		b.WriteString(word)
		n += l
	}
	return b.String()
}
