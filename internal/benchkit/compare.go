package benchkit

import (
	"context"
	"fmt"
	"math"
	"runtime"
	"runtime/debug"
	"slices"
	"time"
)

// Measure is one figure over the rounds of a comparison: the median and
// every round's value, in the order run.
type Measure struct {
	Median float64   `json:"median"`
	Rounds []float64 `json:"rounds"`
}

func measure(xs []float64) Measure { return Measure{Median: median(xs), Rounds: xs} }

// median returns the median of xs (the mean of the middle two for an
// even count); NaN for none.
func median(xs []float64) float64 { return Quantile(xs, 0.5) }

// Quantile returns the p-quantile of xs, interpolating linearly between
// order statistics (the sample at rank p·(n−1), counting from 0); NaN for
// none. xs is not changed.
func Quantile(xs []float64, p float64) float64 {
	if len(xs) == 0 || !(p >= 0 && p <= 1) {
		return math.NaN()
	}
	s := slices.Clone(xs)
	slices.Sort(s)
	r := p * float64(len(s)-1)
	lo := int(math.Floor(r))
	if lo == len(s)-1 {
		return s[lo]
	}
	return s[lo] + (r-float64(lo))*(s[lo+1]-s[lo])
}

// A sample is what one run cost: wall time, and the CPU time of the
// whole process (every thread, user and system) when the platform
// reports it.
type sample struct {
	wall, cpu time.Duration
	hasCPU    bool
}

// timed runs f and returns its cost.
func timed(f func() error) (sample, error) {
	c0, ok0 := processCPU()
	t0 := time.Now()
	err := f()
	wall := time.Since(t0)
	c1, ok1 := processCPU()
	return sample{wall: wall, cpu: c1 - c0, hasCPU: ok0 && ok1}, err
}

// alternate runs a, then b, rounds times (A, B, A, B, …) and returns what
// each cost per round. Each run starts from collected garbage and runs
// with the collector off (noGC), so that neither side pays for a
// collection the other's garbage called for, nor for one its own garbage
// calls for at a rate set by whatever else the process holds: a bare
// echo at 64 × 1000 allocates about 1 MB per round trip (protobuf copies
// every bytes field it decodes), and its time moved by 2× with the heap
// the runs before it left. With the collector off the floor is the
// transport alone, the strictest floor; what each side allocates is
// reported by the Go benchmarks (B/op).
func alternate(rounds int, a, b func() (sample, error)) (as, bs []sample, err error) {
	for range rounds {
		x, err := noGC(a)
		if err != nil {
			return nil, nil, err
		}
		y, err := noGC(b)
		if err != nil {
			return nil, nil, err
		}
		as, bs = append(as, x), append(bs, y)
	}
	return as, bs, nil
}

// noGC runs f after a collection, with the collector off.
func noGC(f func() (sample, error)) (sample, error) {
	runtime.GC()
	defer debug.SetGCPercent(debug.SetGCPercent(-1))
	return f()
}

// CPUComparison compares the CPU time of the whole process (every
// thread, user and system) during the two sides' runs: unlike wall time,
// it does not count the time the process waited for a core, so it moves
// less with the machine's load. Per step, in µs.
type CPUComparison struct {
	Value Measure `json:"us_per_step"`
	Floor Measure `json:"floor_us_per_step"`
	// Ratio is the median of the rounds' Value/Floor, RatioRounds those
	// ratios in the order run.
	Ratio       float64   `json:"ratio"`
	RatioRounds []float64 `json:"ratio_rounds"`
}

// compare turns the costs of alternating rounds of steps steps into
// medians and ratios of wall time per step, in µs, and the same of CPU
// time (nil when the platform does not report it).
func compare(as, bs []sample, steps int) (a, b Measure, ratios []float64, cpu *CPUComparison) {
	us := func(d time.Duration) float64 { return d.Seconds() * 1e6 / float64(steps) }
	var aw, bw, ac, bc, rc []float64
	hasCPU := true
	for i := range as {
		aw, bw = append(aw, us(as[i].wall)), append(bw, us(bs[i].wall))
		ratios = append(ratios, aw[i]/bw[i])
		hasCPU = hasCPU && as[i].hasCPU && bs[i].hasCPU && as[i].cpu > 0 && bs[i].cpu > 0
		ac, bc = append(ac, us(as[i].cpu)), append(bc, us(bs[i].cpu))
		rc = append(rc, ac[i]/bc[i])
	}
	if hasCPU {
		cpu = &CPUComparison{Value: measure(ac), Floor: measure(bc), Ratio: median(rc), RatioRounds: rc}
	}
	return measure(aw), measure(bw), ratios, cpu
}

// WarmSteps is the length of the untimed first run of each side of a
// transport comparison: it opens the streams and lets the transport's
// flow-control windows grow.
const WarmSteps = 200

