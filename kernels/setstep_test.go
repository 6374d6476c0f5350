package kernels

import (
	"fmt"
	"math"
	"slices"
	"testing"
)

// gaussEval answers every request on N(0, diag(1/λ)) with λ_i = 1 + i:
// gradients, log densities and nothing else (exact, so full-data
// requests get the same values).
func gaussEval(p int) func(*Request, *Answer) {
	return func(req *Request, a *Answer) {
		a.Reserve(req.Need, req.Rows, p)
		for r := range req.Rows {
			var ld float64
			for i := range p {
				x := req.Points[r*p+i]
				lam := float64(1 + i)
				a.Grad[r*p+i] = -lam * x
				ld -= lam * x * x / 2
			}
			a.LogDensity[r] = ld
		}
	}
}

// TestSetStepEqualsConstruction checks, for every kernel that gained a
// SetStep, that building it with one step and setting another before the
// first step gives bit for bit the draws of building it with the other
// (the step is the only thing SetStep may change), with and without a
// metric, and that a checkpoint taken after a SetStep resumes exactly.
func TestSetStepEqualsConstruction(t *testing.T) {
	const p, chains, steps = 3, 4, 40
	start := []float64{0.3, -0.2, 0.5}
	diagM, err := NewDiagonalMetric([]float64{1, 0.5, 0.25})
	if err != nil {
		t.Fatal(err)
	}
	type setter interface {
		Kernel
		StepSetter
		MetricUser
	}
	builds := map[string]func(h float64, seed uint64) setter{
		"midpoint": func(h float64, s uint64) setter { return NewMidpoint(p, chains, h, 1, start, nil, NewSource(s)) },
		"midpoint-overdamped": func(h float64, s uint64) setter {
			return NewOverdampedMidpoint(p, chains, h, start, NewSource(s))
		},
		"sgld": func(h float64, s uint64) setter { return NewSGLD(p, chains, h, SGLDSchedule{}, start, NewSource(s)) },
		"sgld-cv": func(h float64, s uint64) setter {
			return NewSGLDCV(p, chains, h, SGLDCVOptions{}, start, NewSource(s))
		},
		"svrg": func(h float64, s uint64) setter { return NewSVRG(p, chains, h, 5, start, NewSource(s)) },
		"mala": func(h float64, s uint64) setter { return NewMALA(p, chains, h, 0, start, NewSource(s)) },
		"baoab": func(h float64, s uint64) setter {
			return NewBAOAB(p, chains, h, 0.7, 0.5, start, nil, NewSource(s))
		},
	}
	eval := gaussEval(p)
	for name, build := range builds {
		for _, m := range []*Metric{nil, diagM} {
			t.Run(fmt.Sprintf("%s/%v", name, m != nil), func(t *testing.T) {
				const h = 0.07
				want := build(h, 9)
				got := build(0.31, 9)
				want.SetMetric(m)
				got.SetMetric(m)
				got.SetStep(h)
				if got.Step() != h {
					t.Fatalf("Step() = %v after SetStep(%v)", got.Step(), h)
				}
				a := driveKernel(want, eval, 0, steps)
				b := driveKernel(got, eval, 0, steps)
				if !equalDraws(a, b) {
					t.Fatalf("SetStep(%v) after construction with 0.31 differs from construction with %v", h, h)
				}
				// A checkpoint after a second SetStep resumes exactly.
				got.SetStep(0.05)
				blob, err := got.(Checkpointer).MarshalBinary()
				if err != nil {
					t.Fatal(err)
				}
				resumed := build(1, 1)
				if err := resumed.(Checkpointer).UnmarshalBinary(blob); err != nil {
					t.Fatal(err)
				}
				a = driveKernel(got, eval, 0, steps+10)
				b = driveKernel(resumed, eval, 0, steps+10)
				if !equalDraws(a, b) {
					t.Fatal("a kernel resumed after SetStep differs from the original")
				}
			})
		}
	}
}

// Midpoint's SetInverseMass equals construction with that inverse mass,
// bit for bit.
func TestMidpointSetInverseMass(t *testing.T) {
	start := []float64{0.3, -0.2, 0.5}
	want := NewMidpoint(3, 2, 0.2, 0.4, start, nil, NewSource(6))
	got := NewMidpoint(3, 2, 0.2, 1, start, nil, NewSource(6))
	got.SetInverseMass(0.4)
	eval := gaussEval(3)
	if !equalDraws(driveKernel(want, eval, 0, 30), driveKernel(got, eval, 0, 30)) {
		t.Fatal("SetInverseMass(0.4) differs from construction with u = 0.4")
	}
}

