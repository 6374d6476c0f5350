// Command slurmworker is the worker the Slurm test runs in each array
// task, and the worker-kill test (TestWorkerKilledEvery10s) in each of its
// worker processes: it serves the session named in its environment (see
// client.WorkFromEnv) with ∇log π = −x of a standard normal, sleeping
// SLUICE_TEST_ROW_DELAY per row to stand in for a simulation.
package main

import (
	"context"
	"fmt"
	"os"
	"time"

	"sluice/client"
)

func main() {
	delay, _ := time.ParseDuration(os.Getenv("SLUICE_TEST_ROW_DELAY"))
	err := client.WorkFromEnv(context.Background(), func(_ context.Context, b *client.Batch) error {
		time.Sleep(time.Duration(b.Rows) * delay)
		for i, x := range b.Points {
			b.Grad[i] = -x
		}
		return nil
	}, false)
	if err != nil {
		fmt.Fprintln(os.Stderr, "slurmworker:", err)
		os.Exit(1)
	}
}
