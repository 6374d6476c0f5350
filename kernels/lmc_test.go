package kernels_test

import (
	"bytes"
	"fmt"
	"math"
	"testing"

	"sluice/kernels"
)

// gaussGrad returns ∇log π for π = N(0, Q⁻¹) with a dense precision q
// (row-major p×p), applied row by row.
func gaussGrad(q []float64, p int) func(points []float64, rows int, grad []float64) {
	return func(points []float64, rows int, grad []float64) {
		for r := range rows {
			x, g := points[r*p:(r+1)*p], grad[r*p:(r+1)*p]
			for i := range p {
				var s float64
				for j := range p {
					s += q[i*p+j] * x[j]
				}
				g[i] = -s
			}
		}
	}
}

// ULA on N(0, σ²) has the exact stationary variance σ²/(1 − h/(2σ²))
// (derived here: solve v = (1 − h/σ²)²v + 2h). The draws'
// second moment must match it within 4 MCSE, and for the larger steps it
// must be distinguishable from σ² (more than 4 MCSE away).
func TestLMCStationaryVariance1D(t *testing.T) {
	cases := []struct {
		sigma2, h, want float64
		biased          bool // bias larger than 4 MCSE expected
	}{
		{1, 0.1, 1.0526315789473684, true}, // derived values
		{2, 0.5, 2.2857142857142856, true},
		{0.25, 0.1, 0.3125, true},
		{1, 0.01, 1 / (1 - 0.005), false},
	}
	for _, tc := range cases {
		t.Run(fmt.Sprintf("s2=%v,h=%v", tc.sigma2, tc.h), func(t *testing.T) {
			k := kernels.NewLMC(1, 16, tc.h, []float64{0}, kernels.NewSource(42))
			d := kernels.DriveKernel(k, kernels.GradEval(gaussGrad([]float64{1 / tc.sigma2}, 1)), 2000, 22000)
			est, se := kernels.Moment(d, 0, 0, 0, 0)
			if z := (est - tc.want) / se; math.Abs(z) > 4 {
				t.Errorf("variance %.5f, exact %.5f, MCSE %.5f (z = %.1f)", est, tc.want, se, z)
			}
			if z := (est - tc.sigma2) / se; tc.biased && math.Abs(z) < 4 {
				t.Errorf("variance %.5f not distinguishable from σ² = %v (MCSE %.5f)", est, tc.sigma2, se)
			}
		})
	}
}

// Derived here (discrete Lyapunov equation): Q = [[2, .5], [.5, 1]], h = 0.2 gives the stationary
// covariance Σ_h = [Q(I − hQ/2)]⁻¹ = [[0.6968641115, −0.2787456446],
// [−0.2787456446, 1.2543554007]]; every entry within 4 MCSE.
func TestLMCStationaryCovariance2D(t *testing.T) {
	q := []float64{2, .5, .5, 1}
	want := [2][2]float64{{0.6968641115, -0.2787456446}, {-0.2787456446, 1.2543554007}}
	k := kernels.NewLMC(2, 16, 0.2, []float64{0, 0}, kernels.NewSource(3))
	d := kernels.DriveKernel(k, kernels.GradEval(gaussGrad(q, 2)), 1000, 21000)
	for i := range 2 {
		for j := i; j < 2; j++ {
			est, se := kernels.Moment(d, i, j, 0, 0)
			if z := (est - want[i][j]) / se; math.Abs(z) > 4 {
				t.Errorf("Σ[%d][%d] = %.5f, exact %.5f, MCSE %.5f (z = %.1f)", i, j, est, want[i][j], se, z)
			}
		}
	}
	// The target's own covariance Q⁻¹[0][0] = 0.5714 is far from Σ_h[0][0]:
	// the test can tell the discretisation bias apart.
	if est, se := kernels.Moment(d, 0, 0, 0, 0); math.Abs(est-0.5714285714) < 4*se {
		t.Errorf("Σ[0][0] = %.5f indistinguishable from Q⁻¹ (MCSE %.5f)", est, se)
	}
}

