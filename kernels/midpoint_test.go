package kernels

import (
	"bytes"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/integrate/quad"
)

// midpointFactor returns the 3×4 matrix B with (W1, W2, W3) = B·(z1…z4)
// as the kernel draws them for a = αh (columns from unit vectors through
// midpointNoise).
func midpointFactor(alpha, h, u float64) [3][4]float64 {
	s0 := newKineticCoef(2, u, alpha*h)
	s1 := newKineticCoef(2, u, h-alpha*h)
	var b [3][4]float64
	for j := range 4 {
		var z [4]float64
		z[j] = 1
		b[0][j], b[1][j], b[2][j] = midpointNoise(&s0, &s1, z[0], z[1], z[2], z[3])
	}
	return b
}

// midpointCov returns B·Bᵀ.
func midpointCov(b [3][4]float64) [3][3]float64 {
	var c [3][3]float64
	for i := range 3 {
		for j := range 3 {
			for k := range 4 {
				c[i][j] += b[i][k] * b[j][k]
			}
		}
	}
	return c
}

// midpointTheoryCov is the Brownian covariance of (W1, W2, W3) as printed
// derived here (closed forms, a = αh).
func midpointTheoryCov(alpha, h, u float64) [3][3]float64 {
	a := alpha * h
	e := math.Exp
	var c [3][3]float64
	c[0][0] = u * (a - (1 - e(-2*a)) + (1-e(-4*a))/4)
	c[1][1] = u * (h - (1 - e(-2*h)) + (1-e(-4*h))/4)
	c[2][2] = u * (1 - e(-4*h))
	c[1][2] = u / 2 * (1 - e(-2*h)) * (1 - e(-2*h))
	c[0][1] = u * (a - (1-e(-2*a))/2 - (e(-2*(h-a))-e(-2*h))/2 + (e(-2*(h-a))-e(-2*(h+a)))/4)
	c[0][2] = u * ((e(-2*(h-a)) - e(-2*h)) - (e(-2*(h-a))-e(-2*(h+a)))/2)
	c[1][0], c[2][0], c[2][1] = c[0][1], c[0][2], c[1][2]
	return c
}

// Test vector computed for the project (closed form and quadrature agree): α = 0.3,
// h = 0.5, u = 0.25. The kernel's four-normal construction must have this
// covariance; the vector has 10 decimals, so absolute 1e-9.
func TestMidpointNoiseTheoryVector(t *testing.T) {
	want := [3][3]float64{
		{0.0009038279, 0.0030173892, 0.0041697768},
		{0.0030173892, 0.0210114051, 0.0499470501},
		{0.0041697768, 0.0499470501, 0.2161661792},
	}
	got := midpointCov(midpointFactor(0.3, 0.5, 0.25))
	for i := range 3 {
		for j := range 3 {
			if math.Abs(got[i][j]-want[i][j]) > 1e-9 {
				t.Errorf("Cov[%d][%d] = %.10f, closed form gives %.10f", i, j, got[i][j], want[i][j])
			}
		}
	}
}

// The construction against the derived closed forms over a grid of
// (α, h, u). The printed forms lose digits to cancellation as a = αh → 0
// (Var W1 ~ 4ua³/3 from terms of size a), about 1e-16/a² relatively, so
// a ≥ 1e-3 here and relative 1e-8. Near α = 0 and α = 1 the 3×3 covariance
// is nearly singular; the construction must stay finite, with W1 → 0 and
// W1 → W2 respectively.
func TestMidpointNoiseMatchesClosedForm(t *testing.T) {
	for _, alpha := range []float64{0.01, 0.3, 0.5, 0.99} {
		for _, h := range []float64{0.1, 0.5, 2} {
			for _, u := range []float64{0.25, 1, 3} {
				got := midpointCov(midpointFactor(alpha, h, u))
				want := midpointTheoryCov(alpha, h, u)
				for i := range 3 {
					for j := range 3 {
						if !kineticClose(got[i][j], want[i][j], 1e-8) {
							t.Errorf("α=%v h=%v u=%v: Cov[%d][%d] = %.15g, closed form gives %.15g",
								alpha, h, u, i, j, got[i][j], want[i][j])
						}
					}
				}
			}
		}
	}
	b0 := midpointFactor(1e-12, 0.5, 1)
	b1 := midpointFactor(1-1e-12, 0.5, 1)
	for j := range 4 {
		for i := range 3 {
			if math.IsNaN(b0[i][j]) || math.IsNaN(b1[i][j]) {
				t.Fatalf("NaN in the factor near α = 0 or 1: %v %v", b0, b1)
			}
		}
		if math.Abs(b0[0][j]) > 1e-15 || math.Abs(b1[0][j]-b1[1][j]) > 1e-6 {
			t.Errorf("column %d: W1 row %v near α = 0, W1 − W2 = %v near α = 1", j, b0[0][j], b1[0][j]-b1[1][j])
		}
	}
	if b := midpointFactor(0, 0.5, 1); b[0] != [4]float64{} {
		t.Errorf("α = 0 gives W1 row %v, want zero", b[0])
	}
}

