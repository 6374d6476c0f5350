package benchkit

import (
	"context"
	"fmt"
	"os"
	"runtime"
	"strings"
	"time"
)

// Sized is a shape and the steps of each run at it.
type Sized struct {
	Shape
	Steps int
}

// Config is what Run measures.
type Config struct {
	// Rounds is the number of alternating rounds of the Go comparisons
	// (Python.Rounds those of the Python one).
	Rounds int
	// Transport lists the shapes of the session-versus-echo comparison,
	// Kernel those of the kernel-versus-fused-loop comparison.
	Transport, Kernel []Sized
	// Memory is the shape of the long session and its number of draws
	// (a multiple of 10·chains).
	Memory      Shape
	MemoryDraws int64
	// Python configures the Python comparison; SkipPython, when not empty,
	// skips it and says why.
	Python     PythonConfig
	SkipPython string
	// Groups is the sessions' Spec.ChainGroups (0: the server chooses; 1:
	// one request at a time).
	Groups int
	// Log, if not nil, is told what is being measured as it starts.
	Log func(format string, args ...any)
}

// DefaultConfig is the full run of `sluice bench`. Many short rounds
// rather than a few long ones: on a shared machine the load changes
// within seconds, and runs close in time see the same load. Step counts
// are set so that each timed transport run takes about a tenth of a
// second on an idle 2-core machine (floors of about 40 µs, 300 µs and
// 1.2 ms per round trip at the three shapes), each kernel run a few
// hundredths.
func DefaultConfig() Config {
	return Config{
		Rounds: 15,
		Transport: []Sized{
			{Shape{Chains: 8, Dim: 10}, 2000},
			{Shape{Chains: 64, Dim: 100}, 400},
			{Shape{Chains: 64, Dim: 1000}, 100},
		},
		Kernel: []Sized{
			{Shape{Chains: 8, Dim: 10}, 40000},
			{Shape{Chains: 64, Dim: 100}, 500},
			{Shape{Chains: 64, Dim: 1000}, 50},
		},
		Memory:      Shape{Chains: 8, Dim: 10},
		MemoryDraws: 1_000_000,
		Python: PythonConfig{Shape: Shape{Chains: 64, Dim: 1000}, Steps: 60, Rounds: 7,
			GradCostMS: []float64{0, 5}},
	}
}

// QuickConfig is a short run with tiny shapes and a handful of steps,
// for tests: its figures say nothing about speed. It skips Python.
func QuickConfig() Config {
	s := Shape{Chains: 2, Dim: 3}
	return Config{
		Rounds:      3,
		Transport:   []Sized{{s, 10}},
		Kernel:      []Sized{{s, 50}},
		Memory:      Shape{Chains: 2, Dim: 3},
		MemoryDraws: 2000,
		SkipPython:  "a quick run measures no Python",
	}
}

// Machine describes where the figures were measured.
type Machine struct {
	GOOS       string `json:"goos"`
	GOARCH     string `json:"goarch"`
	CPUs       int    `json:"cpus"`
	GOMAXPROCS int    `json:"gomaxprocs"`
	GoVersion  string `json:"go_version"`
	// LoadAverage is the 1-minute load average at the start and at the
	// end, from /proc/loadavg (−1 where it cannot be read).
	LoadStart float64 `json:"load_average_start"`
	LoadEnd   float64 `json:"load_average_end"`
}

// Report is everything Run measured.
type Report struct {
	Machine   Machine           `json:"machine"`
	Rounds    int               `json:"rounds"`
	Transport []TransportResult `json:"transport"`
	Kernel    []KernelResult    `json:"kernel"`
	Python    PythonResult      `json:"python"`
	Memory    MemoryResult      `json:"memory"`
	Seconds   float64           `json:"seconds"`
}

// Run measures everything c asks for, in order: transport, kernel,
// Python, memory.
func Run(ctx context.Context, c Config) (*Report, error) {
	logf := c.Log
	if logf == nil {
		logf = func(string, ...any) {}
	}
	t0 := time.Now()
	rep := &Report{Rounds: c.Rounds, Machine: Machine{GOOS: runtime.GOOS, GOARCH: runtime.GOARCH, CPUs: runtime.NumCPU(),
		GOMAXPROCS: runtime.GOMAXPROCS(0), GoVersion: runtime.Version(), LoadStart: loadAverage()}}
	if c.Rounds < 1 {
		return nil, fmt.Errorf("benchkit: %d rounds", c.Rounds)
	}

	srv, err := ServeSluice()
	if err != nil {
		return nil, err
	}
	for _, t := range c.Transport {
		logf("session step vs echo, %v, %d steps × %d rounds", t.Shape, t.Steps, c.Rounds)
		r, err := Transport(ctx, srv, t.Shape, t.Steps, c.Rounds, c.Groups)
		if err != nil {
			srv.Close()
			return nil, err
		}
		rep.Transport = append(rep.Transport, r)
	}
	srv.Close()

	for _, k := range c.Kernel {
		logf("kernel step vs fused loop, %v, %d steps × %d rounds", k.Shape, k.Steps, c.Rounds)
		r, err := Kernel(k.Shape, k.Steps, c.Rounds)
		if err != nil {
			return nil, err
		}
		rep.Kernel = append(rep.Kernel, r)
	}

	rep.Python = PythonResult{Skipped: c.SkipPython, Shape: c.Python.Shape, Steps: c.Python.Steps, Rounds: c.Python.Rounds,
		Cases: []PythonCase{}}
	if c.SkipPython == "" {
		if err := PythonReady(ctx, c.Python.Interpreter, c.Python.Dir); err != nil {
			rep.Python.Skipped = err.Error()
		} else {
			logf("Python client vs numpy, %v, %d steps × %d rounds, gradient costs %v ms", c.Python.Shape, c.Python.Steps, c.Python.Rounds, c.Python.GradCostMS)
			if rep.Python, err = PythonClient(ctx, c.Python); err != nil {
				return nil, err
			}
		}
	}

	logf("memory of one session, %v, %d draws", c.Memory, c.MemoryDraws)
	if rep.Memory, err = Memory(ctx, c.Memory, c.MemoryDraws); err != nil {
		return nil, err
	}
	rep.Machine.LoadEnd = loadAverage()
	rep.Seconds = time.Since(t0).Seconds()
	return rep, nil
}

// loadAverage returns the 1-minute load average, or −1.
func loadAverage() float64 {
	b, err := os.ReadFile("/proc/loadavg")
	if err != nil {
		return -1
	}
	var x float64
	if _, err := fmt.Sscan(strings.TrimSpace(string(b)), &x); err != nil {
		return -1
	}
	return x
}