// One exact update by hand: θ' = θ + h·g + √(2h)·ξ with ξ from the same
// stream (the package conventions, doc.go).
func TestLMCUpdateByHand(t *testing.T) {
	k := kernels.NewLMC(2, 2, 0.1, []float64{1, 2, 3, 4}, kernels.NewSource(9))
	ref := kernels.RandNormals(9, 4)
	a := &kernels.Answer{Grad: []float64{-1, 0.5, 2, -3}}
	req := k.Next()
	if req.Rows != 2 || req.Need != kernels.NeedGradient || len(req.Points) != 4 {
		t.Fatalf("request %+v", req)
	}
	k.Tell(a)
	x := k.Positions()
	start := []float64{1, 2, 3, 4}
	for i := range x {
		want := start[i] + (0.1*a.Grad[i] + math.Sqrt(2*0.1)*ref[i])
		if x[i] != want {
			t.Fatalf("x[%d] = %v, want %v", i, x[i], want)
		}
	}
}

// Evaluation accounting: one gradient per chain per step (by the method's definition).
func TestLMCEvaluationsPerStep(t *testing.T) {
	k := kernels.NewLMC(3, 5, 0.1, make([]float64, 3), kernels.NewSource(1))
	if k.EvaluationsPerStep() != 5 {
		t.Fatalf("evaluations per step %d, want 5", k.EvaluationsPerStep())
	}
	a := kernels.NewAnswer(5, 3)
	var rows int
	for range 7 {
		rows += k.Next().Rows
		k.Tell(a)
	}
	if rows != 35 || k.Steps() != 7 {
		t.Fatalf("rows %d steps %d, want 35 and 7", rows, k.Steps())
	}
}

// A checkpointed kernel resumes bit for bit.
func TestLMCStateRoundTrip(t *testing.T) {
	grad := gaussGrad([]float64{2, .5, .5, 1}, 2)
	k := kernels.NewLMC(2, 3, 0.05, []float64{1, -1}, kernels.NewSource(5))
	kernels.DriveKernel(k, kernels.GradEval(grad), 0, 10)
	state, err := k.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	var r kernels.LMC
	if err := r.UnmarshalBinary(state); err != nil {
		t.Fatal(err)
	}
	if r.Steps() != 10 || r.Dim() != 2 || r.Chains() != 3 || r.Step() != 0.05 {
		t.Fatalf("restored header wrong: steps %d dim %d chains %d h %v", r.Steps(), r.Dim(), r.Chains(), r.Step())
	}
	a := kernels.DriveKernel(k, kernels.GradEval(grad), 0, 25)
	b := kernels.DriveKernel(&r, kernels.GradEval(grad), 0, 25)
	for i := range a {
		for c := range a[i] {
			for s := range a[i][c] {
				if a[i][c][s] != b[i][c][s] {
					t.Fatalf("resumed draw differs at coord %d chain %d step %d", i, c, s)
				}
			}
		}
	}
	again, _ := r.MarshalBinary()
	now, _ := k.MarshalBinary()
	if !bytes.Equal(again, now) {
		t.Fatal("states differ after identical continuation")
	}
	if err := r.UnmarshalBinary(state[:20]); err == nil {
		t.Fatal("truncated state accepted")
	}
	if err := r.UnmarshalBinary([]byte("nonsense")); err == nil {
		t.Fatal("foreign state accepted")
	}
}

// A warmed-up step allocates nothing.
func TestLMCStepAllocatesNothing(t *testing.T) {
	k := kernels.NewLMC(10, 8, 0.01, make([]float64, 10), kernels.NewSource(1))
	a := kernels.NewAnswer(8, 10)
	allocs := testing.AllocsPerRun(100, func() {
		k.Next()
		k.Tell(a)
	})
	if allocs != 0 {
		t.Fatalf("%v allocations per step", allocs)
	}
}