// TestSetStepMidStep checks that the two-request kernels finish a step
// whose midpoints are out with the step it began with: SetStep between
// the two requests equals SetStep right after the step completes.
func TestSetStepMidStep(t *testing.T) {
	const p, chains = 3, 2
	start := []float64{0.3, -0.2, 0.5}
	eval := gaussEval(p)
	for name, build := range map[string]func() Kernel{
		"midpoint":            func() Kernel { return NewMidpoint(p, chains, 0.2, 1, start, nil, NewSource(4)) },
		"midpoint-overdamped": func() Kernel { return NewOverdampedMidpoint(p, chains, 0.2, start, NewSource(4)) },
	} {
		t.Run(name, func(t *testing.T) {
			early, late := build(), build()
			a := NewAnswer(2*chains, p)
			for _, k := range []Kernel{early, late} {
				eval(k.Next(), a)
				if k.Tell(a) {
					t.Fatal("the first request completed a step")
				}
			}
			early.(StepSetter).SetStep(0.05)
			for _, k := range []Kernel{early, late} {
				eval(k.Next(), a)
				if !k.Tell(a) {
					t.Fatal("the second request did not complete the step")
				}
			}
			late.(StepSetter).SetStep(0.05)
			if !slices.Equal(early.Positions(), late.Positions()) {
				t.Fatal("a step set between the requests changed the step in progress")
			}
			x := driveKernel(early, eval, 0, 20)
			y := driveKernel(late, eval, 0, 20)
			if !equalDraws(x, y) {
				t.Fatal("draws differ after the step took effect")
			}
		})
	}
}

// TestSetStepRejects checks the panics on bad steps.
func TestSetStepRejects(t *testing.T) {
	start := []float64{0}
	for _, k := range []StepSetter{
		NewMidpoint(1, 1, 0.1, 1, start, nil, NewSource(1)),
		NewOverdampedMidpoint(1, 1, 0.1, start, NewSource(1)),
		NewSGLD(1, 1, 0.1, SGLDSchedule{}, start, NewSource(1)),
		NewSGLD(1, 1, 0, SGLDSchedule{A: 1, B: 1, Gamma: 0.6}, start, NewSource(1)),
		NewSGLDCV(1, 1, 0.1, SGLDCVOptions{}, start, NewSource(1)),
		NewSVRG(1, 1, 0.1, 3, start, NewSource(1)),
		NewMALA(1, 1, 0.1, 0, start, NewSource(1)),
		NewBAOAB(1, 1, 0.1, 0, 0, start, nil, NewSource(1)),
	} {
		for _, h := range []float64{0, -1, math.Inf(1), math.NaN()} {
			func() {
				defer func() {
					if recover() == nil {
						t.Errorf("%T.SetStep(%v) did not panic", k, h)
					}
				}()
				k.SetStep(h)
			}()
		}
	}
	func() {
		defer func() {
			if recover() == nil {
				t.Error("SGLD with a schedule took a constant step")
			}
		}()
		NewSGLD(1, 1, 0, SGLDSchedule{A: 1, B: 1, Gamma: 0.6}, start, NewSource(1)).SetStep(0.1)
	}()
}

// equalDraws reports whether two recordings are bit for bit equal.
func equalDraws(a, b [][][]float64) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if len(a[i]) != len(b[i]) {
			return false
		}
		for c := range a[i] {
			if !slices.Equal(a[i][c], b[i][c]) {
				return false
			}
		}
	}
	return true
}

// ApplyFactorT is the adjoint of ApplyFactor: ⟨L·a, b⟩ = ⟨a, Lᵀ·b⟩ for
// every a, b (the definition of the transpose), for each kind of metric.
func TestApplyFactorTIsTheAdjoint(t *testing.T) {
	const p = 4
	dense, err := NewDenseMetric(p, []float64{4, 1, 0.5, 0, 1, 3, 0.2, 0.1, 0.5, 0.2, 2, 0.3, 0, 0.1, 0.3, 1})
	if err != nil {
		t.Fatal(err)
	}
	diagonal, err := NewDiagonalMetric([]float64{4, 3, 2, 1})
	if err != nil {
		t.Fatal(err)
	}
	a, b := []float64{0.3, -1, 2, 0.5}, []float64{1.5, 0.2, -0.7, 1}
	la, ltb := make([]float64, p), make([]float64, p)
	for _, m := range []*Metric{NewIdentityMetric(p), diagonal, dense} {
		m.ApplyFactor(la, a)
		m.ApplyFactorT(ltb, b)
		var x, y float64
		for i := range p {
			x += la[i] * b[i]
			y += a[i] * ltb[i]
		}
		if math.Abs(x-y) > 1e-12*math.Max(1, math.Abs(x)) {
			t.Fatalf("%v: ⟨La, b⟩ = %v, ⟨a, Lᵀb⟩ = %v", m.Kind(), x, y)
		}
	}
}
