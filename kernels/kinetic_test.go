package kernels

import (
	"bytes"
	"fmt"
	"math"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// kineticDiagGrad returns ∇log π for π = N(0, diag(1/λ)), row by row.
func kineticDiagGrad(lambda []float64) func(points []float64, rows int, grad []float64) {
	p := len(lambda)
	return func(points []float64, rows int, grad []float64) {
		for i := range rows * p {
			grad[i] = -lambda[i%p] * points[i]
		}
	}
}

// kineticClose reports whether got is within rel·|want| (or rel when want
// is zero) of want.
func kineticClose(got, want, rel float64) bool {
	return math.Abs(got-want) <= rel*math.Max(math.Abs(want), 1e-300) || got == want
}

// Test vector for the step of Cheng, Chatterji, Bartlett and Jordan
// (2018), computed for the project by matrix exponential and by quadrature: x = 1, v = 0.5, ∇f = 2 (so ∇log π = −2), h = 0.1, γ = 2,
// u = 0.25. Tolerance: relative 1e-9, the project's for closed forms.
func TestKineticCoefficientsTheoryVector(t *testing.T) {
	c := newKineticCoef(2, 0.25, 0.1)
	x, v, g := 1.0, 0.5, -2.0
	meanX := x + c.c*v + c.ax*g
	meanV := c.e*v + c.av*g
	for _, tc := range []struct {
		name      string
		got, want float64
	}{
		{"mean_x", meanX, 1.0429759675957568},
		{"mean_v", meanV, 0.3640480648084864},
		{"Var_x", c.varX, 2.876853922680056e-04},
		{"Cov_xv", c.cov, 4.107317484959447e-03},
		{"Var_v", c.varV, 0.0824199884910902},
		{"L11", c.l11, 0.01696129099650158},
		{"L21", c.l21, 0.2421583053911768},
		{"L22", c.l22, 0.15420552396449275},
		{"x' at z = (0.3, −0.7)", meanX + c.l11*0.3, 1.0480643548947073},
		{"v' at z = (0.3, −0.7)", meanV + c.l21*0.3 + c.l22*(-0.7), 0.32875168965069457},
	} {
		if !kineticClose(tc.got, tc.want, 1e-9) {
			t.Errorf("%s = %.17g, the closed form gives %.17g", tc.name, tc.got, tc.want)
		}
	}
}

// kineticVanLoan returns Σ_h = ∫₀ʰ e^{sA} q e^{sAᵀ} ds for 2×2 A and q by
// Van Loan's block exponential (Van Loan, IEEE TAC 23 (1978) 395–404):
// exp(h·[[−A, q], [0, Aᵀ]]) = [[·, F12], [0, F22]] and Σ_h = F22ᵀF12. The
// exponential is gonum's.
func kineticVanLoan(a, q [2][2]float64, h float64) [2][2]float64 {
	blk := mat.NewDense(4, 4, nil)
	for i := range 2 {
		for j := range 2 {
			blk.Set(i, j, -a[i][j]*h)
			blk.Set(i, 2+j, q[i][j]*h)
			blk.Set(2+i, 2+j, a[j][i]*h)
		}
	}
	var f mat.Dense
	f.Exp(blk)
	var s mat.Dense
	s.Mul(f.Slice(2, 4, 2, 4).T(), f.Slice(0, 2, 2, 4))
	return [2][2]float64{{s.At(0, 0), s.At(0, 1)}, {s.At(1, 0), s.At(1, 1)}}
}

// The covariance helper against an exact computation outside it. First the
// Van Loan reference is itself checked on the exact kinetic Gaussian step (derived here, Van Loan's method) (the exact
// kinetic step on f = λx²/2, values to 10 decimals, so absolute 1e-9).
// Then, with λ = 0, the frozen-gradient step of Cheng et al. (2018) is the exact kinetic
// transition under the constant force u·G, so its noise covariance is
// Σ_h of A = [[0, 1], [0, −γ]], q = diag(0, 2γu), its linear part e^{hA} =
// [[1, (1 − e^{−γh})/γ], [0, e^{−γh}]] and its drift ∫₀ʰ e^{sA}ds·(0, u)ᵀ
// (top right of exp(h·[[A, b], [0, 0]]), gonum). Both branches of the
// helper (series below γh = 1/8, direct above) are covered. Tolerance
// relative 1e-11: both sides are double-precision evaluations of the same
// closed form (gonum's Padé exponential errs by ~1e-13 at ‖hA‖ ≤ 10).
func TestKineticCoefficientsMatchMatrixExponential(t *testing.T) {
	for _, tc := range []struct {
		gamma, lambda, u, h float64
		want                [2][2]float64
	}{
		{2, 1, 1, 0.1, [2][2]float64{{0.0011484812, 0.0163746151}, {0.0163746151, 0.3286407825}}},
		{2, 1, 1, 0.5, [2][2]float64{{0.0803013971, 0.1839397206}, {0.1839397206, 0.8160602794}}},
		{2, 4, 0.25, 0.1, [2][2]float64{{0.0002871203, 0.0040936538}, {0.0040936538, 0.0821601956}}},
	} {
		a := [2][2]float64{{0, 1}, {-tc.u * tc.lambda, -tc.gamma}}
		q := [2][2]float64{{0, 0}, {0, 2 * tc.gamma * tc.u}}
		got := kineticVanLoan(a, q, tc.h)
		for i := range 2 {
			for j := range 2 {
				if math.Abs(got[i][j]-tc.want[i][j]) > 1e-9 {
					t.Errorf("reference Σ_h[%d][%d] = %.10f, the exact kinetic Gaussian step (derived here, Van Loan's method) gives %.10f", i, j, got[i][j], tc.want[i][j])
				}
			}
		}
	}
	for _, tc := range []struct{ gamma, u, h float64 }{
		{2, 0.25, 0.1}, {2, 1, 1e-5}, {2, 1, 1e-3}, {0.5, 3, 0.01}, {2, 1, 0.0624}, {2, 1, 0.0626}, {2, 1, 0.5},
		{10, 1, 0.7}, {1, 2, 5}, {2, 0.25, 0.4},
	} {
		t.Run(fmt.Sprintf("γ=%v,u=%v,h=%v", tc.gamma, tc.u, tc.h), func(t *testing.T) {
			c := newKineticCoef(tc.gamma, tc.u, tc.h)
			a := [2][2]float64{{0, 1}, {0, -tc.gamma}}
			q := [2][2]float64{{0, 0}, {0, 2 * tc.gamma * tc.u}}
			s := kineticVanLoan(a, q, tc.h)
			aug := mat.NewDense(3, 3, []float64{0, tc.h, 0, 0, -tc.gamma * tc.h, tc.u * tc.h, 0, 0, 0})
			var f mat.Dense
			f.Exp(aug)
			for _, e := range []struct {
				name      string
				got, want float64
			}{
				{"Var x", c.varX, s[0][0]}, {"Cov", c.cov, s[0][1]}, {"Var v", c.varV, s[1][1]},
				{"x←v", c.c, f.At(0, 1)}, {"v←v", c.e, f.At(1, 1)},
				{"x←G", c.ax, f.At(0, 2)}, {"v←G", c.av, f.At(1, 2)},
				{"L·Lᵀ[0][0]", c.l11 * c.l11, s[0][0]},
				{"L·Lᵀ[1][0]", c.l21 * c.l11, s[1][0]},
				{"L·Lᵀ[1][1]", c.l21*c.l21 + c.l22*c.l22, s[1][1]},
			} {
				if !kineticClose(e.got, e.want, 1e-11) {
					t.Errorf("%s = %.15g, matrix exponential gives %.15g", e.name, e.got, e.want)
				}
			}
		})
	}
	if c := newKineticCoef(2, 1, 0); c.e != 1 || c.c != 0 || c.varX != 0 || c.l22 != 0 {
		t.Errorf("zero duration is not the identity: %+v", c)
	}
}

// One step by hand through the kernel, with the Cheng et al. (2018) vector's coefficients
// and the normals the kernel's stream gives (Cheng et al. 2018).
func TestKineticStepTheoryVector(t *testing.T) {
	k := NewKinetic(1, 1, 0.1, 2, 0.25, []float64{1}, []float64{0.5}, NewSource(7))
	z := randNormals(7, 2)
	k.Tell(&Answer{Grad: []float64{-2}})
	wantX := 1.0429759675957568 + 0.01696129099650158*z[0]
	wantV := 0.3640480648084864 + 0.2421583053911768*z[0] + 0.15420552396449275*z[1]
	if x, v := k.Positions()[0], k.Velocities()[0]; !kineticClose(x, wantX, 1e-9) || !kineticClose(v, wantV, 1e-9) {
		t.Fatalf("(x', v') = (%.17g, %.17g), the closed form gives (%.17g, %.17g) at z = %v", x, v, wantX, wantV, z)
	}
}

// Draw order and layout: chain by chain, coordinate by coordinate, z1 then
// z2, every chain using its own row of gradients (the update of Cheng et al. 2018).
func TestKineticStepByHand(t *testing.T) {
	const p, chains = 3, 2
	x0 := []float64{1, -2, 0.5, 3, 0, -1}
	v0 := []float64{0.1, 0.2, -0.3, 0, 1, -1}
	g := []float64{-1, 0.5, 2, -3, 0.25, 1}
	k := NewKinetic(p, chains, 0.2, 1.5, 0.7, x0, v0, NewSource(11))
	req := k.Next()
	if req.Rows != chains || req.Need != NeedGradient || len(req.Points) != p*chains || req.Chain[1] != 1 {
		t.Fatalf("request %+v", req)
	}
	for i := range x0 {
		if req.Points[i] != x0[i] {
			t.Fatalf("requested point %v, want start %v", req.Points, x0)
		}
	}
	if !k.Tell(&Answer{Grad: g}) || k.Steps() != 1 {
		t.Fatalf("one Tell did not complete a step")
	}
	z := randNormals(11, 2*p*chains)
	c := newKineticCoef(1.5, 0.7, 0.2)
	for i := range x0 {
		wantX := x0[i] + c.c*v0[i] + c.ax*g[i] + c.l11*z[2*i]
		wantV := c.e*v0[i] + c.av*g[i] + c.l21*z[2*i] + c.l22*z[2*i+1]
		if !kineticClose(k.Positions()[i], wantX, 1e-14) || !kineticClose(k.Velocities()[i], wantV, 1e-14) {
			t.Fatalf("coordinate %d: (%v, %v), want (%v, %v)", i, k.Positions()[i], k.Velocities()[i], wantX, wantV)
		}
	}
}

// kineticLyapunov returns the stationary covariance of z' = Mz + noise with
// noise covariance q, iterating Σ ← MΣMᵀ + q (M is stable in every use).
func kineticLyapunov(m, q [2][2]float64) [2][2]float64 {
	var s [2][2]float64
	for range 20000 {
		var n [2][2]float64
		for i := range 2 {
			for j := range 2 {
				n[i][j] = q[i][j]
				for a := range 2 {
					for b := range 2 {
						n[i][j] += m[i][a] * s[a][b] * m[j][b]
					}
				}
			}
		}
		s = n
	}
	return s
}

// kineticStationaryCases are the stationary covariances (derived here) of
// (x, v) for the frozen-gradient scheme (γ = 2) on f = λx²/2.
var kineticStationaryCases = []struct {
	lambda, u, h float64
	want         [2][2]float64
	biased       bool // the bias against diag(1/λ, u) exceeds 4 MCSE at this run length
}{
	{1, 1, 0.1, [2][2]float64{{1.0256192144, 4.2532e-05}, {4.2532e-05, 1.0255362061}}, false},
	{1, 1, 0.5, [2][2]float64{{1.1398065487, 0.0053385398}, {0.0053385398, 1.1302452860}}, true},
	{4, 0.25, 0.1, [2][2]float64{{0.2564048036, 1.0633e-05}, {1.0633e-05, 0.2563840515}}, false},
}

// The scheme is linear on a Gaussian: z' = Mz + L·ξ with
// M = [[1 − λ·ax, c], [−λ·av, e]]. Its discrete Lyapunov solution must be
// the one derived here, to the 10 decimals given (absolute
// 1e-9; the off-diagonal entries are given to 5 significant digits, so
// relative 1e-4 there).
func TestKineticStationaryCovarianceLyapunov(t *testing.T) {
	for _, tc := range kineticStationaryCases {
		c := newKineticCoef(2, tc.u, tc.h)
		m := [2][2]float64{{1 - tc.lambda*c.ax, c.c}, {-tc.lambda * c.av, c.e}}
		s := kineticLyapunov(m, [2][2]float64{{c.varX, c.cov}, {c.cov, c.varV}})
		for i := range 2 {
			for j := range 2 {
				tol := 1e-9
				if i != j {
					tol = 1e-4 * math.Abs(tc.want[i][j])
				}
				if math.Abs(s[i][j]-tc.want[i][j]) > tol {
					t.Errorf("λ=%v u=%v h=%v: Σ[%d][%d] = %.10g, derived value %.10g",
						tc.lambda, tc.u, tc.h, i, j, s[i][j], tc.want[i][j])
				}
			}
		}
	}
}

// The kernel's draws on f = λx²/2 have the derived stationary
// covariance of (x, v): every entry within 4 MCSE. For h = 0.5 the bias
// must also be visible: Var x and Var v more than 4 MCSE from the target's
// 1/λ and u.
func TestKineticStationaryCovariance(t *testing.T) {
	for n, tc := range kineticStationaryCases {
		t.Run(fmt.Sprintf("λ=%v,u=%v,h=%v", tc.lambda, tc.u, tc.h), func(t *testing.T) {
			k := NewKinetic(1, 16, tc.h, 2, tc.u, []float64{0}, nil, NewSource(100+uint64(n)))
			d := driveKernel(k, gradEval(kineticDiagGrad([]float64{tc.lambda})), 1000, 21000)
			target := [2]float64{1 / tc.lambda, tc.u}
			for i := range 2 {
				for j := i; j < 2; j++ {
					est, se := moment(d, i, j, 0, 0)
					t.Logf("Σ[%d][%d] = %.5f ± %.5f (derived: %.5f)", i, j, est, se, tc.want[i][j])
					if z := (est - tc.want[i][j]) / se; math.Abs(z) > 4 {
						t.Errorf("Σ[%d][%d] = %.5f, derived %.5f, MCSE %.5f (z = %.1f)", i, j, est, tc.want[i][j], se, z)
					}
					if i == j && tc.biased {
						if z := (est - target[i]) / se; math.Abs(z) < 4 {
							t.Errorf("Σ[%d][%d] = %.5f not distinguishable from the target's %v (MCSE %.5f)", i, i, est, target[i], se)
						}
					}
				}
			}
		})
	}
}

// Evaluation accounting: one gradient per chain per step (by the method's definition,
// KLMC row).
func TestKineticEvaluationsPerStep(t *testing.T) {
	k := NewKinetic(3, 5, 0.1, 0, 0, make([]float64, 3), nil, NewSource(1))
	if k.EvaluationsPerStep() != 5 {
		t.Fatalf("evaluations per step %d, want 5", k.EvaluationsPerStep())
	}
	a := NewAnswer(5, 3)
	var rows, tells int
	for range 7 {
		rows += k.Next().Rows
		tells++
		if !k.Tell(a) {
			t.Fatal("a Tell did not complete a step")
		}
	}
	if rows != 35 || k.Steps() != 7 || rows != k.Steps()*k.EvaluationsPerStep() {
		t.Fatalf("rows %d steps %d, want 35 and 7", rows, k.Steps())
	}
}

// The zero values of friction and inverse mass mean γ = 2 and u = 1, and a
// nil velocity means rest.
func TestKineticDefaults(t *testing.T) {
	k := NewKinetic(2, 3, 0.1, 0, 0, []float64{1, 2}, nil, NewSource(1))
	if k.Friction() != 2 || k.InverseMass() != 1 || k.Step() != 0.1 {
		t.Fatalf("γ %v u %v h %v, want 2, 1, 0.1", k.Friction(), k.InverseMass(), k.Step())
	}
	for _, v := range k.Velocities() {
		if v != 0 {
			t.Fatalf("start velocities %v, want zeros", k.Velocities())
		}
	}
	if x := k.Positions(); len(x) != 6 || x[4] != 1 || x[5] != 2 {
		t.Fatalf("broadcast start %v", x)
	}
}

// A checkpointed kernel resumes bit for bit, velocities included.
func TestKineticStateRoundTrip(t *testing.T) {
	grad := kineticDiagGrad([]float64{2, 0.5})
	k := NewKinetic(2, 3, 0.05, 1.5, 0.8, []float64{1, -1}, []float64{0.3, 0.1}, NewSource(5))
	driveKernel(k, gradEval(grad), 0, 10)
	state, err := k.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	var r Kinetic
	if err := r.UnmarshalBinary(state); err != nil {
		t.Fatal(err)
	}
	if r.Steps() != 10 || r.Dim() != 2 || r.Chains() != 3 || r.Step() != 0.05 || r.Friction() != 1.5 || r.InverseMass() != 0.8 {
		t.Fatalf("restored header wrong: steps %d dim %d chains %d h %v γ %v u %v",
			r.Steps(), r.Dim(), r.Chains(), r.Step(), r.Friction(), r.InverseMass())
	}
	a := driveKernel(k, gradEval(grad), 10, 35)
	b := driveKernel(&r, gradEval(grad), 10, 35)
	for i := range a {
		for c := range a[i] {
			for s := range a[i][c] {
				if math.Float64bits(a[i][c][s]) != math.Float64bits(b[i][c][s]) {
					t.Fatalf("resumed draw differs at coord %d chain %d step %d", i, c, s)
				}
			}
		}
	}
	if len(a[3][2]) != 25 {
		t.Fatalf("continuation recorded %d draws, want 25", len(a[3][2]))
	}
	again, _ := r.MarshalBinary()
	now, _ := k.MarshalBinary()
	if !bytes.Equal(again, now) {
		t.Fatal("states differ after identical continuation")
	}
	for _, bad := range [][]byte{state[:40], state[:len(state)-1], []byte("nonsense"), editState(t, state, "Kinetic", "h", 1)} {
		if err := r.UnmarshalBinary(bad); err == nil {
			t.Fatalf("corrupt state of %d bytes accepted", len(bad))
		}
	}
	for _, dims := range [][2]int{{math.MaxInt64, 1}, {1 << 40, 1 << 24}, {0, 3}} {
		huge := editState(t, editState(t, state, "Kinetic", "dim", dims[0]), "Kinetic", "chains", dims[1])
		if err := r.UnmarshalBinary(huge); err == nil {
			t.Fatalf("state with dim %d, chains %d accepted", dims[0], dims[1])
		}
	}
}

// A warmed-up step allocates nothing.
func TestKineticStepAllocatesNothing(t *testing.T) {
	k := NewKinetic(10, 8, 0.01, 0, 0, make([]float64, 10), nil, NewSource(1))
	a := NewAnswer(8, 10)
	allocs := testing.AllocsPerRun(100, func() {
		k.Next()
		k.Tell(a)
	})
	if allocs != 0 {
		t.Fatalf("%v allocations per step", allocs)
	}
}

func TestKineticPanicsOnProgrammerErrors(t *testing.T) {
	src := NewSource(1)
	for name, f := range map[string]func(){
		"zero step":       func() { NewKinetic(1, 1, 0, 0, 0, []float64{0}, nil, src) },
		"infinite step":   func() { NewKinetic(1, 1, math.Inf(1), 0, 0, []float64{0}, nil, src) },
		"negative γ":      func() { NewKinetic(1, 1, 0.1, -1, 0, []float64{0}, nil, src) },
		"NaN u":           func() { NewKinetic(1, 1, 0.1, 0, math.NaN(), []float64{0}, nil, src) },
		"no chains":       func() { NewKinetic(1, 0, 0.1, 0, 0, []float64{0}, nil, src) },
		"bad start":       func() { NewKinetic(2, 2, 0.1, 0, 0, []float64{0, 0, 0}, nil, src) },
		"bad velocity":    func() { NewKinetic(2, 2, 0.1, 0, 0, []float64{0, 0}, []float64{1}, src) },
		"short gradients": func() { NewKinetic(2, 2, 0.1, 0, 0, []float64{0, 0}, nil, src).Tell(&Answer{}) },
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

// BenchmarkKineticStep reports the cost of one kinetic step over all chains
// with the gradient already supplied; ns/coord is per chain-coordinate.
func BenchmarkKineticStep(b *testing.B) {
	for _, p := range []int{10, 100, 1000} {
		for _, c := range []int{8, 64} {
			b.Run(fmt.Sprintf("p=%d/chains=%d", p, c), func(b *testing.B) {
				k := NewKinetic(p, c, 0.01, 0, 0, make([]float64, p), nil, NewSource(1))
				a := NewAnswer(c, p)
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
