package main

import (
	"errors"
	"flag"
	"fmt"
	"io"
	"strings"
)

// slurmScript prints a Slurm batch script that serves a running session
// from a job array: every array task runs the user's worker command with
// the session's address, id and token in its environment (the names
// client.WorkFromEnv and sluice_client.work_from_env read). The token is
// read from its file when the task starts, so it is never written into
// the script or a command line.
func slurmScript(args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("slurm-script", flag.ContinueOnError)
	fs.SetOutput(stderr)
	target := fs.String("target", "", "the sluice server's address as the workers reach it (host:port)")
	id := fs.String("session", "", "the session to serve (Registered.session_id)")
	tokenFile := fs.String("token-file", "", "file holding the session's token (Registered.resume_token), readable on the compute nodes")
	workers := fs.Int("workers", 4, "array tasks (workers)")
	name := fs.String("job-name", "sluice-workers", "the job's name")
	partition := fs.String("partition", "", "partition to run in (empty: the default)")
	limit := fs.String("time", "", "time limit of each task, in Slurm's notation (empty: the partition's)")
	caFile := fs.String("ca-file", "", "authorities signing the server's certificate, for TLS (empty: plain text)")
	fs.Usage = func() {
		fmt.Fprint(stderr, "usage: sluice slurm-script --target HOST:PORT --session ID --token-file FILE [--workers N] [flags] -- WORKER COMMAND...\n\n"+
			"Prints a batch script for sbatch: a job array of N tasks, each running WORKER COMMAND with\n"+
			"SLUICE_TARGET, SLUICE_SESSION_ID, SLUICE_TOKEN, SLUICE_WORKER_INDEX (and SLUICE_CA_FILE) set.\n\n")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		return err
	}
	cmd := fs.Args()
	switch {
	case *target == "":
		return slurmUsage(fs, "--target is required")
	case *id == "":
		return slurmUsage(fs, "--session is required")
	case *tokenFile == "":
		return slurmUsage(fs, "--token-file is required")
	case *workers < 1:
		return slurmUsage(fs, "--workers must be at least 1")
	case len(cmd) == 0:
		return slurmUsage(fs, "the worker command follows --")
	}
	var b strings.Builder
	fmt.Fprintf(&b, "#!/bin/bash\n# Serves sluice session %s from a job array: each task is one worker.\n", *id)
	fmt.Fprintf(&b, "#SBATCH --job-name=%s\n#SBATCH --array=0-%d\n#SBATCH --ntasks=1\n", *name, *workers-1)
	fmt.Fprintf(&b, "#SBATCH --output=%s-%%A_%%a.out\n", *name)
	if *partition != "" {
		fmt.Fprintf(&b, "#SBATCH --partition=%s\n", *partition)
	}
	if *limit != "" {
		fmt.Fprintf(&b, "#SBATCH --time=%s\n", *limit)
	}
	b.WriteString("set -euo pipefail\n")
	fmt.Fprintf(&b, "export SLUICE_TARGET=%s\n", shellQuote(*target))
	fmt.Fprintf(&b, "export SLUICE_SESSION_ID=%s\n", shellQuote(*id))
	fmt.Fprintf(&b, "SLUICE_TOKEN=$(cat %s)\nexport SLUICE_TOKEN\n", shellQuote(*tokenFile))
	b.WriteString("export SLUICE_WORKER_INDEX=${SLURM_ARRAY_TASK_ID:-0}\n")
	if *caFile != "" {
		fmt.Fprintf(&b, "export SLUICE_CA_FILE=%s\n", shellQuote(*caFile))
	}
	q := make([]string, len(cmd))
	for i, a := range cmd {
		q[i] = shellQuote(a)
	}
	fmt.Fprintf(&b, "exec %s\n", strings.Join(q, " "))
	_, err := io.WriteString(stdout, b.String())
	return err
}

func slurmUsage(fs *flag.FlagSet, msg string) error {
	fs.Usage()
	return errors.New("slurm-script: " + msg)
}

// shellQuote quotes s for bash: in single quotes, each single quote of s
// closing the quotes, escaped with a backslash, and reopening them.
func shellQuote(s string) string {
	return "'" + strings.ReplaceAll(s, "'", `'\''`) + "'"
}
