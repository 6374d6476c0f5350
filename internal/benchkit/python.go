package benchkit

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"time"
)

// Python is the interpreter the Python client targets: Debian's, which
// has the python3-grpcio, python3-protobuf and python3-numpy packages.
const Python = "/usr/bin/python3"

// PythonConfig says how to compare the Python client with numpy.
type PythonConfig struct {
	// Interpreter is the Python to run (Python if empty).
	Interpreter string
	// Dir holds the client: bench.py and the sluice_client package.
	Dir string
	Shape
	// Steps is the steps of each run, both sides; Rounds the number of
	// alternating rounds.
	Steps, Rounds int
	// GradCostMS lists the costs of a gradient batch to compare at, in
	// milliseconds: the gradient sleeps that long before answering.
	GradCostMS []float64
}

// PythonCase is the comparison at one gradient cost.
type PythonCase struct {
	GradCostMS float64 `json:"grad_cost_ms"`
	// Client is the time per step of a session through the Python
	// client; Numpy that of the in-process numpy loop; ms.
	Client Measure `json:"client_ms_per_step"`
	Numpy  Measure `json:"numpy_ms_per_step"`
	// Ratio is the median of the rounds' Client/Numpy, RatioRounds those
	// ratios in the order run.
	Ratio       float64   `json:"ratio"`
	RatioRounds []float64 `json:"ratio_rounds"`
}

// PythonResult is the Python client against numpy, or why it was not
// measured.
type PythonResult struct {
	// Skipped, when not empty, says why nothing was measured.
	Skipped string `json:"skipped,omitempty"`
	Shape
	Steps  int          `json:"steps"`
	Rounds int          `json:"rounds"`
	Cases  []PythonCase `json:"cases"`
}

// PythonReady reports why the interpreter cannot run the Python client
// from dir (nil if it can): it must exist, import grpc, protobuf and
// numpy, and dir must hold bench.py.
func PythonReady(ctx context.Context, interpreter, dir string) error {
	if interpreter == "" {
		interpreter = Python
	}
	if _, err := os.Stat(interpreter); err != nil {
		return fmt.Errorf("no %s", interpreter)
	}
	ctx, cancel := context.WithTimeout(ctx, 2*time.Minute)
	defer cancel()
	if out, err := exec.CommandContext(ctx, interpreter, "-c", "import grpc, google.protobuf, numpy").CombinedOutput(); err != nil {
		return fmt.Errorf("%s cannot import grpc, google.protobuf and numpy (apt-get install python3-grpcio python3-protobuf python3-numpy): %s",
			interpreter, lastLine(string(out)))
	}
	if dir == "" {
		return errors.New("the Python client's directory (client/python) was not found")
	}
	if _, err := os.Stat(filepath.Join(dir, "bench.py")); err != nil {
		return fmt.Errorf("no bench.py in %s", dir)
	}
	return nil
}

// benchPy is the part of bench.py's --json output read here.
type benchPy struct {
	SluiceMS []float64 `json:"sluice_ms_per_step_rounds"`
	NumpyMS  []float64 `json:"numpy_ms_per_step_rounds"`
}

// PythonClient starts a server from ServeSluice and runs bench.py
// against it once per gradient cost. bench.py alternates a session
// through the Python client with the numpy loop, c.Rounds times; the
// ratio is the median of the rounds' ratios, as in bench.py.
func PythonClient(ctx context.Context, c PythonConfig) (PythonResult, error) {
	res := PythonResult{Shape: c.Shape, Steps: c.Steps, Rounds: c.Rounds}
	interp := c.Interpreter
	if interp == "" {
		interp = Python
	}
	srv, err := ServeSluice()
	if err != nil {
		return res, err
	}
	defer srv.Close()
	for _, cost := range c.GradCostMS {
		rctx, cancel := context.WithTimeout(ctx, 20*time.Minute)
		cmd := exec.CommandContext(rctx, interp, "bench.py", "--json", "--target", srv.Addr(),
			"--dim", strconv.Itoa(c.Dim), "--chains", strconv.Itoa(c.Chains),
			"--steps", strconv.Itoa(c.Steps), "--local-steps", strconv.Itoa(c.Steps),
			"--repeats", strconv.Itoa(c.Rounds), "--grad-cost-ms", strconv.FormatFloat(cost, 'g', -1, 64))
		cmd.Dir = c.Dir
		cmd.Env = append(os.Environ(), "PYTHONPATH="+c.Dir, "PYTHONDONTWRITEBYTECODE=1")
		cmd.WaitDelay = 5 * time.Second
		var stderr bytes.Buffer
		cmd.Stderr = &stderr
		out, err := cmd.Output()
		cancel()
		if err != nil {
			return res, fmt.Errorf("bench.py (gradient cost %g ms): %v\n%s", cost, err, stderr.Bytes())
		}
		var b benchPy
		if err := json.Unmarshal([]byte(lastLine(string(out))), &b); err != nil {
			return res, fmt.Errorf("bench.py output: %v\n%s", err, out)
		}
		if len(b.SluiceMS) != c.Rounds || len(b.NumpyMS) != c.Rounds {
			return res, fmt.Errorf("bench.py gave %d and %d rounds, want %d", len(b.SluiceMS), len(b.NumpyMS), c.Rounds)
		}
		rs := make([]float64, c.Rounds)
		for i := range rs {
			rs[i] = b.SluiceMS[i] / b.NumpyMS[i]
		}
		res.Cases = append(res.Cases, PythonCase{GradCostMS: cost, Client: measure(b.SluiceMS), Numpy: measure(b.NumpyMS),
			Ratio: median(rs), RatioRounds: rs})
	}
	return res, nil
}

func lastLine(s string) string {
	lines := strings.Split(strings.TrimSpace(s), "\n")
	return lines[len(lines)-1]
}
