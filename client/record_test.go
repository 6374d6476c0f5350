package client

import (
	"math"
	"testing"
	"time"
)

// HistoryRecord and FinishRecord carry a report's figures into the
// history's keys: worst R-hat and least ESS are the extremes of the
// per-parameter figures (max(1.3, 1.1) and min(12, 9, 30), by hand),
// seconds from durations, −1 for unlimited, no Stein record where the
// server had none (KSD −1), and the verdict with its sentences.
func TestHistoryRecord(t *testing.T) {
	p := &Progress{State: Sampling, Steps: 40, EvaluationsUsed: 320, EvaluationsLeft: -1,
		Elapsed: 1500 * time.Millisecond, TimeLeft: -1, DrawsSent: 64, KSD: -1,
		Parameters: []Diagnostics{{Name: "a", Rhat: 1.3, BulkESS: 12, TailESS: 9}, {Name: "b", Rhat: 1.1, BulkESS: math.NaN(), TailESS: 30}},
		Targets:    []TargetStatus{{Name: "max_rhat", Want: 1.01, Current: 1.3, ProjectedEvaluations: -1}},
		Checks:     []Check{{Name: "mixing", Status: CheckWarn, Figure: 1.3, Message: "R-hat is 1.3"}}}
	r := HistoryRecord(p)
	if r.Kind != "progress" || r.Stein != nil {
		t.Errorf("kind %q, Stein discrepancy %+v; want progress and none (the server had none: −1)", r.Kind, r.Stein)
	}
	if r.WorstRhat != 1.3 || r.SmallestESS != 9 || r.ElapsedSeconds != 1.5 || r.SecondsLeft != -1 {
		t.Errorf("worst R-hat %v, least ESS %v, elapsed %v, left %v; want 1.3, 9, 1.5, −1", r.WorstRhat, r.SmallestESS, r.ElapsedSeconds, r.SecondsLeft)
	}
	if len(r.Targets) != 1 || r.Targets[0].Want != 1.01 {
		t.Errorf("targets %+v", r.Targets)
	}
	if len(r.Checks) != 1 || r.Checks[0].Status != "warn" || r.Checks[0].Figure != 1.3 || r.Checks[0].Sentence != "R-hat is 1.3" {
		t.Errorf("checks %+v", r.Checks)
	}
	p.KSD = 0.25
	s := &Summary{Progress: *p, Reason: TargetMet, Message: "met",
		Checks: []Check{{Name: "mixing", Status: CheckPass, Figure: 1.004, Message: "fine"}}}
	f := FinishRecord(s)
	if f.Kind != "finish" || f.Stein == nil || f.Stein.Value != 0.25 || f.Reason != "target met" || f.Message != "met" {
		t.Errorf("finish record %+v", f)
	}
	// The finish record's verdict is the summary's, not the last report's.
	if len(f.Checks) != 1 || f.Checks[0].Status != "pass" || f.Checks[0].Sentence != "fine" {
		t.Errorf("finish record's checks %+v, want the summary's", f.Checks)
	}
}