// One step by hand for 2 chains in dimension 2: α and four normals per
// coordinate replayed from the same stream, the drift terms typed from
// Shen and Lee (2019), the noise from the construction checked above.
func TestMidpointStepByHand(t *testing.T) {
	const p, chains, h, u = 2, 2, 0.3, 0.6
	x0 := []float64{1, -2, 0.5, 3}
	v0 := []float64{0.1, 0.2, -0.3, 1}
	g0 := []float64{-1, 0.5, 2, -3}    // ∇log π at x0
	gm := []float64{0.7, -0.2, 1, 0.4} // ∇log π at the midpoints (any values)
	k := NewMidpoint(p, chains, h, u, x0, v0, NewSource(21))
	if r := k.Next(); r.Rows != chains || r.Need != NeedGradient || &r.Points[0] != &k.Positions()[0] {
		t.Fatalf("first request %+v is not the positions", r)
	}
	if k.Tell(&Answer{Grad: g0}) || k.Steps() != 0 {
		t.Fatal("the first Tell of a step reported it complete")
	}
	for i, x := range k.Positions() {
		if x != x0[i] {
			t.Fatalf("positions moved mid-step: %v", k.Positions())
		}
	}
	req := k.Next()
	mid := append([]float64(nil), req.Points...)
	if again := k.Next(); again != req || !k.Tell(&Answer{Grad: gm}) || k.Steps() != 1 {
		t.Fatal("the second Tell did not complete the step")
	}
	rng := rand.New(NewSource(21))
	e := math.Exp
	for c := range chains {
		a := rng.Float64() * h
		b := midpointFactor(a/h, h, u)
		for i := c * p; i < (c+1)*p; i++ {
			var z [4]float64
			for j := range z {
				z[j] = rng.NormFloat64()
			}
			var w [3]float64
			for r := range 3 {
				for j := range 4 {
					w[r] += b[r][j] * z[j]
				}
			}
			wantMid := x0[i] + (1-e(-2*a))/2*v0[i] + (u/2)*(a-(1-e(-2*a))/2)*g0[i] + w[0]
			wantX := x0[i] + (1-e(-2*h))/2*v0[i] + (u*h/2)*(1-e(-2*(h-a)))*gm[i] + w[1]
			wantV := e(-2*h)*v0[i] + u*h*e(-2*(h-a))*gm[i] + w[2]
			if !kineticClose(mid[i], wantMid, 1e-12) || !kineticClose(k.Positions()[i], wantX, 1e-12) ||
				!kineticClose(k.Velocities()[i], wantV, 1e-12) {
				t.Fatalf("coordinate %d: (x_mid, x', v') = (%v, %v, %v), want (%v, %v, %v)",
					i, mid[i], k.Positions()[i], k.Velocities()[i], wantMid, wantX, wantV)
			}
		}
	}
}

// With a constant gradient the α-average of the step's drift is the
// frozen-gradient step of Cheng et al. (2018) with γ = 2 (stated there as
// derived); 64-point Gauss–Legendre (gonum) is exact here to rounding.
func TestMidpointAverageDriftIsKinetic(t *testing.T) {
	const h, u = 0.4, 0.7
	k := newKineticCoef(2, u, h)
	x := quad.Fixed(func(al float64) float64 { return u * h * newKineticCoef(2, u, h-al*h).c }, 0, 1, 64, quad.Legendre{}, 0)
	v := quad.Fixed(func(al float64) float64 { return u * h * newKineticCoef(2, u, h-al*h).e }, 0, 1, 64, quad.Legendre{}, 0)
	if !kineticClose(x, k.ax, 1e-12) || !kineticClose(v, k.av, 1e-12) {
		t.Fatalf("α-averaged drift (%v, %v), frozen-gradient step (%v, %v)", x, v, k.ax, k.av)
	}
}

