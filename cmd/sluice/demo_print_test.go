package main

import (
	"strings"
	"testing"
)

// The demo calls a bound "guaranteed" only when the server labels it so;
// an estimated bound (curvature estimated, or a metric adapted) starts
// its line with "estimated", and a Stein discrepancy the test cannot tell
// from 0 is printed as that statement, not as a bare number.
func TestDemoWordsFollowTheLabels(t *testing.T) {
	for _, c := range []struct {
		label, ksdState, wantBound, notBound string
		ksd                                  float64
		wantKSD                              string
	}{
		{"estimated, not guaranteed; the metric was adapted", "not distinguishable from 0 at this sample size",
			"estimated:  W2 ≤", "guaranteed:", 0, "Stein discrepancy not distinguishable from 0 at this sample size (upper 95% bound 0.0386)"},
		{"guaranteed under the declared assumptions", "distinguishable from 0: the draws differ from the target",
			"guaranteed: W2 ≤", "estimated:", 0.0418, "Stein discrepancy 0.0418 (upper 95% bound 0.0386: distinguishable"},
	} {
		var b strings.Builder
		r := &demoResult{Accuracy: demoAccuracy{KSD: num(c.ksd), KSDUpper95: 0.0386, KSDState: c.ksdState,
			DeclaredM: 0.25, DeclaredBigM: 100, BoundMetric: "w2", Bound: 94.5, BoundLabel: c.label}}
		printDemo(&b, r)
		out := b.String()
		if !strings.Contains(out, c.wantBound) || strings.Contains(out, c.notBound) {
			t.Errorf("label %q: want %q and no %q in\n%s", c.label, c.wantBound, c.notBound, out)
		}
		if !strings.Contains(out, c.wantKSD) {
			t.Errorf("state %q: want %q in\n%s", c.ksdState, c.wantKSD, out)
		}
	}
}
