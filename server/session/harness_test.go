package session

import (
	"context"
	"testing"
	"time"

	"sluice/kernels"
	"sluice/kernels/targets"
)

// targetRun is what runTarget collects from one in-process session.
type targetRun struct {
	registered *Registered
	progress   []Progress
	finished   *Finished
	// draws[coord][chain] holds the kept draws.
	draws [][][]float64
	res   Result
	err   error
}

// runTarget runs a session of spec against target tg, answered in
// process (gradients and log densities, exact), and keeps every kept
// draw. pause, when not nil, is called before each answer (a slow
// client); progress frames are kept when keepProgress is set.
func runTarget(tb testing.TB, spec Spec, tg targets.Target, keepProgress bool, pause func(req uint64)) *targetRun {
	tb.Helper()
	lim := Limits{DiagnosticsShare: 0.02}
	s, err := New("bench", spec, lim)
	if err != nil {
		tb.Fatalf("New: %v", err)
	}
	out := &targetRun{}
	dim := spec.Dim
	out.draws = make([][][]float64, dim)
	for i := range out.draws {
		out.draws[i] = make([][]float64, spec.Chains)
	}
	in := make(chan Message, 64)
	send := func(f Frame) error {
		switch f := f.(type) {
		case *Registered:
			c := *f
			out.registered = &c
		case *Points:
			if pause != nil {
				pause(f.RequestID)
			}
			ev := &Evaluations{RequestID: f.RequestID, FirstRow: f.FirstRow, Rows: f.Rows, Dim: f.Dim,
				Grad: make([]float64, f.Rows*dim)}
			var ld []float64
			if f.Need.Has(kernels.NeedLogDensity) {
				ld = make([]float64, f.Rows)
			}
			targets.EvalBatch(tg, f.Points, f.Rows, ev.Grad, ld)
			ev.LogDensity = ld
			in <- Message{Evaluations: ev}
		case *Draws:
			for r := range f.Rows {
				c := f.Chains[r]
				for i := range dim {
					out.draws[i][c] = append(out.draws[i][c], f.Values[r*dim+i])
				}
			}
		case *Progress:
			if keepProgress {
				out.progress = append(out.progress, *f)
			}
		case *Finished:
			c := *f
			out.finished = &c
		}
		return nil
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Minute)
	defer cancel()
	out.res, out.err = s.Run(ctx, in, send)
	return out
}