// midpointStationaryCases are the derived stationary covariances of
// (x, v) on f = λx²/2 (exact α-averaged Lyapunov solve there).
var midpointStationaryCases = []struct {
	lambda, u, h float64
	want         [2][2]float64
	frozen       float64 // the derived Var x for the frozen-gradient scheme, or 0
}{
	{1, 1, 0.1, [2][2]float64{{1.0000208644, -4.1445e-05}, {-4.1445e-05, 1.0001000034}}, 0},
	{1, 1, 0.5, [2][2]float64{{1.0026238463, -0.0046754327}, {-0.0046754327, 1.0105951574}}, 1.1398065487},
	{4, 0.25, 0.2, [2][2]float64{{0.2500418477, -8.1671e-05}, {-8.1671e-05, 0.2501918195}}, 0},
}

// On f = λx²/2 one step is z' = M_α z + noise_α with, for the kernel's
// coefficients s0 (over [0, a]) and s1 (over [a, h]),
//
//	x_mid = (1 − λ·s0.ax)x + s0.c·v + W1
//	M_α = [[1 − λ·cx·(1 − λ·s0.ax), b − λ·cx·s0.c], [−λ·cv·(1 − λ·s0.ax), e − λ·cv·s0.c]]
//	noise_α = (W2 − λ·cx·W1, W3 − λ·cv·W1)
//
// so the stationary covariance solves Σ = E_α[M_α Σ M_αᵀ + Cov noise_α].
// With E_α by 64-point Gauss–Legendre (gonum), as the derivation computed
// it, the solution must be the derived one to its digits (absolute 1e-9 on the
// diagonal; relative 1e-4 off it, given to 5 digits).
func TestMidpointStationaryCovarianceLyapunov(t *testing.T) {
	nodes, weights := make([]float64, 64), make([]float64, 64)
	quad.Legendre{}.FixedLocations(nodes, weights, 0, 1)
	for _, tc := range midpointStationaryCases {
		lam, u, h := tc.lambda, tc.u, tc.h
		ms := make([][2][2]float64, len(nodes))
		var q [2][2]float64
		for n, al := range nodes {
			s0, s1 := newKineticCoef(2, u, al*h), newKineticCoef(2, u, h-al*h)
			cx, cv := u*h*s1.c, u*h*s1.e
			b, e := -math.Expm1(-2*h)/2, math.Exp(-2*h)
			mx := 1 - lam*s0.ax
			ms[n] = [2][2]float64{{1 - lam*cx*mx, b - lam*cx*s0.c}, {-lam * cv * mx, e - lam*cv*s0.c}}
			w := midpointCov(midpointFactor(al, h, u))
			l := [2][3]float64{{-lam * cx, 1, 0}, {-lam * cv, 0, 1}}
			for i := range 2 {
				for j := range 2 {
					for r := range 3 {
						for s := range 3 {
							q[i][j] += weights[n] * l[i][r] * w[r][s] * l[j][s]
						}
					}
				}
			}
		}
		var sig [2][2]float64
		for range 3000 {
			next := q
			for n, m := range ms {
				for i := range 2 {
					for j := range 2 {
						for a := range 2 {
							for b := range 2 {
								next[i][j] += weights[n] * m[i][a] * sig[a][b] * m[j][b]
							}
						}
					}
				}
			}
			sig = next
		}
		for i := range 2 {
			for j := range 2 {
				tol := 1e-9
				if i != j {
					tol = 1e-4 * math.Abs(tc.want[i][j])
				}
				if math.Abs(sig[i][j]-tc.want[i][j]) > tol {
					t.Errorf("λ=%v u=%v h=%v: Σ[%d][%d] = %.10g, closed form gives %.10g", lam, u, h, i, j, sig[i][j], tc.want[i][j])
				}
			}
		}
	}
}

