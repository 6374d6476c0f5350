package metrics_test

import (
	"bufio"
	"io"
	"math"
	"net/http"
	"net/http/httptest"
	"strconv"
	"strings"
	"testing"
	"time"

	"sluice/server/metrics"
)

// scrape fetches path from the handler and returns the status code and
// body.
func scrape(t *testing.T, h http.Handler, path string) (int, string) {
	t.Helper()
	srv := httptest.NewServer(h)
	defer srv.Close()
	resp, err := http.Get(srv.URL + path)
	if err != nil {
		t.Fatal(err)
	}
	defer func() { _ = resp.Body.Close() }()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	return resp.StatusCode, string(b)
}

// samples parses the Prometheus text format: every sample line
// `name{labels} value` becomes an entry keyed by `name{labels}`.
func samples(t *testing.T, body string) map[string]float64 {
	t.Helper()
	out := map[string]float64{}
	sc := bufio.NewScanner(strings.NewReader(body))
	for sc.Scan() {
		line := sc.Text()
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		i := strings.LastIndexByte(line, ' ')
		v, err := strconv.ParseFloat(line[i+1:], 64)
		if err != nil {
			t.Fatalf("sample line %q: %v", line, err)
		}
		out[line[:i]] = v
	}
	return out
}

func TestHooksAsScraped(t *testing.T) {
	m := metrics.New()
	m.AddSessions(metrics.Running, 1)
	m.AddSessions(metrics.Running, 1)
	m.AddSessions(metrics.Running, 1)
	m.AddSessions(metrics.Running, -1)
	m.AddSessions(metrics.Detached, 1)
	m.SessionFinished("budget_spent")
	m.SessionFinished("budget_spent")
	m.SessionFinished("Budget Spent!") // not an identifier: folded into "other"
	m.Evaluations(600)
	m.Evaluations(396)
	m.Evaluations(-5) // ignored
	for _, d := range []time.Duration{time.Millisecond, 2 * time.Millisecond, 4 * time.Millisecond} {
		m.Step(d)
	}
	m.Received(1000)
	m.Sent(250)
	m.Sent(250)
	m.Refused("unauthenticated")
	m.Checkpoint(30*time.Millisecond, 1<<20)
	m.Checkpoint(10*time.Millisecond, 1<<20+1)
	m.MemoryInUse(123456789)

	code, body := scrape(t, m.Handler(false), "/metrics")
	if code != http.StatusOK {
		t.Fatalf("GET /metrics: %d", code)
	}
	got := samples(t, body)
	// Expected values: the hooks' arguments summed by hand. Histogram
	// buckets are cumulative with inclusive upper bounds ("le"), as the
	// Prometheus exposition format defines them.
	for name, want := range map[string]float64{
		`sluice_sessions{state="running"}`:                      2,
		`sluice_sessions{state="detached"}`:                     1,
		`sluice_sessions_finished_total{reason="budget_spent"}`: 2,
		`sluice_sessions_finished_total{reason="other"}`:        1,
		`sluice_evaluations_total`:                              996,
		`sluice_step_seconds_count`:                             3,
		`sluice_step_seconds_sum`:                               0.007,
		`sluice_step_seconds_bucket{le="0.0008"}`:               0, // 50 µs × 4²
		`sluice_step_seconds_bucket{le="0.0032"}`:               2, // 50 µs × 4³ holds 1 and 2 ms
		`sluice_step_seconds_bucket{le="+Inf"}`:                 3,
		`sluice_received_bytes_total`:                           1000,
		`sluice_sent_bytes_total`:                               500,
		`sluice_refusals_total{reason="unauthenticated"}`:       1,
		`sluice_checkpoint_seconds_count`:                       2,
		`sluice_checkpoint_seconds_sum`:                         0.04,
		`sluice_checkpoint_bytes_bucket{le="1.048576e+06"}`:     1, // 1 KiB × 4⁵ = 1 MiB, inclusive
		`sluice_checkpoint_bytes_bucket{le="4.194304e+06"}`:     2,
		`sluice_memory_budget_in_use_bytes`:                     123456789,
	} {
		v, ok := got[name]
		if !ok {
			t.Errorf("%s missing from the scrape", name)
			continue
		}
		if math.Abs(v-want) > 1e-12*math.Max(1, want) {
			t.Errorf("%s = %v, want %v", name, v, want)
		}
	}
	if _, ok := got["go_goroutines"]; !ok {
		t.Error("the Go runtime collector is missing")
	}
	for name := range got {
		if strings.Contains(name, "sluice_") && !strings.HasPrefix(name, "sluice_") {
			t.Errorf("unexpected sample %s", name)
		}
	}
	if code, _ := scrape(t, m.Handler(false), "/debug/pprof/"); code != http.StatusNotFound {
		t.Errorf("profiles off: GET /debug/pprof/ = %d, want 404", code)
	}
	code, body = scrape(t, m.Handler(true), "/debug/pprof/")
	if code != http.StatusOK || !strings.Contains(body, "goroutine") {
		t.Errorf("profiles on: GET /debug/pprof/ = %d, want 200 listing goroutine", code)
	}
}

func TestOwnRegistry(t *testing.T) {
	a, b := metrics.New(), metrics.New() // no clash: each has its own registry
	a.Evaluations(5)
	if got := samples(t, mustScrape(t, b))["sluice_evaluations_total"]; got != 0 {
		t.Errorf("second registry sees %v evaluations of the first", got)
	}
}

func mustScrape(t *testing.T, m *metrics.Metrics) string {
	_, body := scrape(t, m.Handler(false), "/metrics")
	return body
}

func TestNilMetricsIgnoresHooks(t *testing.T) {
	var m *metrics.Metrics
	m.AddSessions(metrics.Running, 1)
	m.SessionFinished("stopped")
	m.Evaluations(1)
	m.Step(time.Second)
	m.Received(1)
	m.Sent(1)
	m.Refused("busy")
	m.Checkpoint(time.Second, 1)
	m.MemoryInUse(1)
}

func TestUnknownStatePanics(t *testing.T) {
	defer func() {
		if r := recover(); r == nil || !strings.HasPrefix(r.(string), "metrics: ") {
			t.Errorf("recovered %v, want a metrics: panic", r)
		}
	}()
	metrics.New().AddSessions("sleeping", 1)
}
