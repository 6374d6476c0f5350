package kernels

import (
	"bytes"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// The kernel against the BAOAB step written out as Leimkuhler and Matthews
// (2013) state it, with a full-step velocity and the gradient evaluated
// twice per step (at the start and at the end of each step):
//
//	v += (h/2)·u·G(x);  x += (h/2)·v;  v = e^{−γh}·v + √(u(1 − e^{−2γh}))·z;
//	x += (h/2)·v;  v += (h/2)·u·G(x)
//
// on a non-Gaussian target (G = −x³ − x per coordinate), with the same
// normals. The kernel's positions must equal the written-out ones, and its
// velocity plus the half kick it owes must equal the full-step velocity,
// both to rounding (relative 1e-12), through a change of step between
// steps (the owed kick keeps the old step).
func TestBAOABMatchesTheWrittenOutSplitting(t *testing.T) {
	const p, chains = 2, 3
	const gamma, u = 1.3, 0.7
	grad := func(x []float64, out []float64) {
		for i, xi := range x {
			out[i] = -xi*xi*xi - xi
		}
	}
	eval := func(req *Request, a *Answer) {
		a.Reserve(req.Need, req.Rows, p)
		grad(req.Points[:req.Rows*p], a.Grad[:req.Rows*p])
	}
	start := []float64{0.4, -1.1, 0.9, 0.2, -0.3, 1.5}
	k := NewBAOAB(p, chains, 0.2, gamma, u, start, []float64{0.1, -0.2}, NewSource(17))
	// The written-out chains.
	x := append([]float64(nil), start...)
	v := []float64{0.1, -0.2, 0.1, -0.2, 0.1, -0.2}
	g := make([]float64, len(x))
	rng := rand.New(NewSource(17))
	a := NewAnswer(chains, p)
	steps := []float64{0.2, 0.2, 0.35, 0.35, 0.05}
	for n, h := range steps {
		if n > 0 && h != steps[n-1] {
			k.SetStep(h)
		}
		e, s := math.Exp(-gamma*h), math.Sqrt(u*(1-math.Exp(-2*gamma*h)))
		grad(x, g)
		for i := range x {
			v[i] += h / 2 * u * g[i]
			x[i] += h / 2 * v[i]
			v[i] = e*v[i] + s*rng.NormFloat64()
			x[i] += h / 2 * v[i]
		}
		grad(x, g)
		for i := range x {
			v[i] += h / 2 * u * g[i]
		}
		eval(k.Next(), a)
		if !k.Tell(a) {
			t.Fatal("a Tell did not complete a step")
		}
		grad(k.Positions(), g)
		for i := range x {
			if !kineticClose(k.Positions()[i], x[i], 1e-12) {
				t.Fatalf("step %d: x[%d] = %.17g, written out %.17g", n, i, k.Positions()[i], x[i])
			}
			if full := k.Velocities()[i] + h/2*u*g[i]; !kineticClose(full, v[i], 1e-12) {
				t.Fatalf("step %d: v[%d] + owed kick = %.17g, written out %.17g", n, i, full, v[i])
			}
		}
	}
}

// baoabMap returns the kernel's linear map on a Gaussian direction of
// precision λ, for the state (x, w) it keeps (w lacks the closing half
// kick; derived here from the step with G = −λx, after the first step):
//
//	x' = (1 − (1 + e)·h²uλ/2)·x + (1 + e)(h/2)·w + (h/2)·s·z
//	w' = −e·h·u·λ·x + e·w + s·z
//
// and its noise covariance.
func baoabMap(lambda, gamma, u, h float64) (m, q [2][2]float64) {
	e, s := math.Exp(-gamma*h), math.Sqrt(u*(1-math.Exp(-2*gamma*h)))
	m = [2][2]float64{{1 - (1+e)*h*h*u*lambda/2, (1 + e) * h / 2}, {-e * h * u * lambda, e}}
	b := [2]float64{h / 2 * s, s}
	q = [2][2]float64{{b[0] * b[0], b[0] * b[1]}, {b[1] * b[0], b[1] * b[1]}}
	return m, q
}

// baoabCases are Gaussian directions with ω·h = √(uλ)·h from 0.55 to 1.8,
// inside the stable range ω·h < 2.
var baoabCases = []struct{ lambda, gamma, u, h float64 }{
	{1, 0.5, 1, 1},
	{4, 1, 0.25, 1.5},
	{2, 2, 1, 0.3},
	{9, 0.2, 1, 0.6},
}

// The stationary variance of the position is exactly 1/λ at every stable
// step (Leimkuhler and Matthews 2013, from memory), by the discrete
// Lyapunov equation of the map above (absolute 1e-9, the iteration's
// convergence).
func TestBAOABGaussianPositionVarianceIsExact(t *testing.T) {
	for _, c := range baoabCases {
		m, q := baoabMap(c.lambda, c.gamma, c.u, c.h)
		s := kineticLyapunov(m, q)
		if math.Abs(s[0][0]-1/c.lambda) > 1e-9 {
			t.Errorf("%+v: stationary Var x = %.12g, want 1/λ = %.12g", c, s[0][0], 1/c.lambda)
		}
	}
}

// The kernel's draws on f = λx²/2 have the stationary covariance of (x, w)
// that the Lyapunov equation gives, every entry within 4 MCSE: Var x = 1/λ
// and the velocity's variance and covariance with x as derived.
func TestBAOABStationaryCovariance(t *testing.T) {
	for n, c := range baoabCases {
		t.Run(fmt.Sprintf("λ=%v,γ=%v,u=%v,h=%v", c.lambda, c.gamma, c.u, c.h), func(t *testing.T) {
			m, q := baoabMap(c.lambda, c.gamma, c.u, c.h)
			want := kineticLyapunov(m, q)
			k := NewBAOAB(1, 16, c.h, c.gamma, c.u, []float64{0}, nil, NewSource(200+uint64(n)))
			d := driveKernel(k, gradEval(kineticDiagGrad([]float64{c.lambda})), 1000, 21000)
			for i := range 2 {
				for j := i; j < 2; j++ {
					est, se := moment(d, i, j, 0, 0)
					if z := (est - want[i][j]) / se; math.Abs(z) > 4 {
						t.Errorf("Σ[%d][%d] = %.5f, derived %.5f, MCSE %.5f (z = %.1f)", i, j, est, want[i][j], se, z)
					}
				}
			}
			if mu, se := seriesMean(d[0]); math.Abs(mu) > 4*se {
				t.Errorf("mean %.5f ± %.5f, want 0", mu, se)
			}
		})
	}
}

// With a dense metric C the position's law on a correlated Gaussian is
// still exact: on y = L⁻¹x the chain is the plain kernel on the Gaussian
// of covariance L⁻¹ΣL⁻ᵀ, exact on each of its eigendirections (derived
// here from the case above). Means and covariances within 4 MCSE; C is not
// Σ, so the directions have different frequencies (ω·h up to about 1).
func TestBAOABMetricGaussianExact(t *testing.T) {
	p := 3
	eval, _ := metricGaussianEval(t, metricMu, metricSigma)
	k := NewBAOAB(p, 16, 0.5, 0.8, 1, metricMu, nil, NewSource(43))
	k.SetMetric(metricDense(t, p, []float64{1.5, 0.2, 0, 0.2, 0.8, 0.1, 0, 0.1, 0.6}))
	d := driveKernel(k, eval, 500, 20500)
	metricCheckMoments(t, d[:p], metricMu, mat.NewDense(p, p, metricSigma))
}

// One gradient per chain per step, the first at the start.
func TestBAOABEvaluationsPerStep(t *testing.T) {
	k := NewBAOAB(3, 5, 0.1, 0, 0, []float64{1, 2, 3}, nil, NewSource(1))
	if k.EvaluationsPerStep() != 5 || k.Friction() != 2 || k.InverseMass() != 1 {
		t.Fatalf("evaluations %d γ %v u %v, want 5, 2, 1", k.EvaluationsPerStep(), k.Friction(), k.InverseMass())
	}
	if x := k.Next().Points; x[0] != 1 || x[14] != 3 || k.Next().Rows != 5 {
		t.Fatalf("first request %v", k.Next())
	}
	_, n := drive(k, gaussEval(3), 0, 7, 1)
	if n.rows != 35 || n.requests != 7 {
		t.Fatalf("rows %d requests %d over 7 steps, want 35 and 7", n.rows, n.requests)
	}
}

// A checkpoint taken mid-run (with a half kick owed) resumes bit for bit;
// corrupt states are refused.
func TestBAOABStateRoundTrip(t *testing.T) {
	grad := gradEval(kineticDiagGrad([]float64{2, 0.5}))
	k := NewBAOAB(2, 3, 0.3, 1.5, 0.8, []float64{1, -1}, []float64{0.3, 0.1}, NewSource(5))
	dm, _ := NewDiagonalMetric([]float64{1, 2})
	k.SetMetric(dm)
	driveKernel(k, grad, 0, 10)
	state, err := k.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	var r BAOAB
	if err := r.UnmarshalBinary(state); err != nil {
		t.Fatal(err)
	}
	if !equalDraws(driveKernel(k, grad, 10, 35), driveKernel(&r, grad, 10, 35)) {
		t.Fatal("resumed draws differ")
	}
	again, _ := r.MarshalBinary()
	now, _ := k.MarshalBinary()
	if !bytes.Equal(again, now) {
		t.Fatal("states differ after identical continuation")
	}
	for _, bad := range [][]byte{state[:40], state[:len(state)-1], []byte("nonsense"),
		editState(t, state, "BAOAB", "h", 1), editState(t, state, "BAOAB", "owed", 1)} {
		if err := r.UnmarshalBinary(bad); err == nil {
			t.Fatalf("corrupt state of %d bytes accepted", len(bad))
		}
	}
}

// A warmed-up step allocates nothing, with and without a metric.
func TestBAOABStepAllocatesNothing(t *testing.T) {
	k := NewBAOAB(10, 8, 0.01, 0, 0, make([]float64, 10), nil, NewSource(1))
	a := NewAnswer(8, 10)
	for _, m := range []*Metric{nil, NewIdentityMetric(10)} {
		k.SetMetric(m)
		k.Tell(a)
		if allocs := testing.AllocsPerRun(100, func() { k.Next(); k.Tell(a) }); allocs != 0 {
			t.Fatalf("%v allocations per step", allocs)
		}
	}
}

func TestBAOABPanicsOnProgrammerErrors(t *testing.T) {
	src := NewSource(1)
	for name, f := range map[string]func(){
		"zero step":       func() { NewBAOAB(1, 1, 0, 0, 0, []float64{0}, nil, src) },
		"negative γ":      func() { NewBAOAB(1, 1, 0.1, -1, 0, []float64{0}, nil, src) },
		"NaN u":           func() { NewBAOAB(1, 1, 0.1, 0, math.NaN(), []float64{0}, nil, src) },
		"no chains":       func() { NewBAOAB(1, 0, 0.1, 0, 0, []float64{0}, nil, src) },
		"bad start":       func() { NewBAOAB(2, 2, 0.1, 0, 0, []float64{0, 0, 0}, nil, src) },
		"short gradients": func() { NewBAOAB(2, 2, 0.1, 0, 0, []float64{0, 0}, nil, src).Tell(&Answer{}) },
		"infinite step":   func() { NewBAOAB(1, 1, 0.1, 0, 0, []float64{0}, nil, src).SetStep(math.Inf(1)) },
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