// The kernel's draws on f = λx²/2 have the derived stationary
// covariance of (x, v): every entry within 4 MCSE. At h = 0.5 Var x must
// also be told apart (more than 4 MCSE) from the frozen-gradient scheme's
// 1.1398 (derived here, frozen-gradient scheme): the midpoint's smaller bias is visible.
func TestMidpointStationaryCovariance(t *testing.T) {
	for n, tc := range midpointStationaryCases {
		t.Run(fmt.Sprintf("λ=%v,u=%v,h=%v", tc.lambda, tc.u, tc.h), func(t *testing.T) {
			k := NewMidpoint(1, 16, tc.h, tc.u, []float64{0}, nil, NewSource(200+uint64(n)))
			d := driveKernel(k, gradEval(kineticDiagGrad([]float64{tc.lambda})), 1000, 21000)
			for i := range 2 {
				for j := i; j < 2; j++ {
					est, se := moment(d, i, j, 0, 0)
					t.Logf("Σ[%d][%d] = %.5f ± %.5f (derived: %.5f)", i, j, est, se, tc.want[i][j])
					if z := (est - tc.want[i][j]) / se; math.Abs(z) > 4 {
						t.Errorf("Σ[%d][%d] = %.5f, derived %.5f, MCSE %.5f (z = %.1f)", i, j, est, tc.want[i][j], se, z)
					}
				}
			}
			if tc.frozen != 0 {
				if est, se := moment(d, 0, 0, 0, 0); math.Abs(est-tc.frozen) < 4*se {
					t.Errorf("Var x = %.5f indistinguishable from the frozen scheme's %v (MCSE %.5f)", est, tc.frozen, se)
				}
			}
		})
	}
}

// Evaluation accounting: two gradients per chain per step, in two
// requests of one row per chain (Shen and Lee 2019: two gradients per step).
func TestMidpointEvaluationsPerStep(t *testing.T) {
	k := NewMidpoint(3, 5, 0.1, 0, make([]float64, 3), nil, NewSource(1))
	if k.EvaluationsPerStep() != 10 {
		t.Fatalf("evaluations per step %d, want 10", k.EvaluationsPerStep())
	}
	a := NewAnswer(5, 3)
	var rows, tells, done int
	for k.Steps() < 7 {
		rows += k.Next().Rows
		tells++
		if k.Tell(a) {
			done++
			if tells != 2*done {
				t.Fatalf("step %d completed after %d Tells", done, tells)
			}
		}
	}
	if rows != 70 || tells != 14 || rows != k.Steps()*k.EvaluationsPerStep() {
		t.Fatalf("rows %d, Tells %d for %d steps; want 70 and 14", rows, tells, k.Steps())
	}
	if k.InverseMass() != 1 || k.Step() != 0.1 {
		t.Fatalf("u %v h %v, want the default 1 and 0.1", k.InverseMass(), k.Step())
	}
}

// midpointSame fails t unless k and r emit bit-identical requests and
// states over the next tells Tells.
func midpointSame(t *testing.T, k, r *Midpoint, tells int) {
	t.Helper()
	grad := kineticDiagGrad([]float64{2, 0.5})
	ak, ar := NewAnswer(k.Chains(), k.Dim()), NewAnswer(r.Chains(), r.Dim())
	for n := range tells {
		qk, qr := k.Next(), r.Next()
		for i := range qk.Points {
			if math.Float64bits(qk.Points[i]) != math.Float64bits(qr.Points[i]) {
				t.Fatalf("Tell %d: requested points differ at %d", n, i)
			}
		}
		grad(qk.Points, qk.Rows, ak.Grad)
		grad(qr.Points, qr.Rows, ar.Grad)
		if k.Tell(ak) != r.Tell(ar) {
			t.Fatalf("Tell %d: phases differ", n)
		}
		for i := range k.Positions() {
			if math.Float64bits(k.Positions()[i]) != math.Float64bits(r.Positions()[i]) ||
				math.Float64bits(k.Velocities()[i]) != math.Float64bits(r.Velocities()[i]) {
				t.Fatalf("Tell %d: state differs at %d", n, i)
			}
		}
	}
	sk, _ := k.MarshalBinary()
	sr, _ := r.MarshalBinary()
	if !bytes.Equal(sk, sr) {
		t.Fatal("states differ after identical continuation")
	}
}

