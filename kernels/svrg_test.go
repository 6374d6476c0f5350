package kernels

import (
	"fmt"
	"math"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// The project's logistic test vectors through the SVRG kernel, anchor θ̃ = 0.5 and
// θ = 0.9: 36 chains start at 0.5, where the first (full-data) request
// sets their anchors; the first sampling step is answered so that every
// chain lands on 0.9 (to rounding: the answer is chosen from the step's
// known normal), and the second is answered with chain m's two rows
// (θ_m and θ̃_m, same group m) on pair m. Recovering ĝ from that step must
// give the SVRG estimate −0.7919868640 (of ∇f) for S = {x₀, x₃}, mean
// −0.2645247955 and variance 0.1388481137 over the 36 pairs.
func TestSVRGTheoryVectors(t *testing.T) {
	const h, seed = 0.5, 13
	k := NewSVRG(1, 36, h, 10, []float64{0.5}, NewSource(seed))
	xi := randNormals(seed, 72)
	a := NewAnswer(72, 1)
	req := k.Next()
	if !k.Anchoring() || req.Rows != 36 || req.Need != NeedGradient|NeedFullData || req.Group != nil {
		t.Fatalf("first request %+v", req)
	}
	sgldPairOracle(t)(req, a)
	if k.Tell(a) || k.Steps() != 0 || k.Anchoring() {
		t.Fatal("anchor Tell completed a step or left the anchor phase")
	}
	for c, v := range k.Anchors() {
		if v != 0.5 {
			t.Fatalf("anchor %d = %v", c, v)
		}
	}
	// Steer: ĝ = g̃ + a_θ − a_θ̃ with a_θ̃ = 0 and a_θ = (0.4 − √(2h)ξ)/h − g̃.
	req = k.Next()
	if req.Rows != 72 || req.Need != NeedGradient {
		t.Fatalf("sampling request %+v", req)
	}
	gt := sgldLogScore(0.5)
	for c := range 36 {
		a.Grad[c] = (0.4-math.Sqrt(2*h)*xi[c])/h - gt
		a.Grad[36+c] = 0
	}
	k.Tell(a)
	for c, v := range k.Positions() {
		if math.Abs(v-0.9) > 1e-14 {
			t.Fatalf("chain %d steered to %v", c, v)
		}
	}
	before := append([]float64(nil), k.Positions()...)
	req = k.Next()
	for c := range 36 {
		if req.Points[c] != before[c] || req.Points[36+c] != 0.5 || req.Chain[c] != c || req.Chain[36+c] != c ||
			req.Group[c] != c || req.Group[36+c] != c {
			t.Fatalf("rows %d and %d: points %v, %v, chains %d, %d, groups %d, %d", c, 36+c,
				req.Points[c], req.Points[36+c], req.Chain[c], req.Chain[36+c], req.Group[c], req.Group[36+c])
		}
	}
	sgldPairOracle(t)(req, a)
	if !k.Tell(a) || k.Steps() != 2 {
		t.Fatal("second step not completed")
	}
	g := sgldRecover(before, k.Positions(), xi[36:], h)
	sgldCheckPairs(t, g, -0.7919868640, 0.1388481137)
}

// Anchors refresh every τ steps at the current positions, and the
// accounting is exact (by the method's definition): over T steps 2·chains·T minibatch
// rows and chains·⌈T/τ⌉ full-data rows, one full-data request per anchor.
func TestSVRGAnchorsAndEvaluations(t *testing.T) {
	for _, tc := range []struct{ tau, steps int }{{1, 5}, {3, 7}, {3, 9}, {50, 7}} {
		k := NewSVRG(1, 4, 0.1, tc.tau, []float64{0.1, 0.2, 0.3, 0.4}, NewSource(2))
		o := sgldPairOracle(t)
		a := NewAnswer(8, 1)
		anchors, lastAnchor := 0, -1
		for k.Steps() < tc.steps {
			anchoring := k.Anchoring()
			if due := k.Steps()%tc.tau == 0 && lastAnchor != k.Steps(); anchoring != due {
				t.Fatalf("τ=%d: before step %d anchoring %v, want %v", tc.tau, k.Steps(), anchoring, due)
			}
			if anchoring {
				lastAnchor = k.Steps()
			}
			x := append([]float64(nil), k.Positions()...)
			req := k.Next()
			o(req, a)
			done := k.Tell(a)
			if anchoring {
				anchors++
				if done || k.Steps()%tc.tau != 0 {
					t.Fatalf("τ=%d: anchor Tell at step %d returned %v", tc.tau, k.Steps(), done)
				}
				for i, v := range k.Anchors() {
					if v != x[i] {
						t.Fatalf("τ=%d: anchor %d = %v, position was %v", tc.tau, i, v, x[i])
					}
				}
			} else if !done {
				t.Fatalf("τ=%d: sampling Tell did not complete a step", tc.tau)
			}
		}
		k2 := NewSVRG(1, 4, 0.1, tc.tau, []float64{0.1, 0.2, 0.3, 0.4}, NewSource(2))
		_, n := drive(k2, sgldPairOracle(t), 0, tc.steps, 1)
		wantAnchors := (tc.steps + tc.tau - 1) / tc.tau
		if anchors != wantAnchors || n.fullRequests != wantAnchors || n.fullRows != 4*wantAnchors ||
			n.rows != n.fullRows+2*4*tc.steps || k2.EvaluationsPerStep() != 8 || k2.AnchorEvery() != tc.tau {
			t.Fatalf("τ=%d, T=%d: %d anchors (want %d), counts %+v", tc.tau, tc.steps, anchors, wantAnchors, n)
		}
	}
}

// A checkpointed kernel resumes bit for bit from any phase: before the
// first anchor, right after an anchor, mid-cycle (also after Prepare) and
// when the next anchor is due.
func TestSVRGStateRoundTrip(t *testing.T) {
	mk := func() sgldOracle { return sgldPairOracle(t) }
	for _, tc := range []struct {
		tells    int
		prepared bool
	}{{0, false}, {0, true}, {1, false}, {3, true}, {5, false}, {6, false}} {
		t.Run(fmt.Sprintf("tells=%d,prepared=%v", tc.tells, tc.prepared), func(t *testing.T) {
			k := NewSVRG(1, 3, 0.2, 4, []float64{0.1, 0.4, 2}, NewSource(5))
			a := NewAnswer(6, 1)
			o := mk()
			for range tc.tells {
				o(k.Next(), a)
				k.Tell(a)
			}
			if tc.prepared {
				k.Prepare()
			}
			state, err := k.MarshalBinary()
			if err != nil {
				t.Fatal(err)
			}
			var r SVRG
			if err := r.UnmarshalBinary(state); err != nil {
				t.Fatal(err)
			}
			if r.Steps() != k.Steps() || r.Anchoring() != k.Anchoring() || r.AnchorEvery() != 4 || r.Step() != 0.2 {
				t.Fatal("restored header differs")
			}
			sgldSameRun(t, k, &r, mk, 20)
			if err := r.UnmarshalBinary(state[:40]); err == nil {
				t.Fatal("truncated state accepted")
			}
			if err := r.UnmarshalBinary([]byte("nonsense")); err == nil {
				t.Fatal("foreign state accepted")
			}
		})
	}
}

// Diabetes regression (see sgldRegression) with τ = 20: the posterior
// means land within 3 MCSE of μ and the covariance matches the exact
// periodic prediction of sgldPrediction.svrg, averaged over the cycle
// positions of the recorded steps (the law depends on the steps since the
// anchor).
func TestSVRGDiabetesRegression(t *testing.T) {
	const tau = 20
	reg := sgldLoadDiabetes(t)
	pr := sgldNewPrediction(reg, sgldRegStep, sgldRegBatch)
	cycle := pr.svrg(tau)
	want := mat.NewDense(reg.p, reg.p, nil)
	var kept int
	for s := sgldRegBurnIn + 1; s <= sgldRegSteps; s++ {
		if s%sgldRegThin == 0 {
			want.Add(want, cycle[(s-1)%tau]) // s − 1 completed steps before this one, anchor every τ
			kept++
		}
	}
	want.Scale(1/float64(kept), want)
	k := NewSVRG(reg.p, sgldRegChains, sgldRegStep, tau, make([]float64, reg.p), NewSource(41))
	o := sgldNewMinibatch(reg, sgldRegBatch, 42)
	d, n := drive(k, o.answer, sgldRegBurnIn, sgldRegSteps, sgldRegThin)
	anchors := (sgldRegSteps + tau - 1) / tau
	if n.fullRows != sgldRegChains*anchors || n.rows != n.fullRows+2*sgldRegChains*sgldRegSteps {
		t.Fatalf("counts %+v", n)
	}
	ratio := sgldCheckRegression(t, d, reg, want, pr.ula, 3)
	t.Logf("inflation over ULA %.3f; predicted trace from %.6g (1 step after an anchor) to %.6g (%d steps)",
		ratio, mat.Trace(cycle[0]), mat.Trace(cycle[tau-1]), tau)
}

// A warmed-up step allocates nothing, anchor requests included.
func TestSVRGStepAllocatesNothing(t *testing.T) {
	k := NewSVRG(10, 8, 0.01, 3, make([]float64, 10), NewSource(1))
	a := NewAnswer(16, 10)
	if allocs := testing.AllocsPerRun(100, func() { k.Next(); k.Tell(a) }); allocs != 0 {
		t.Fatalf("%v allocations per request", allocs)
	}
	if allocs := testing.AllocsPerRun(100, func() { k.Next(); k.Prepare(); k.Tell(a) }); allocs != 0 {
		t.Fatalf("%v allocations per prepared request", allocs)
	}
}

func TestSVRGPanicsOnProgrammerErrors(t *testing.T) {
	for name, f := range map[string]func(){
		"zero step":  func() { NewSVRG(1, 1, 0, 5, []float64{0}, NewSource(1)) },
		"zero every": func() { NewSVRG(1, 1, 0.1, 0, []float64{0}, NewSource(1)) },
		"bad start":  func() { NewSVRG(2, 2, 0.1, 5, []float64{0, 0, 0}, NewSource(1)) },
		"short anchor answer": func() {
			NewSVRG(2, 2, 0.1, 5, []float64{0, 0}, NewSource(1)).Tell(&Answer{Grad: make([]float64, 3)})
		},
		"short sampling answer": func() {
			k := NewSVRG(2, 2, 0.1, 5, []float64{0, 0}, NewSource(1))
			k.Tell(NewAnswer(2, 2))
			k.Tell(NewAnswer(3, 2))
		},
	} {
		func() {
			defer func() {
				if recover() == nil {
					t.Errorf("%s: no panic", name)
				}
			}()
			f()
		}()
	}
}

// BenchmarkSVRGStep reports the cost of one SVRG step over all chains
// (2·chains rows) with the gradients already supplied, the anchor request
// every τ = 10 steps included.
func BenchmarkSVRGStep(b *testing.B) {
	for _, p := range []int{10, 100, 1000} {
		for _, c := range []int{8, 64} {
			b.Run(fmt.Sprintf("p=%d/chains=%d", p, c), func(b *testing.B) {
				k := NewSVRG(p, c, 0.01, 10, make([]float64, p), NewSource(1))
				sgldBench(b, k, NewAnswer(2*c, p), p, c)
			})
		}
	}
}
