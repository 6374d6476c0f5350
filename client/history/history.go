// Package history owns the files of a run that `sluice report` reads
// beside its draws: the progress history (one JSON object per line, one
// line per progress report with the verdict so far, and a last line when
// the session finishes, with its reason and verdict) and the draws as CSV
// (DrawsWriter). The keys and columns are documented in docs/report.md.
// It is the one definition of both formats: the Go client writes them
// (client.WriteHistory, client.WriteDraws), the report reads them. The
// package uses the standard library only, so any program can write or read
// the files.
package history

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"os"
)

// Kinds of record.
const (
	// KindProgress marks a progress report.
	KindProgress = "progress"
	// KindFinish marks the last record of a session, with its reason.
	KindFinish = "finish"
)

// Num is a float64 that is written as JSON null when it is not finite
// (NaN or ±Inf mean "not available"; JSON has no such numbers) and read
// back from null as NaN.
type Num float64

// MarshalJSON writes null for a non-finite value.
func (n Num) MarshalJSON() ([]byte, error) {
	f := float64(n)
	if math.IsNaN(f) || math.IsInf(f, 0) {
		return []byte("null"), nil
	}
	return json.Marshal(f)
}

// UnmarshalJSON reads null as NaN.
func (n *Num) UnmarshalJSON(b []byte) error {
	if string(b) == "null" {
		*n = Num(math.NaN())
		return nil
	}
	var f float64
	err := json.Unmarshal(b, &f)
	*n = Num(f)
	return err
}

// Valid reports whether n is a finite number.
func (n Num) Valid() bool { return !math.IsNaN(float64(n)) && !math.IsInf(float64(n), 0) }

// Param is the measured accuracy of one parameter at one report.
type Param struct {
	Name    string `json:"name"`
	Rhat    Num    `json:"rhat"`
	BulkESS Num    `json:"ess_bulk"`
	TailESS Num    `json:"ess_tail"`
}

// Stein is the kernel Stein discrepancy of the kept draws, with its
// standard error and an upper confidence bound when the producer has
// them (NaN otherwise).
type Stein struct {
	Value Num `json:"value"`
	SE    Num `json:"se"`
	Upper Num `json:"upper"`
}

// Bound is the bound on the distance between a chain's law and the
// target: guaranteed (from declared curvature) or estimated.
type Bound struct {
	Metric     string `json:"metric"`
	Value      Num    `json:"value"`
	Guaranteed bool   `json:"guaranteed"`
	Label      string `json:"label,omitempty"`
}

// Target is one accuracy target and where the run stands against it.
type Target struct {
	Name    string `json:"name"`
	Want    Num    `json:"want"`
	Current Num    `json:"current"`
	Met     bool   `json:"met"`
	// ProjectedEvaluations is the producer's projection of the
	// evaluations needed to meet it (−1: cannot be projected).
	ProjectedEvaluations int64 `json:"projected_evaluations"`
}

// Check is one check of the session's verdict: its name, its status
// ("pass", "warn" or "fail"), the figure it rests on (NaN: none) and one
// sentence for a person.
type Check struct {
	Name     string `json:"name"`
	Status   string `json:"status"`
	Figure   Num    `json:"figure"`
	Sentence string `json:"sentence"`
}

