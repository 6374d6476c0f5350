package main

import (
	"context"
	"encoding/json"
	"fmt"
	"math"
	"strings"
	"testing"
	"time"
)

// sluice bench --quick --json runs every part of the benchmark on tiny
// shapes and prints the report's shape: the test checks the shape, that
// every ratio is finite and positive and every time positive, never how
// fast anything was.
func TestBenchQuickJSON(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
	defer cancel()
	code, stdout, stderr := runCmd(t, ctx, "bench", "--quick", "--json")
	if code != 0 {
		t.Fatalf("exit %d:\n%s", code, stderr)
	}
	var rep map[string]any
	if err := json.Unmarshal([]byte(stdout), &rep); err != nil {
		t.Fatalf("not JSON: %v\n%s", err, stdout)
	}
	for _, key := range []string{"machine", "rounds", "transport", "kernel", "python", "memory", "seconds"} {
		if _, ok := rep[key]; !ok {
			t.Errorf("no %q in the report:\n%s", key, stdout)
		}
	}

	// Every "ratio" anywhere in the report is finite and positive.
	ratios := 0
	var walk func(path string, v any)
	walk = func(path string, v any) {
		switch v := v.(type) {
		case map[string]any:
			for k, x := range v {
				if k == "ratio" {
					ratios++
					if r, ok := x.(float64); !ok || !(r > 0) || math.IsInf(r, 0) {
						t.Errorf("%s.ratio = %v, want a finite positive number", path, x)
					}
				}
				walk(path+"."+k, x)
			}
		case []any:
			for i, x := range v {
				walk(fmt.Sprintf("%s[%d]", path, i), x)
			}
		}
	}
	walk("report", rep)

	// One transport and one kernel shape, the memory run, no Python: at
	// least three ratios (five where the CPU time is reported), each
	// beside two positive medians of three rounds.
	if ratios < 3 {
		t.Errorf("%d ratios in the report, want at least 3 (transport, kernel, memory):\n%s", ratios, stdout)
	}
	pos := func(name string, x any) {
		if v, ok := x.(float64); !ok || !(v > 0) || math.IsInf(v, 0) {
			t.Errorf("%s = %v, want a finite positive number", name, x)
		}
	}
	rounds := func(name string, m any) {
		mm, _ := m.(map[string]any)
		pos(name+".median", mm["median"])
		rs, _ := mm["rounds"].([]any)
		if len(rs) != 3 {
			t.Errorf("%s has %d rounds, want 3", name, len(rs))
		}
		for i, r := range rs {
			pos(fmt.Sprintf("%s.rounds[%d]", name, i), r)
		}
	}
	first := func(key string) map[string]any {
		list, _ := rep[key].([]any)
		if len(list) != 1 {
			t.Fatalf("%s has %d entries, want 1:\n%s", key, len(list), stdout)
		}
		m, _ := list[0].(map[string]any)
		return m
	}
	tr := first("transport")
	if tr["chains"] != 2.0 || tr["dim"] != 3.0 {
		t.Errorf("transport shape %v × %v, want 2 × 3", tr["chains"], tr["dim"])
	}
	rounds("transport.session_us_per_step", tr["session_us_per_step"])
	rounds("transport.echo_us_per_step", tr["echo_us_per_step"])
	k := first("kernel")
	rounds("kernel.kernel_us_per_step", k["kernel_us_per_step"])
	rounds("kernel.fused_us_per_step", k["fused_us_per_step"])

	py, _ := rep["python"].(map[string]any)
	if s, _ := py["skipped"].(string); s == "" {
		t.Errorf("python not skipped in a quick run: %v", py)
	}
	if cases, ok := py["cases"].([]any); !ok || len(cases) != 0 {
		t.Errorf("python.cases = %v, want an empty list", py["cases"])
	}

	mem, _ := rep["memory"].(map[string]any)
	samples, _ := mem["samples"].([]any)
	if len(samples) != 10 || mem["draws"] != 2000.0 {
		t.Errorf("memory: %d samples over %v draws, want 10 over 2000", len(samples), mem["draws"])
	}
	for i, s := range samples {
		sm, _ := s.(map[string]any)
		if want := float64(200 * (i + 1)); sm["draws"] != want {
			t.Errorf("memory sample %d at %v draws, want %v", i, sm["draws"], want)
		}
	}
	if _, ok := mem["flat"].(bool); !ok {
		t.Errorf("memory.flat = %v, want a boolean", mem["flat"])
	}
}

// The text form names every part, and says when Python was skipped.
func TestBenchQuickText(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
	defer cancel()
	code, stdout, stderr := runCmd(t, ctx, "bench", "--quick", "--quiet")
	if code != 0 {
		t.Fatalf("exit %d:\n%s", code, stderr)
	}
	if stderr != "" {
		t.Errorf("--quiet, yet stderr:\n%s", stderr)
	}
	for _, want := range []string{
		"session step (lmc, Go client, loopback TCP) vs bare gRPC echo",
		"\n  2 × 3 ",
		"kernel step (lmc in-process, no transport) vs fused Go loop",
		"Python client vs numpy loop: skipped (a quick run measures no Python)",
		"memory of one session (2 × 3, 2000 draws",
		"--quick: tiny sizes",
	} {
		if !strings.Contains(stdout, want) {
			t.Errorf("output lacks %q:\n%s", want, stdout)
		}
	}
}

func TestBenchHelpAndUsage(t *testing.T) {
	ctx := context.Background()
	code, stdout, stderr := runCmd(t, ctx, "bench", "-h")
	if code != 0 || stdout != "" {
		t.Errorf("bench -h: exit %d, stdout %q", code, stdout)
	}
	for _, want := range []string{"Usage: sluice bench", "Examples:\n  sluice bench", "Flags:\n  -", "-no-python", "-quick", "-json"} {
		if !strings.Contains(stderr, want) {
			t.Errorf("bench -h lacks %q:\n%s", want, stderr)
		}
	}
	if code, _, stderr := runCmd(t, ctx, "bench", "--rounds", "-1"); code != 2 || !strings.Contains(stderr, "--rounds") {
		t.Errorf("bench --rounds -1: exit %d, %s", code, stderr)
	}
	if code, _, _ := runCmd(t, ctx, "bench", "extra"); code != 2 {
		t.Errorf("bench extra: exit %d, want 2", code)
	}
}
