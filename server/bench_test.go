package server_test

import (
	"context"
	"fmt"
	"math"
	"testing"
	"time"

	"sluice/internal/benchkit"
)

// A transportCase is one shape of BenchmarkTransport. Every mode runs
// steps steps per run; the in-process mode, far faster, repeats its run
// inprocReps times per iteration so that it too is long enough to time.
// The shapes and step counts are those of `sluice bench`
// (benchkit.DefaultConfig): each mode runs about a tenth of a second per
// iteration on an idle two-core machine.
type transportCase struct {
	benchkit.Sized
	inprocReps int
}

func (c transportCase) name() string { return fmt.Sprintf("dim=%d_chains=%d", c.Dim, c.Chains) }

var transportCases = func() []transportCase {
	reps := []int{50, 4, 2}
	var cs []transportCase
	for i, s := range benchkit.DefaultConfig().Transport {
		cs = append(cs, transportCase{Sized: s, inprocReps: reps[min(i, len(reps)-1)]})
	}
	return cs
}()

// serveSluice starts a benchmarked server (benchkit.ServeSluice), closed
// at b's cleanup.
func serveSluice(b *testing.B) *benchkit.Loopback {
	b.Helper()
	l, err := benchkit.ServeSluice()
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(l.Close)
	return l
}

// BenchmarkTransport measures, side by side in each iteration, the draws
// per second of one LMC configuration (same target, kernel and seed)
// driven three ways: in-process; as a session of a real server over
// loopback TCP; and the bare transport floor, an engine-free ping-pong of
// the same payload each way on the same stream type (benchkit.ServeEcho).
// A draw is one chain's state after one step. tcp/floor is the session's
// time per step over the floor's per round trip (the aim is ≤ 1.2).
// Every session is checked to deliver chains×steps draws whose last step
// equals the in-process run bit for bit. `sluice bench` makes the same
// comparison with alternating rounds and medians.
func BenchmarkTransport(b *testing.B) {
	for _, c := range transportCases {
		b.Run(c.name(), func(b *testing.B) {
			tg := benchkit.NewDiagGaussian(c.Dim)
			payload := make([]byte, 8*c.Dim*c.Chains)
			tcp := serveSluice(b)
			floor, err := benchkit.ServeEcho(len(payload), 1, max(c.Steps, benchkit.WarmSteps))
			if err != nil {
				b.Fatal(err)
			}
			b.Cleanup(floor.Close)
			ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
			defer cancel()

			warm := min(c.Steps, benchkit.WarmSteps)
			if _, err := benchkit.RunSession(ctx, tcp.Conn(), c.Shape, tg, warm, 0); err != nil {
				b.Fatal(err)
			}
			if err := benchkit.RunEcho(ctx, floor.Conn(), warm, 1, payload); err != nil {
				b.Fatal(err)
			}

			b.ReportAllocs()
			var inT, tcpT, floorT, summaryT time.Duration
			iters := 0
			for b.Loop() {
				t0 := time.Now()
				var want []float64
				for range c.inprocReps {
					want = benchkit.RunKernel(c.Shape, tg, c.Steps)
				}
				inT += time.Since(t0)

				run, err := benchkit.RunSession(ctx, tcp.Conn(), c.Shape, tg, c.Steps, 0)
				if err != nil {
					b.Fatal(err)
				}
				tcpT += run.ToLastDraw
				summaryT += run.Total - run.ToLastDraw
				for i := range want {
					if math.Float64bits(run.Last[i]) != math.Float64bits(want[i]) {
						b.Fatalf("last draw, value %d: %v over TCP, %v in-process", i, run.Last[i], want[i])
					}
				}

				t0 = time.Now()
				err = benchkit.RunEcho(ctx, floor.Conn(), c.Steps, 1, payload)
				floorT += time.Since(t0)
				if err != nil {
					b.Fatal(err)
				}
				iters++
			}

			steps := float64(c.Steps * iters)
			draws := steps * float64(c.Chains)
			inRate := draws * float64(c.inprocReps) / inT.Seconds()
			tcpRate := draws / tcpT.Seconds()
			b.ReportMetric(inRate, "inproc-draws/s")
			b.ReportMetric(tcpRate, "tcp-draws/s")
			b.ReportMetric(steps/floorT.Seconds(), "floor-steps/s")
			b.ReportMetric(tcpRate/inRate, "tcp/inproc")
			b.ReportMetric(tcpT.Seconds()/floorT.Seconds(), "tcp/floor")
			b.ReportMetric(tcpT.Seconds()*1e6/steps, "us/step-tcp")
			b.ReportMetric(floorT.Seconds()*1e6/steps, "us/rtt-floor")
			b.ReportMetric(summaryT.Seconds()*1e3/float64(iters), "ms-summary/session")
		})
	}
}

// BenchmarkKernelVsFused is the kernel part of `sluice bench`: the lmc
// kernel driven in-process against a plain fused loop doing the same
// arithmetic with the same random stream (benchkit.RunFused), side by
// side in each iteration.
func BenchmarkKernelVsFused(b *testing.B) {
	for _, s := range benchkit.DefaultConfig().Kernel {
		b.Run(fmt.Sprintf("dim=%d_chains=%d", s.Dim, s.Chains), func(b *testing.B) {
			g := benchkit.NewDiagGaussian(s.Dim)
			var kT, fT time.Duration
			iters := 0
			for b.Loop() {
				t0 := time.Now()
				benchkit.RunKernel(s.Shape, g, s.Steps)
				kT += time.Since(t0)
				t0 = time.Now()
				benchkit.RunFused(s.Shape, g, s.Steps)
				fT += time.Since(t0)
				iters++
			}
			steps := float64(s.Steps * iters)
			b.ReportMetric(kT.Seconds()*1e6/steps, "us/step-kernel")
			b.ReportMetric(fT.Seconds()*1e6/steps, "us/step-fused")
			b.ReportMetric(float64(kT)/float64(fT), "kernel/fused")
		})
	}
}