func TestLMCPanicsOnProgrammerErrors(t *testing.T) {
	for name, f := range map[string]func(){
		"zero step":   func() { kernels.NewLMC(1, 1, 0, []float64{0}, kernels.NewSource(1)) },
		"bad start":   func() { kernels.NewLMC(2, 2, 0.1, []float64{0, 0, 0}, kernels.NewSource(1)) },
		"short grads": func() { kernels.NewLMC(2, 2, 0.1, []float64{0, 0}, kernels.NewSource(1)).Tell(&kernels.Answer{}) },
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

// BenchmarkStep reports the cost of one LMC step over all chains with the
// gradient already supplied; ns/coord is per chain-coordinate.
func BenchmarkStep(b *testing.B) {
	for _, p := range []int{10, 100, 1000} {
		for _, c := range []int{8, 64} {
			b.Run(fmt.Sprintf("lmc/p=%d/chains=%d", p, c), func(b *testing.B) {
				k := kernels.NewLMC(p, c, 0.01, make([]float64, p), kernels.NewSource(1))
				a := kernels.NewAnswer(c, p)
				b.ReportAllocs()
				for b.Loop() {
					k.Next()
					k.Tell(a)
				}
				b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(p*c), "ns/coord")
			})
		}
	}
}

// Drawing the noise ahead (Prepare) changes nothing: same draws, and a
// state marshalled after Prepare resumes exactly.
func TestLMCPrepareIsInvisible(t *testing.T) {
	grad := gaussGrad([]float64{2, .5, .5, 1}, 2)
	plain := kernels.NewLMC(2, 3, 0.05, []float64{1, -1}, kernels.NewSource(5))
	ahead := kernels.NewLMC(2, 3, 0.05, []float64{1, -1}, kernels.NewSource(5))
	a := kernels.NewAnswer(3, 2)
	var state []byte
	for step := range 40 {
		grad(plain.Next().Points, 3, a.Grad)
		plain.Tell(a)
		grad(ahead.Next().Points, 3, a.Grad)
		ahead.Prepare()
		if step == 20 {
			state, _ = ahead.MarshalBinary()
		}
		ahead.Tell(a)
		for i, v := range plain.Positions() {
			if ahead.Positions()[i] != v {
				t.Fatalf("step %d: prepared kernel differs", step)
			}
		}
	}
	var r kernels.LMC
	if err := r.UnmarshalBinary(state); err != nil {
		t.Fatal(err)
	}
	// r is at step 20, before that step's Tell: replay from there.
	ref := kernels.NewLMC(2, 3, 0.05, []float64{1, -1}, kernels.NewSource(5))
	for range 20 {
		grad(ref.Next().Points, 3, a.Grad)
		ref.Tell(a)
	}
	for range 10 {
		grad(ref.Next().Points, 3, a.Grad)
		ref.Tell(a)
		grad(r.Next().Points, 3, a.Grad)
		r.Tell(a)
	}
	for i, v := range ref.Positions() {
		if r.Positions()[i] != v {
			t.Fatal("state marshalled after Prepare does not resume exactly")
		}
	}
	allocs := testing.AllocsPerRun(100, func() { ahead.Next(); ahead.Prepare(); ahead.Tell(a) })
	if allocs != 0 {
		t.Fatalf("%v allocations per prepared step", allocs)
	}
}

// A corrupt state claiming a huge dimension is refused, not allocated.
func TestLMCStateHugeDimensionRefused(t *testing.T) {
	k := kernels.NewLMC(1, 1, 0.1, []float64{0}, kernels.NewSource(1))
	b, _ := k.MarshalBinary()
	head := len("sluice.lmc.v1")
	for i := range 8 {
		b[head+i], b[head+8+i] = 0, 0
	}
	b[head+4], b[head+8+4] = 1, 1 // dim = chains = 2³²
	var r kernels.LMC
	if err := r.UnmarshalBinary(b); err == nil {
		t.Fatal("state with dim = chains = 2³² accepted")
	}
}
