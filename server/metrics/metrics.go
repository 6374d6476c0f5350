// Package metrics owns sluice's operational metrics: a Prometheus registry
// of its own (never the global one), the hooks that update it, and the
// HTTP handler that serves it (with the Go runtime's profiles, optionally,
// on the same listener).
//
// Names follow Prometheus conventions: a sluice_ prefix, base units
// (seconds, bytes), _total on counters. Labels take values from small
// fixed sets (a session state, a finish reason, a refusal reason), never
// a session id or anything a client chooses.
//
// The package knows nothing of gRPC or of the wire API: the adapter
// (package server) calls the hooks from its interceptors, and the engine
// can be handed them through an interface of its own.
package metrics

import (
	"net/http"
	"net/http/pprof"
	"regexp"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
)

// State is a session state, the label of sluice_sessions.
type State string

// The session states.
const (
	// Running: a client is connected and the session samples.
	Running State = "running"
	// Detached: the session waits, checkpointed, for its client to resume.
	Detached State = "detached"
)

var states = []State{Running, Detached}

// Metrics holds the registry and its collectors. Methods are safe for
// concurrent use; a nil *Metrics ignores every hook, so callers need not
// check whether metrics are on.
type Metrics struct {
	reg         *prometheus.Registry
	sessions    *prometheus.GaugeVec
	finished    *prometheus.CounterVec
	evaluations prometheus.Counter
	step        prometheus.Histogram
	received    prometheus.Counter
	sent        prometheus.Counter
	refusals    *prometheus.CounterVec
	ckptSeconds prometheus.Histogram
	ckptBytes   prometheus.Histogram
	memory      prometheus.Gauge
}

// New builds the metrics on a fresh registry, with the Go runtime and
// process collectors.
func New() *Metrics {
	m := &Metrics{
		reg: prometheus.NewRegistry(),
		sessions: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "sluice_sessions", Help: "Sessions by state: running (a client connected) or detached (waiting for a resume).",
		}, []string{"state"}),
		finished: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "sluice_sessions_finished_total", Help: "Sessions finished, by the reason in their Finished frame.",
		}, []string{"reason"}),
		evaluations: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "sluice_evaluations_total", Help: "Points evaluated by clients: rows of the evaluation frames received.",
		}),
		step: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "sluice_step_seconds", Help: "Time between consecutive requests for points in a session: one step of the server and one round trip of its client.",
			Buckets: prometheus.ExponentialBuckets(50e-6, 4, 12), // 50 µs … 210 s
		}),
		received: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "sluice_received_bytes_total", Help: "Bytes of gRPC messages received, as on the wire.",
		}),
		sent: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "sluice_sent_bytes_total", Help: "Bytes of gRPC messages sent, as on the wire.",
		}),
		refusals: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "sluice_refusals_total", Help: "Calls ended with a refusal, by reason (the gRPC status code in snake case).",
		}, []string{"reason"}),
		ckptSeconds: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "sluice_checkpoint_seconds", Help: "Time to write one session checkpoint.",
			Buckets: prometheus.ExponentialBuckets(100e-6, 4, 10), // 100 µs … 26 s
		}),
		ckptBytes: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "sluice_checkpoint_bytes", Help: "Size of one session checkpoint.",
			Buckets: prometheus.ExponentialBuckets(1024, 4, 12), // 1 KiB … 4 GiB
		}),
		memory: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "sluice_memory_budget_in_use_bytes", Help: "Bytes of the server's session memory budget in use.",
		}),
	}
	m.reg.MustRegister(m.sessions, m.finished, m.evaluations, m.step, m.received, m.sent, m.refusals,
		m.ckptSeconds, m.ckptBytes, m.memory,
		collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	for _, s := range states {
		m.sessions.WithLabelValues(string(s)) // present at 0 before the first session
	}
	return m
}

// Registry returns the registry, for callers adding collectors of their
// own.
func (m *Metrics) Registry() *prometheus.Registry { return m.reg }

// AddSessions moves the count of sessions in a state by delta (+1 on
// entering it, -1 on leaving). It panics on a state not listed above.
func (m *Metrics) AddSessions(s State, delta int) {
	if m == nil {
		return
	}
	switch s {
	case Running, Detached:
	default:
		panic("metrics: unknown session state " + string(s))
	}
	m.sessions.WithLabelValues(string(s)).Add(float64(delta))
}

// label keeps a label value within a small fixed vocabulary: lower-case
// identifiers of at most 32 characters; anything else becomes "other".
var label = regexp.MustCompile(`^[a-z][a-z0-9_]{0,31}$`)

func labelValue(v string) string {
	if label.MatchString(v) {
		return v
	}
	return "other"
}

// SessionFinished counts a finished session; reason is a lower-case
// identifier from a fixed set (the wire API's finish reasons).
func (m *Metrics) SessionFinished(reason string) {
	if m == nil {
		return
	}
	m.finished.WithLabelValues(labelValue(reason)).Inc()
}

// Evaluations counts points evaluated by a client.
func (m *Metrics) Evaluations(n int64) {
	if m == nil || n <= 0 {
		return
	}
	m.evaluations.Add(float64(n))
}

// Step records the duration of one step.
func (m *Metrics) Step(d time.Duration) {
	if m == nil {
		return
	}
	m.step.Observe(d.Seconds())
}

// Received and Sent count transport bytes.
func (m *Metrics) Received(n int) {
	if m == nil || n <= 0 {
		return
	}
	m.received.Add(float64(n))
}

// Sent counts transport bytes sent.
func (m *Metrics) Sent(n int) {
	if m == nil || n <= 0 {
		return
	}
	m.sent.Add(float64(n))
}

// Refused counts a refused call; reason is a lower-case identifier from a
// fixed set.
func (m *Metrics) Refused(reason string) {
	if m == nil {
		return
	}
	m.refusals.WithLabelValues(labelValue(reason)).Inc()
}

// Checkpoint records one checkpoint write: its duration and size.
func (m *Metrics) Checkpoint(d time.Duration, bytes int) {
	if m == nil {
		return
	}
	m.ckptSeconds.Observe(d.Seconds())
	m.ckptBytes.Observe(float64(bytes))
}

// MemoryInUse sets the bytes of the memory budget in use.
func (m *Metrics) MemoryInUse(bytes int64) {
	if m == nil {
		return
	}
	m.memory.Set(float64(bytes))
}

// Handler serves the metrics at /metrics in the Prometheus text format
// and, with profiles, the Go runtime's profiles under /debug/pprof/
// (net/http/pprof). Anything else is 404.
func (m *Metrics) Handler(profiles bool) http.Handler {
	mux := http.NewServeMux()
	mux.Handle("/metrics", promhttp.HandlerFor(m.reg, promhttp.HandlerOpts{Registry: m.reg}))
	if profiles {
		mux.HandleFunc("/debug/pprof/", pprof.Index)
		mux.HandleFunc("/debug/pprof/cmdline", pprof.Cmdline)
		mux.HandleFunc("/debug/pprof/profile", pprof.Profile)
		mux.HandleFunc("/debug/pprof/symbol", pprof.Symbol)
		mux.HandleFunc("/debug/pprof/trace", pprof.Trace)
	}
	return mux
}