// TransportResult compares a session step over loopback TCP with a bare
// gRPC echo of the same bytes (one message each way per step).
type TransportResult struct {
	Shape
	Steps int `json:"steps"`
	// Session is the time per step, from opening the session to the
	// arrival of its last draw, over the steps; µs.
	Session Measure `json:"session_us_per_step"`
	// Groups is the session's Spec.ChainGroups (0: the server chose).
	Groups int `json:"chain_groups"`
	// Echo is the time per round trip of the echo; µs.
	Echo Measure `json:"echo_us_per_step"`
	// Ratio is the median of the rounds' Session/Echo, RatioRounds those
	// ratios in the order run.
	Ratio       float64   `json:"ratio"`
	RatioRounds []float64 `json:"ratio_rounds"`
	// CPU compares the process's CPU time, session against echo, over the
	// same runs (the session's up to its last draw); nil where the
	// platform does not report it.
	CPU *CPUComparison `json:"cpu,omitempty"`
	// SummaryMS is the median time from the last draw to the end of the
	// session: the final summary, computed once per session; ms.
	SummaryMS float64 `json:"summary_ms"`
}

// Transport compares, rounds times alternately, a session of steps lmc
// steps on srv (a server from ServeSluice) with steps round trips of an
// echo server carrying chains × dim float64 each way. It checks that the
// session's last draws equal an in-process run of the kernel bit for bit.
func Transport(ctx context.Context, srv *Loopback, s Shape, steps, rounds, groups int) (TransportResult, error) {
	res := TransportResult{Shape: s, Steps: steps, Groups: groups}
	payload := make([]byte, 8*s.Chains*s.Dim)
	echo, err := ServeEcho(len(payload), 1, max(steps, WarmSteps))
	if err != nil {
		return res, err
	}
	defer echo.Close()
	tg := NewDiagGaussian(s.Dim)
	warm := min(steps, WarmSteps)
	if _, err := RunSession(ctx, srv.Conn(), s, tg, warm, groups); err != nil {
		return res, err
	}
	if err := RunEcho(ctx, echo.Conn(), warm, 1, payload); err != nil {
		return res, err
	}
	var last []float64
	var summary []float64
	as, bs, err := alternate(rounds, func() (sample, error) {
		run, err := RunSession(ctx, srv.Conn(), s, tg, steps, groups)
		last = run.Last
		summary = append(summary, (run.Total-run.ToLastDraw).Seconds()*1e3)
		return sample{wall: run.ToLastDraw, cpu: run.CPUToLastDraw, hasCPU: run.HasCPU}, err
	}, func() (sample, error) {
		return timed(func() error { return RunEcho(ctx, echo.Conn(), steps, 1, payload) })
	})
	if err != nil {
		return res, err
	}
	want := RunKernel(s, tg, steps)
	for i := range want {
		if math.Float64bits(last[i]) != math.Float64bits(want[i]) {
			return res, fmt.Errorf("session %v: last draw, value %d: %v over TCP, %v in-process", s, i, last[i], want[i])
		}
	}
	res.Session, res.Echo, res.RatioRounds, res.CPU = compare(as, bs, steps)
	res.Ratio, res.SummaryMS = median(res.RatioRounds), median(summary)
	return res, nil
}

// KernelResult compares the lmc kernel driven in-process with a fused
// loop making the same steps.
type KernelResult struct {
	Shape
	Steps int `json:"steps"`
	// Kernel and Fused are the times per step; µs.
	Kernel Measure `json:"kernel_us_per_step"`
	Fused  Measure `json:"fused_us_per_step"`
	// Ratio is the median of the rounds' Kernel/Fused, RatioRounds those
	// ratios in the order run.
	Ratio       float64   `json:"ratio"`
	RatioRounds []float64 `json:"ratio_rounds"`
	// CPU compares the process's CPU time over the same runs; nil where
	// the platform does not report it.
	CPU *CPUComparison `json:"cpu,omitempty"`
}

// Kernel compares, rounds times alternately, RunKernel and RunFused over
// steps steps, after one untimed run of each, and checks that they end
// at the same positions.
func Kernel(s Shape, steps, rounds int) (KernelResult, error) {
	res := KernelResult{Shape: s, Steps: steps}
	g := NewDiagGaussian(s.Dim)
	got, want := RunKernel(s, g, steps), RunFused(s, g, steps)
	for i := range want {
		// The two evaluate the same expressions in the same order; a
		// compiler may still fuse a multiply-add in one and not the
		// other, so allow rounding.
		if d := math.Abs(got[i] - want[i]); !(d <= 1e-9*(1+math.Abs(want[i]))) {
			return res, fmt.Errorf("kernel %v: position %d is %v in the kernel, %v in the fused loop", s, i, got[i], want[i])
		}
	}
	as, bs, err := alternate(rounds, func() (sample, error) {
		return timed(func() error { RunKernel(s, g, steps); return nil })
	}, func() (sample, error) {
		return timed(func() error { RunFused(s, g, steps); return nil })
	})
	if err != nil {
		return res, err
	}
	res.Kernel, res.Fused, res.RatioRounds, res.CPU = compare(as, bs, steps)
	res.Ratio = median(res.RatioRounds)
	return res, nil
}