// A checkpointed kernel resumes bit for bit, at a step boundary and
// between the two requests of a step.
func TestMidpointStateRoundTrip(t *testing.T) {
	for _, tells := range []int{20, 21} {
		t.Run(fmt.Sprintf("after %d Tells", tells), func(t *testing.T) {
			k := NewMidpoint(2, 3, 0.05, 0.8, []float64{1, -1}, []float64{0.3, 0.1}, NewSource(5))
			grad := kineticDiagGrad([]float64{2, 0.5})
			a := NewAnswer(3, 2)
			for range tells {
				grad(k.Next().Points, 3, a.Grad)
				k.Tell(a)
			}
			state, err := k.MarshalBinary()
			if err != nil {
				t.Fatal(err)
			}
			var r Midpoint
			if err := r.UnmarshalBinary(state); err != nil {
				t.Fatal(err)
			}
			if r.Steps() != 10 || r.Dim() != 2 || r.Chains() != 3 || r.Step() != 0.05 || r.InverseMass() != 0.8 || r.mid != (tells%2 == 1) {
				t.Fatalf("restored header wrong: steps %d dim %d chains %d h %v u %v mid %v",
					r.Steps(), r.Dim(), r.Chains(), r.Step(), r.InverseMass(), r.mid)
			}
			midpointSame(t, k, &r, 31)
			for _, bad := range [][]byte{state[:60], state[:len(state)-1], []byte("nonsense"), editState(t, state, "Midpoint", "u", 1)} {
				if err := r.UnmarshalBinary(bad); err == nil {
					t.Fatalf("corrupt state of %d bytes accepted", len(bad))
				}
			}
			bad := editState(t, state, "Midpoint", "mid", 2) // phase
			if err := r.UnmarshalBinary(bad); err == nil {
				t.Fatal("state with phase 2 accepted")
			}
		})
	}
}

// A warmed-up step (two requests) allocates nothing.
func TestMidpointStepAllocatesNothing(t *testing.T) {
	k := NewMidpoint(10, 8, 0.01, 0, make([]float64, 10), nil, NewSource(1))
	a := NewAnswer(8, 10)
	allocs := testing.AllocsPerRun(100, func() {
		k.Next()
		k.Tell(a)
		k.Next()
		k.Tell(a)
	})
	if allocs != 0 {
		t.Fatalf("%v allocations per step", allocs)
	}
}

