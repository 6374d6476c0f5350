// Command sluice runs the sluice sampling service and its demonstration.
//
//	sluice serve   serve the gRPC API (default 127.0.0.1:7070)
//	sluice demo    run a server and a client in one process on an invented
//	               kiln-firing data set, and answer a question with the draws
//	sluice plan    step, iterations, evaluations and wall time needed for a
//	               guaranteed accuracy, before sampling
//	sluice report  pictures of a run's draws and progress, bundled in an
//	               index.html that works offline
//
// Run "sluice <command> -h" for a command's flags.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
)

const usage = `sluice hands out posterior draws to simulation codes in any language.

Usage:
  sluice serve [flags]   serve the gRPC API
  sluice demo [flags]    sample an invented kiln-firing model end to end
  sluice plan [flags]    what a guaranteed accuracy costs, before sampling
  sluice report DRAWS    pictures and a page (index.html) of a run's draws

Run "sluice <command> -h" for the flags of a command.
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
	case "report":
		err = runReport(ctx, args[1:], stdout, stderr)
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
		fmt.Fprintf(stderr, "sluice %s: %v\n", args[0], err)
		return 2
	default:
		fmt.Fprintf(stderr, "sluice %s: %v\n", args[0], err)
		return 1
	}
}

// usageError marks a bad flag or argument.
type usageError struct{ error }

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
