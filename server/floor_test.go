package server_test

import (
	"context"
	"testing"
	"time"

	"sluice/internal/benchkit"
)

// BenchmarkFloorWithDraws is the floor of a session step as the protocol
// shapes it: one rows×dim message up (the gradients) and two down (the
// Points of the next step and the Draws of the step just made), against
// the one-each-way floor of BenchmarkTransport. The gap between the two is
// what sending draws costs on the wire, before any engine work.
func BenchmarkFloorWithDraws(b *testing.B) {
	for _, c := range transportCases {
		b.Run(c.name(), func(b *testing.B) {
			payload := make([]byte, 8*c.Dim*c.Chains)
			rounds := max(c.Steps, benchkit.WarmSteps)
			conn1, err := benchkit.ServeEcho(len(payload), 1, rounds)
			if err != nil {
				b.Fatal(err)
			}
			b.Cleanup(conn1.Close)
			conn2, err := benchkit.ServeEcho(len(payload), 2, rounds)
			if err != nil {
				b.Fatal(err)
			}
			b.Cleanup(conn2.Close)
			ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
			defer cancel()
			warm := min(c.Steps, benchkit.WarmSteps)
			if err := benchkit.RunEcho(ctx, conn1.Conn(), warm, 1, payload); err != nil {
				b.Fatal(err)
			}
			if err := benchkit.RunEcho(ctx, conn2.Conn(), warm, 2, payload); err != nil {
				b.Fatal(err)
			}
			b.ReportAllocs()
			var one, two time.Duration
			iters := 0
			for b.Loop() {
				t0 := time.Now()
				if err := benchkit.RunEcho(ctx, conn1.Conn(), c.Steps, 1, payload); err != nil {
					b.Fatal(err)
				}
				one += time.Since(t0)
				t0 = time.Now()
				if err := benchkit.RunEcho(ctx, conn2.Conn(), c.Steps, 2, payload); err != nil {
					b.Fatal(err)
				}
				two += time.Since(t0)
				iters++
			}
			trips := float64(c.Steps * iters)
			b.ReportMetric(one.Seconds()*1e6/trips, "us/rtt-1down")
			b.ReportMetric(two.Seconds()*1e6/trips, "us/rtt-2down")
			b.ReportMetric(float64(two)/float64(one), "2down/1down")
		})
	}
}

// BenchmarkSessionLoopback runs the TCP mode of BenchmarkTransport alone
// (a real server on loopback, the same target, kernel and seed), so that a
// CPU profile of it shows only the session's costs.
func BenchmarkSessionLoopback(b *testing.B) {
	for _, c := range transportCases {
		b.Run(c.name(), func(b *testing.B) {
			tg := benchkit.NewDiagGaussian(c.Dim)
			conn := serveSluice(b)
			ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
			defer cancel()
			if _, err := benchkit.RunSession(ctx, conn.Conn(), c.Shape, tg, min(c.Steps, benchkit.WarmSteps), 0); err != nil {
				b.Fatal(err)
			}
			b.ReportAllocs()
			var total time.Duration
			iters := 0
			for b.Loop() {
				t0 := time.Now()
				if _, err := benchkit.RunSession(ctx, conn.Conn(), c.Shape, tg, c.Steps, 0); err != nil {
					b.Fatal(err)
				}
				total += time.Since(t0)
				iters++
			}
			b.ReportMetric(total.Seconds()*1e6/float64(c.Steps*iters), "us/step")
		})
	}
}