// Record is one line of the file.
type Record struct {
	Kind  string `json:"kind"`
	State string `json:"state,omitempty"`
	Steps int64  `json:"steps"`
	// EvaluationsUsed and EvaluationsLeft count evaluations of the
	// target; EvaluationsLeft is −1 when unlimited.
	EvaluationsUsed int64 `json:"evals_used"`
	EvaluationsLeft int64 `json:"evals_left"`
	// ElapsedSeconds is wall time since the session started;
	// SecondsLeft is −1 when unlimited.
	ElapsedSeconds float64 `json:"elapsed_s"`
	SecondsLeft    float64 `json:"time_left_s"`
	DrawsSent      int64   `json:"draws_sent"`
	Params         []Param `json:"params,omitempty"`
	// WorstRhat is the largest R-hat over the parameters; SmallestESS
	// the smallest of their bulk- and tail-ESS (NaN when none is known).
	WorstRhat   Num      `json:"worst_rhat"`
	SmallestESS Num      `json:"least_ess"`
	Stein       *Stein   `json:"stein,omitempty"`
	Bound       *Bound   `json:"bound,omitempty"`
	Targets     []Target `json:"targets,omitempty"`
	// Checks is the verdict: so far (KindProgress), or the session's
	// final one (KindFinish).
	Checks []Check `json:"checks,omitempty"`
	// Reason and Message say why the session ended (KindFinish only).
	Reason  string `json:"reason,omitempty"`
	Message string `json:"message,omitempty"`
}

// Summarise sets WorstRhat and SmallestESS from Params.
func (r *Record) Summarise() {
	worst, least := math.NaN(), math.NaN()
	for _, p := range r.Params {
		if p.Rhat.Valid() && !(float64(p.Rhat) <= worst) {
			worst = float64(p.Rhat)
		}
		for _, e := range []Num{p.BulkESS, p.TailESS} {
			if e.Valid() && !(float64(e) >= least) {
				least = float64(e)
			}
		}
	}
	r.WorstRhat, r.SmallestESS = Num(worst), Num(least)
}

// Writer writes records, one JSON object per line, each line flushed as
// it is written so a reader can follow the file while the run goes on.
type Writer struct {
	w   *bufio.Writer
	c   io.Closer
	err error
}

// NewWriter writes to w.
func NewWriter(w io.Writer) *Writer { return &Writer{w: bufio.NewWriter(w)} }

// Create creates (or truncates) the file at path and writes to it.
func Create(path string) (*Writer, error) {
	f, err := os.Create(path)
	if err != nil {
		return nil, err
	}
	return &Writer{w: bufio.NewWriter(f), c: f}, nil
}

// Write appends one record. After an error every later Write returns it.
func (w *Writer) Write(r *Record) error {
	if w.err != nil {
		return w.err
	}
	b, err := json.Marshal(r)
	if err != nil {
		w.err = fmt.Errorf("history: %w", err)
		return w.err
	}
	if _, err := w.w.Write(append(b, '\n')); err != nil {
		w.err = err
		return err
	}
	w.err = w.w.Flush()
	return w.err
}

// Close flushes and closes the file (if Create opened it) and returns the
// first error met.
func (w *Writer) Close() error {
	if err := w.w.Flush(); w.err == nil {
		w.err = err
	}
	if w.c != nil {
		if err := w.c.Close(); w.err == nil {
			w.err = err
		}
		w.c = nil
	}
	return w.err
}

// Read reads every record. A last line without its newline that does not
// parse is taken as a write cut short and dropped; any other line that
// does not parse is an error naming its line number. Blank lines are
// skipped.
func Read(r io.Reader) ([]Record, error) {
	br := bufio.NewReader(r)
	var out []Record
	for line := 1; ; line++ {
		b, err := br.ReadBytes('\n')
		if err != nil && err != io.EOF {
			return out, err
		}
		complete := err == nil
		if t := bytes.TrimSpace(b); len(t) > 0 {
			var rec Record
			if jerr := json.Unmarshal(t, &rec); jerr != nil {
				if !complete {
					return out, nil
				}
				return out, fmt.Errorf("history: line %d: %v", line, jerr)
			}
			if rec.Kind != KindProgress && rec.Kind != KindFinish {
				return out, fmt.Errorf("history: line %d: kind %q, want %q or %q", line, rec.Kind, KindProgress, KindFinish)
			}
			out = append(out, rec)
		}
		if !complete {
			return out, nil
		}
	}
}

// ReadFile reads the records of the file at path.
func ReadFile(path string) ([]Record, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	return Read(f)
}
