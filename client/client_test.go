package client

import (
	"math"
	"testing"
	"time"

	sluicev1 "sluice/proto/sluice/v1"
)

// Arrays cross the wire as little-endian float64 bytes (the wire API's
// array convention): 1.0 is 0x3FF0000000000000, stored low byte first.
func TestFloatsLayout(t *testing.T) {
	b := putFloats(nil, []float64{1, -2.5, math.Inf(1)})
	if len(b) != 24 || b[7] != 0x3F || b[6] != 0xF0 || b[0] != 0 {
		t.Fatalf("1.0 encoded as % x", b[:8])
	}
	got := getFloats(nil, b)
	if len(got) != 3 || got[0] != 1 || got[1] != -2.5 || !math.IsInf(got[2], 1) {
		t.Fatalf("round trip %v", got)
	}
}

// One start row is shared; chains × dim values give one row per chain.
func TestRegisterFrameStartRows(t *testing.T) {
	shared := registerFrame(Spec{Dim: 2, Chains: 3, Start: []float64{1, 2}, Step: 0.1}, 4<<20).GetRegister()
	perChain := registerFrame(Spec{Dim: 2, Chains: 3, Start: make([]float64, 6), Step: 0.1}, 4<<20).GetRegister()
	if shared.StartRows != 1 || perChain.StartRows != 3 || len(perChain.Start) != 48 || shared.MaxMessageBytes != 4<<20 {
		t.Fatalf("start rows %d and %d, %d bytes", shared.StartRows, perChain.StartRows, len(perChain.Start))
	}
	w := registerFrame(Spec{Dim: 1, Chains: 1, Start: []float64{0}, Wants: Wants{Eps: 0.1, Metric: W2},
		Noise: &Noise{Replicates: 2}}, 0).GetRegister()
	if w.Wants.Metric != sluicev1.Metric_METRIC_W2 || w.Noise.Kind != sluicev1.GradientKind_GRADIENT_KIND_STOCHASTIC || w.Noise.Replicates != 2 {
		t.Fatalf("wants %+v noise %+v", w.Wants, w.Noise)
	}
	if registerFrame(Spec{Dim: 1, Chains: 1, Start: []float64{0}}, 0).GetRegister().Wants != nil {
		t.Fatal("empty wants sent")
	}
}

// −1 on the wire means "no limit" and stays −1; seconds become durations.
func TestProgressFromWire(t *testing.T) {
	p := progressFromWire(&sluicev1.Progress{State: sluicev1.State_STATE_SAMPLING, SecondsUsed: 1.5, SecondsLeft: -1,
		EvaluationsLeft: -1, Bound: &sluicev1.Bound{Source: sluicev1.BoundSource_BOUND_SOURCE_DECLARED, Metric: sluicev1.Metric_METRIC_TV, Value: 0.1}})
	if p.State != Sampling || p.Elapsed != 1500*time.Millisecond || p.TimeLeft != -1 || p.EvaluationsLeft != -1 {
		t.Fatalf("progress %+v", p)
	}
	if p.Bound == nil || !p.Bound.Guaranteed || p.Bound.Metric != TV {
		t.Fatalf("bound %+v", p.Bound)
	}
	for w, r := range reasonFromWire {
		if r == "" || w == sluicev1.FinishReason_FINISH_REASON_UNSPECIFIED {
			t.Fatalf("reason table entry %v → %q", w, r)
		}
	}
	if len(reasonFromWire) != len(sluicev1.FinishReason_name)-1 {
		t.Fatalf("%d reasons mapped, the wire has %d", len(reasonFromWire), len(sluicev1.FinishReason_name)-1)
	}
}