func TestMidpointPanicsOnProgrammerErrors(t *testing.T) {
	src := NewSource(1)
	for name, f := range map[string]func(){
		"zero step":       func() { NewMidpoint(1, 1, 0, 0, []float64{0}, nil, src) },
		"negative u":      func() { NewMidpoint(1, 1, 0.1, -1, []float64{0}, nil, src) },
		"zero dim":        func() { NewMidpoint(0, 1, 0.1, 0, nil, nil, src) },
		"bad velocity":    func() { NewMidpoint(2, 2, 0.1, 0, []float64{0, 0}, []float64{1, 2, 3}, src) },
		"short gradients": func() { NewMidpoint(2, 2, 0.1, 0, []float64{0, 0}, nil, src).Tell(&Answer{Grad: make([]float64, 3)}) },
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

// BenchmarkMidpointStep reports the cost of one full midpoint step (both
// requests) over all chains with the gradients already supplied; ns/coord
// is per chain-coordinate.
func BenchmarkMidpointStep(b *testing.B) {
	for _, p := range []int{10, 100, 1000} {
		for _, c := range []int{8, 64} {
			b.Run(fmt.Sprintf("p=%d/chains=%d", p, c), func(b *testing.B) {
				k := NewMidpoint(p, c, 0.01, 0, make([]float64, p), nil, NewSource(1))
				a := NewAnswer(c, p)
				b.ReportAllocs()
				for b.Loop() {
					k.Next()
					k.Tell(a)
					k.Next()
					k.Tell(a)
				}
				b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(p*c), "ns/coord")
			})
		}
	}
}

// One overdamped midpoint step by hand for 2 chains in dimension 2: α and
// z1, z2 per coordinate replayed from the same stream, the update typed
// from Shen and Lee (2019) (with ∇log π = −∇f).
func TestMidpointOverdampedStepByHand(t *testing.T) {
	const p, chains, h = 2, 2, 0.3
	x0 := []float64{1, -2, 0.5, 3}
	g0 := []float64{-1, 0.5, 2, -3}
	gm := []float64{0.7, -0.2, 1, 0.4}
	k := NewOverdampedMidpoint(p, chains, h, x0, NewSource(31))
	if k.Tell(&Answer{Grad: g0}) || k.Steps() != 0 || k.Positions()[3] != 3 {
		t.Fatal("the first Tell of a step reported it complete or moved the positions")
	}
	ys := append([]float64(nil), k.Next().Points...)
	if !k.Tell(&Answer{Grad: gm}) || k.Steps() != 1 {
		t.Fatal("the second Tell did not complete the step")
	}
	rng := rand.New(NewSource(31))
	for c := range chains {
		alpha := rng.Float64()
		for i := c * p; i < (c+1)*p; i++ {
			z1, z2 := rng.NormFloat64(), rng.NormFloat64()
			bA := math.Sqrt(alpha*h) * z1
			bH := bA + math.Sqrt((1-alpha)*h)*z2
			wantY := x0[i] + alpha*h*g0[i] + math.Sqrt2*bA
			wantX := x0[i] + h*gm[i] + math.Sqrt2*bH
			if !kineticClose(ys[i], wantY, 1e-12) || !kineticClose(k.Positions()[i], wantX, 1e-12) {
				t.Fatalf("coordinate %d: (y, θ') = (%v, %v), want (%v, %v)", i, ys[i], k.Positions()[i], wantY, wantX)
			}
		}
	}
}

// Derived here: on f = λθ²/2 the overdamped midpoint
// chain is θ' = A_α θ + noise with E[A_α²] = (1−hλ)² + (1−hλ)h²λ² + h⁴λ⁴/3
// and E[noise²] = 2h(1 − hλ + h²λ²/2), so Var θ = E_n/(1 − E_a2). The
// closed form must give the derived vectors (1e-9), and the kernel's draws must
// match it within 4 MCSE; at h = 0.5 they must also be told apart (more
// than 4 MCSE) from ULA's 4/3 and from the target's 1.
func TestMidpointOverdampedStationaryVariance(t *testing.T) {
	for n, tc := range []struct {
		lambda, h, want, ula float64
		biased               bool
	}{
		{1, 0.1, 1.0001841960, 1.0526315789, false},
		{1, 0.5, 1.0344827586, 1.3333333333, true},
	} {
		t.Run(fmt.Sprintf("λ=%v,h=%v", tc.lambda, tc.h), func(t *testing.T) {
			hl := tc.h * tc.lambda
			ea2 := (1-hl)*(1-hl) + (1-hl)*hl*hl + hl*hl*hl*hl/3
			en := 2 * tc.h * (1 - hl + hl*hl/2)
			if v := en / (1 - ea2); math.Abs(v-tc.want) > 1e-9 {
				t.Fatalf("closed form %.10f, derivation gives %.10f", v, tc.want)
			}
			k := NewOverdampedMidpoint(1, 16, tc.h, []float64{0}, NewSource(300+uint64(n)))
			d := driveKernel(k, gradEval(kineticDiagGrad([]float64{tc.lambda})), 1000, 21000)
			est, se := moment(d, 0, 0, 0, 0)
			t.Logf("Var θ = %.5f ± %.5f (derived: %.5f)", est, se, tc.want)
			if z := (est - tc.want) / se; math.Abs(z) > 4 {
				t.Errorf("Var θ = %.5f, derived %.5f, MCSE %.5f (z = %.1f)", est, tc.want, se, z)
			}
			if tc.biased && (math.Abs(est-tc.ula) < 4*se || math.Abs(est-1/tc.lambda) < 4*se) {
				t.Errorf("Var θ = %.5f not told apart from ULA's %v or the target's %v (MCSE %.5f)", est, tc.ula, 1/tc.lambda, se)
			}
		})
	}
}

// Evaluation accounting: two gradients per chain per step (by the method's definition,
// randomised midpoint row).
func TestMidpointOverdampedEvaluationsPerStep(t *testing.T) {
	k := NewOverdampedMidpoint(3, 5, 0.1, make([]float64, 3), NewSource(1))
	a := NewAnswer(5, 3)
	var rows, tells int
	for k.Steps() < 7 {
		rows += k.Next().Rows
		tells++
		k.Tell(a)
	}
	if k.EvaluationsPerStep() != 10 || rows != 70 || tells != 14 {
		t.Fatalf("evaluations per step %d, rows %d, Tells %d for 7 steps; want 10, 70, 14", k.EvaluationsPerStep(), rows, tells)
	}
}

// A checkpointed overdamped midpoint kernel resumes bit for bit, at a step
// boundary and between the two requests of a step.
func TestMidpointOverdampedStateRoundTrip(t *testing.T) {
	grad := kineticDiagGrad([]float64{2, 0.5})
	for _, tells := range []int{20, 21} {
		k := NewOverdampedMidpoint(2, 3, 0.05, []float64{1, -1}, NewSource(5))
		a := NewAnswer(3, 2)
		for range tells {
			grad(k.Next().Points, 3, a.Grad)
			k.Tell(a)
		}
		state, err := k.MarshalBinary()
		if err != nil {
			t.Fatal(err)
		}
		var r OverdampedMidpoint
		if err := r.UnmarshalBinary(state); err != nil {
			t.Fatal(err)
		}
		if r.Steps() != 10 || r.Dim() != 2 || r.Chains() != 3 || r.Step() != 0.05 || r.mid != (tells%2 == 1) {
			t.Fatalf("restored header wrong: steps %d dim %d chains %d h %v mid %v", r.Steps(), r.Dim(), r.Chains(), r.Step(), r.mid)
		}
		ak, ar := NewAnswer(3, 2), NewAnswer(3, 2)
		for n := range 31 {
			qk, qr := k.Next(), r.Next()
			for i := range qk.Points {
				if math.Float64bits(qk.Points[i]) != math.Float64bits(qr.Points[i]) {
					t.Fatalf("after %d Tells, Tell %d: requested points differ", tells, n)
				}
			}
			grad(qk.Points, 3, ak.Grad)
			grad(qr.Points, 3, ar.Grad)
			if k.Tell(ak) != r.Tell(ar) {
				t.Fatalf("after %d Tells, Tell %d: phases differ", tells, n)
			}
		}
		sk, _ := k.MarshalBinary()
		sr, _ := r.MarshalBinary()
		if !bytes.Equal(sk, sr) {
			t.Fatalf("after %d Tells: states differ after identical continuation", tells)
		}
		for _, bad := range [][]byte{state[:50], state[:len(state)-1], editState(t, state, "OverdampedMidpoint", "x", 0)} {
			if err := r.UnmarshalBinary(bad); err == nil {
				t.Fatalf("corrupt state of %d bytes accepted", len(bad))
			}
		}
	}
}

func TestMidpointOverdampedAllocationsAndPanics(t *testing.T) {
	k := NewOverdampedMidpoint(10, 8, 0.01, make([]float64, 10), NewSource(1))
	a := NewAnswer(8, 10)
	if allocs := testing.AllocsPerRun(100, func() {
		k.Next()
		k.Tell(a)
		k.Next()
		k.Tell(a)
	}); allocs != 0 {
		t.Fatalf("%v allocations per step", allocs)
	}
	for name, f := range map[string]func(){
		"NaN step":        func() { NewOverdampedMidpoint(1, 1, math.NaN(), []float64{0}, NewSource(1)) },
		"bad start":       func() { NewOverdampedMidpoint(2, 1, 0.1, []float64{0}, NewSource(1)) },
		"short gradients": func() { NewOverdampedMidpoint(2, 1, 0.1, []float64{0, 0}, NewSource(1)).Tell(&Answer{}) },
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

// BenchmarkMidpointOverdampedStep reports the cost of one full overdamped
// midpoint step (both requests) over all chains.
func BenchmarkMidpointOverdampedStep(b *testing.B) {
	for _, p := range []int{10, 100, 1000} {
		for _, c := range []int{8, 64} {
			b.Run(fmt.Sprintf("p=%d/chains=%d", p, c), func(b *testing.B) {
				k := NewOverdampedMidpoint(p, c, 0.01, make([]float64, p), NewSource(1))
				a := NewAnswer(c, p)
				b.ReportAllocs()
				for b.Loop() {
					k.Next()
					k.Tell(a)
					k.Next()
					k.Tell(a)
				}
				b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(p*c), "ns/coord")
			})
		}
	}
}
