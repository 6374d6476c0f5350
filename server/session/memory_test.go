package session

import (
	"context"
	"runtime"
	"testing"
	"time"
)

// BenchmarkLongSessionMemory runs one session to 10⁶ kept draws (4 chains
// × 250 000 steps, dim 2) in-process and reports the peak live heap seen
// at the progress reports, and the heap of the monitor's bounded
// structures: what diagnostics keep does not grow with the run
// (issue: "memory stays bounded however long a session runs"). Run with
//
//	go test -run XXX -bench LongSessionMemory -benchtime 1x ./server/session/
func BenchmarkLongSessionMemory(b *testing.B) {
	for b.Loop() {
		spec := Spec{Dim: 2, Chains: 4, Start: []float64{0.5, -0.5}, StartRows: 1, Step: 0.1, Seed: 1,
			DrawsPerChain: 250000, ProgressEverySteps: 5000, Wants: Wants{MinBulkESS: 1e12}} // a target never met keeps diagnostics running
		s, err := New("mem", spec, Limits{})
		if err != nil {
			b.Fatal(err)
		}
		in := make(chan Message, 16)
		var peak, first uint64
		var ms runtime.MemStats
		reports := 0
		send := func(f Frame) error {
			switch f := f.(type) {
			case *Points:
				ev := &Evaluations{RequestID: f.RequestID, FirstRow: f.FirstRow, Rows: f.Rows, Dim: f.Dim, Grad: make([]float64, len(f.Points))}
				for i, x := range f.Points {
					ev.Grad[i] = -x
				}
				in <- Message{Evaluations: ev}
			case *Progress:
				reports++
				if reports%10 == 0 {
					runtime.GC()
					runtime.ReadMemStats(&ms)
					if first == 0 {
						first = ms.HeapAlloc
					}
					peak = max(peak, ms.HeapAlloc)
				}
			}
			return nil
		}
		ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
		res, err := s.Run(ctx, in, send)
		cancel()
		if err != nil || res.Finished.Progress.DrawsSent != 1_000_000 {
			b.Fatalf("err %v, %d draws", err, res.Finished.Progress.DrawsSent)
		}
		b.ReportMetric(float64(peak)/(1<<20), "peak-heap-MB")
		b.ReportMetric(float64(first)/(1<<20), "heap-at-50k-steps-MB")
		b.ReportMetric(float64(1_000_000*2*8)/(1<<20), "all-draws-would-be-MB")
	}
}
