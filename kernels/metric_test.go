package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// metricSigma is a correlated 3-D covariance used by the exactness tests,
// with mean metricMu.
var (
	metricSigma = []float64{
		2.0, 0.9, 0.3,
		0.9, 1.0, 0.2,
		0.3, 0.2, 0.5,
	}
	metricMu = []float64{1, -0.5, 0.25}
)

// metricDense returns NewDenseMetric(p, c) or fails t.
func metricDense(t testing.TB, p int, c []float64) *Metric {
	t.Helper()
	m, err := NewDenseMetric(p, c)
	if err != nil {
		t.Fatal(err)
	}
	return m
}

// metricGaussianEval answers requests on N(μ, Σ) with gradient
// −Σ⁻¹(x − μ) and log density −½(x − μ)ᵀΣ⁻¹(x − μ) (gonum inverse).
func metricGaussianEval(t testing.TB, mu, sigma []float64) (eval func(*Request, *Answer), q *mat.Dense) {
	p := len(mu)
	q = mat.NewDense(p, p, nil)
	if err := q.Inverse(mat.NewDense(p, p, append([]float64(nil), sigma...))); err != nil {
		t.Fatal(err)
	}
	return func(req *Request, a *Answer) {
		a.Reserve(req.Need, req.Rows, p)
		for r := range req.Rows {
			x := req.Points[r*p : (r+1)*p]
			var lp float64
			for i := range p {
				var s float64
				for j := range p {
					s += q.At(i, j) * (x[j] - mu[j])
				}
				a.Grad[r*p+i] = -s
				lp -= 0.5 * (x[i] - mu[i]) * s
			}
			a.LogDensity[r] = lp
		}
	}, q
}

// metricRandomSPD returns a p×p symmetric positive-definite matrix with
// the given eigenvalues in a random orthonormal basis (gonum QR).
func metricRandomSPD(rng *rand.Rand, eig []float64) []float64 {
	p := len(eig)
	g := mat.NewDense(p, p, nil)
	for i := range p {
		for j := range p {
			g.Set(i, j, rng.NormFloat64())
		}
	}
	var qr mat.QR
	qr.Factorize(g)
	var q mat.Dense
	qr.QTo(&q)
	var c mat.Dense
	c.Mul(&q, mat.NewDiagDense(p, eig))
	c.Mul(&c, q.T())
	out := make([]float64, p*p)
	for i := range p {
		for j := range p {
			out[i*p+j] = (c.At(i, j) + c.At(j, i)) / 2
		}
	}
	return out
}

// The metric's algebra against gonum: C·v by mat.MulVec, L·Lᵀ = C, L⁻¹
// inverts L, the condition number from the eigenvalues the matrix was
// built with. Tolerance 1e-12 relative: double-precision evaluations of
// the same products.
func TestMetricAlgebra(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 2))
	eig := []float64{0.5, 1, 2, 7, 20}
	p := len(eig)
	c := metricRandomSPD(rng, eig)
	diagVals := []float64{0.5, 1, 2, 7, 20}
	dm, err := NewDiagonalMetric(diagVals)
	if err != nil {
		t.Fatal(err)
	}
	for _, m := range []*Metric{metricDense(t, p, c), dm, NewIdentityMetric(p)} {
		t.Run(m.Kind().String(), func(t *testing.T) {
			cm := mat.NewDense(p, p, m.Matrix())
			v := make([]float64, p)
			for i := range v {
				v[i] = rng.NormFloat64()
			}
			got := make([]float64, p)
			m.Apply(got, v)
			var want mat.VecDense
			want.MulVec(cm, mat.NewVecDense(p, v))
			metricClose(t, "C·v", got, want.RawVector().Data, 1e-12)
			// L·Lᵀ = C column by column: C·e_j = L·(Lᵀe_j); build L from L·e_j.
			l := mat.NewDense(p, p, nil)
			e := make([]float64, p)
			for j := range p {
				clear(e)
				e[j] = 1
				m.ApplyFactor(got, e)
				l.SetCol(j, got)
			}
			var llt mat.Dense
			llt.Mul(l, l.T())
			metricClose(t, "L·Lᵀ", llt.RawMatrix().Data, m.Matrix(), 1e-12)
			m.ApplyFactor(got, v)
			m.SolveFactor(got, got)
			metricClose(t, "L⁻¹·L·v", got, v, 1e-12)
			wantCond := 1.0
			if m.Kind() != IdentityMetric {
				wantCond = 40
			}
			if math.Abs(m.Condition()-wantCond) > 1e-9*wantCond {
				t.Errorf("condition %v, want %v", m.Condition(), wantCond)
			}
		})
	}
	for _, bad := range []struct {
		name string
		c    []float64
	}{
		{"not positive definite", []float64{1, 2, 2, 1}},
		{"not symmetric", []float64{1, 0.5, 0.4, 1}},
		{"NaN", []float64{1, math.NaN(), math.NaN(), 1}},
		{"wrong length", []float64{1, 0, 0}},
	} {
		if _, err := NewDenseMetric(2, bad.c); err == nil {
			t.Errorf("%s accepted", bad.name)
		}
	}
	big := MaxDenseMetricDim + 1
	if _, err := NewDenseMetric(big, make([]float64, big*big)); err == nil {
		t.Error("dense metric above the dimension limit accepted")
	}
	for _, d := range [][]float64{{1, 0}, {1, -1}, {1, math.Inf(1)}, {math.NaN()}, nil} {
		if _, err := NewDiagonalMetric(d); err == nil {
			t.Errorf("diagonal metric %v accepted", d)
		}
	}
}

func metricClose(t *testing.T, what string, got, want []float64, rel float64) {
	t.Helper()
	var scale float64
	for _, w := range want {
		scale = math.Max(scale, math.Abs(w))
	}
	for i := range want {
		if math.Abs(got[i]-want[i]) > rel*math.Max(scale, 1e-300) {
			t.Fatalf("%s[%d] = %.17g, want %.17g", what, i, got[i], want[i])
		}
	}
}

// metricKernels returns one small kernel of each kind that takes a metric
// (the first eight of fuzzKernels).
func metricKernels() []Kernel { return fuzzKernels()[:8] }

// A metric of identity reproduces the draws of the kernel without a
// metric bit for bit, and so does a diagonal metric of ones for the
// kernels whose plain step multiplies by C and L element-wise (1·g and
// 1·z are exact).
func TestMetricIdentityBitForBit(t *testing.T) {
	for i := range metricKernels() {
		plain, with := metricKernels()[i], metricKernels()[i]
		t.Run(fmt.Sprintf("%T", plain), func(t *testing.T) {
			with.(MetricUser).SetMetric(NewIdentityMetric(plain.Dim()))
			if with.(MetricUser).Metric().Kind() != IdentityMetric {
				t.Fatal("identity metric not reported")
			}
			a, b := &Answer{}, &Answer{}
			for n := range 40 {
				stateTestEval(plain.Next(), a)
				stateTestEval(with.Next(), b)
				if plain.Tell(a) != with.Tell(b) || !hitrunEqualBits(plain.Positions(), with.Positions()) {
					t.Fatalf("Tell %d: draws differ", n)
				}
			}
		})
	}
}

// Every metric kernel with a dense metric, marshalled after each of its
// first Tells and unmarshalled into a zero kernel, continues bit for bit;
// so does one whose metric was changed just before the state was taken
// (between the two requests of a step for the midpoint kernels, where the
// change waits for the step's end).
func TestMetricStateRoundTrip(t *testing.T) {
	dense := metricDense(t, 3, metricSigma)
	other, _ := NewDiagonalMetric([]float64{0.5, 2, 1})
	for i := range metricKernels() {
		t.Run(fmt.Sprintf("%T", metricKernels()[i]), func(t *testing.T) {
			for _, change := range []bool{false, true} {
				for tells := range 7 {
					k := metricKernels()[i]
					k.(MetricUser).SetMetric(dense)
					a := &Answer{}
					for range tells {
						stateTestEval(k.Next(), a)
						k.Tell(a)
					}
					if change {
						k.(MetricUser).SetMetric(other)
					}
					b, err := k.(Checkpointer).MarshalBinary()
					if err != nil {
						t.Fatal(err)
					}
					r := newLike(k)
					if err := r.(Checkpointer).UnmarshalBinary(b); err != nil {
						t.Fatalf("after %d Tells: %v", tells, err)
					}
					if got, want := r.(MetricUser).Metric().Kind(), k.(MetricUser).Metric().Kind(); got != want {
						t.Fatalf("restored metric %v, want %v", got, want)
					}
					ar := &Answer{}
					for n := range 12 {
						stateTestEval(k.Next(), a)
						stateTestEval(r.Next(), ar)
						if k.Tell(a) != r.Tell(ar) || !hitrunEqualBits(k.Positions(), r.Positions()) {
							t.Fatalf("change %v, after %d Tells, Tell %d: draws differ", change, tells, n)
						}
					}
				}
			}
		})
	}
}

// A step with a dense metric allocates nothing once warmed up.
func TestMetricStepAllocatesNothing(t *testing.T) {
	dense := metricDense(t, 3, metricSigma)
	for _, k := range metricKernels() {
		t.Run(fmt.Sprintf("%T", k), func(t *testing.T) {
			k.(MetricUser).SetMetric(dense)
			a := &Answer{}
			for range 10 {
				stateTestEval(k.Next(), a)
				k.Tell(a)
			}
			if n := testing.AllocsPerRun(50, func() {
				stateTestEval(k.Next(), a)
				k.Tell(a)
			}); n != 0 {
				t.Fatalf("%v allocations per Tell", n)
			}
		})
	}
}

// One LMC step with metric C = L·Lᵀ is exactly
// x' = x + h·C·∇log π(x) + √(2h)·L·ξ with ξ the stream's normals, chain by
// chain (Roberts and Stramer 2002 for the preconditioned drift and
// noise); so its mean map is x ↦ x − hCQ(x − μ) and its covariance 2hC.
// The reference is computed with gonum (Cholesky of C), tolerance 1e-12
// relative to the largest value.
func TestLMCMetricOneStepExact(t *testing.T) {
	p, chains, h, seed := 3, 2, 0.3, uint64(17)
	eval, q := metricGaussianEval(t, metricMu, metricSigma)
	cm := []float64{1.5, 0.2, 0, 0.2, 0.8, 0.1, 0, 0.1, 0.6}
	x0 := []float64{0.3, -1, 2, 1.5, 0.5, -0.5}
	k := NewLMC(p, chains, h, x0, NewSource(seed))
	k.SetMetric(metricDense(t, p, cm))
	a := &Answer{}
	eval(k.Next(), a)
	k.Tell(a)
	var ch mat.Cholesky
	if !ch.Factorize(mat.NewSymDense(p, append([]float64(nil), cm...))) {
		t.Fatal("reference Cholesky failed")
	}
	var l mat.TriDense
	ch.LTo(&l)
	xi := randNormals(seed, chains*p)
	c := mat.NewDense(p, p, cm)
	for chn := range chains {
		x := mat.NewVecDense(p, append([]float64(nil), x0[chn*p:(chn+1)*p]...))
		d := mat.NewVecDense(p, nil)
		d.SubVec(x, mat.NewVecDense(p, metricMu))
		var g, cg, lz, want mat.VecDense
		g.MulVec(q, d)
		g.ScaleVec(-1, &g)
		cg.MulVec(c, &g)
		lz.MulVec(&l, mat.NewVecDense(p, xi[chn*p:(chn+1)*p]))
		want.AddScaledVec(x, h, &cg)
		want.AddScaledVec(&want, math.Sqrt(2*h), &lz)
		metricClose(t, fmt.Sprintf("chain %d", chn), k.Positions()[chn*p:(chn+1)*p], want.RawVector().Data, 1e-12)
	}
}

// metricLyapunov solves V = A·V·Aᵀ + Q for V by the Kronecker form
// (I − A⊗A)·vec V = vec Q, with gonum's dense solver.
func metricLyapunov(t testing.TB, a, q *mat.Dense) *mat.Dense {
	p, _ := a.Dims()
	big := mat.NewDense(p*p, p*p, nil)
	for i := range p {
		for j := range p {
			for k := range p {
				for l := range p {
					v := -a.At(i, k) * a.At(j, l)
					if i == k && j == l {
						v++
					}
					big.Set(i*p+j, k*p+l, v)
				}
			}
		}
	}
	var vec mat.VecDense
	if err := vec.SolveVec(big, mat.NewVecDense(p*p, append([]float64(nil), q.RawMatrix().Data...))); err != nil {
		t.Fatal(err)
	}
	return mat.NewDense(p, p, vec.RawVector().Data)
}

// metricCheckMoments checks the draws' mean against mu and their
// covariance about mu against v, each within 4 MCSE (ESS from diag on
// split chains).
func metricCheckMoments(t *testing.T, d [][][]float64, mu []float64, v *mat.Dense) {
	t.Helper()
	p := len(mu)
	for i := range p {
		est, se := statOf(d, func(x []float64) float64 { return x[i] })
		if math.Abs(est-mu[i]) > 4*se {
			t.Errorf("mean[%d] = %.4f ± %.4f, want %.4f", i, est, se, mu[i])
		}
		for j := i; j < p; j++ {
			est, se := statOf(d, func(x []float64) float64 { return (x[i] - mu[i]) * (x[j] - mu[j]) })
			if math.Abs(est-v.At(i, j)) > 4*se {
				t.Errorf("cov[%d][%d] = %.4f ± %.4f, want %.4f", i, j, est, se, v.At(i, j))
			}
		}
	}
}

// ULA with metric C on N(μ, Σ) is linear: x' = A·x + hCQμ + √(2h)·L·ξ with
// A = I − hCQ, Q = Σ⁻¹. Derived here: with y = L⁻¹x the chain is ULA on a
// Gaussian with covariance S = L⁻¹ΣL⁻ᵀ, whose stationary covariance V_y
// solves A_y V_y A_yᵀ + 2hI = V_y, A_y = I − hS⁻¹; mapping back,
// V = L V_y Lᵀ solves V = A V Aᵀ + 2hC, and the stationary mean is μ. With
// C = Σ, S = I and V = Σ/(1 − h/2) (the 1-D ULA variance σ²/(1 − h/(2σ²))
// at σ² = 1, Durmus and Moulines (2017) for ULA on Gaussians). The
// Lyapunov solution is checked against that closed form, then the draws
// against the solution within 4 MCSE, for C = Σ and for a C ≠ Σ.
func TestLMCMetricStationaryCovariance(t *testing.T) {
	p := 3
	eval, q := metricGaussianEval(t, metricMu, metricSigma)
	for _, tc := range []struct {
		name string
		c    []float64
		h    float64
	}{
		{"C=Σ", metricSigma, 0.4},
		{"C≠Σ", []float64{1.5, 0.2, 0, 0.2, 0.8, 0.1, 0, 0.1, 0.6}, 0.15},
	} {
		t.Run(tc.name, func(t *testing.T) {
			cm := mat.NewDense(p, p, append([]float64(nil), tc.c...))
			var a mat.Dense
			a.Mul(cm, q)
			a.Scale(-tc.h, &a)
			for i := range p {
				a.Set(i, i, a.At(i, i)+1)
			}
			var qn mat.Dense
			qn.Scale(2*tc.h, cm)
			v := metricLyapunov(t, &a, &qn)
			if tc.name == "C=Σ" {
				for i := range p * p {
					want := metricSigma[i] / (1 - tc.h/2)
					if math.Abs(v.RawMatrix().Data[i]-want) > 1e-10 {
						t.Fatalf("Lyapunov solution %v differs from Σ/(1 − h/2)", v.RawMatrix().Data)
					}
				}
			}
			k := NewLMC(p, 16, tc.h, metricMu, NewSource(23))
			k.SetMetric(metricDense(t, p, tc.c))
			d := driveKernel(k, eval, 200, 20200)
			metricCheckMoments(t, d, metricMu, v)
		})
	}
}

// MALA with a frozen dense metric leaves N(μ, Σ) exactly invariant for
// any fixed C (Roberts and Stramer 2002: the proposal N(x + hC∇log π(x),
// 2hC) with its own density ratio in the acceptance). The draws' mean and
// covariance must match μ and Σ within 4 MCSE; the metric is deliberately
// not Σ and the step large, so a wrong density ratio would show.
func TestMALAMetricExact(t *testing.T) {
	p := 3
	eval, _ := metricGaussianEval(t, metricMu, metricSigma)
	k := NewMALA(p, 16, 0.9, 0, metricMu, NewSource(29))
	k.SetMetric(metricDense(t, p, []float64{1.5, 0.2, 0, 0.2, 0.8, 0.1, 0, 0.1, 0.6}))
	d := driveKernel(k, eval, 100, 10100)
	metricCheckMoments(t, d, metricMu, mat.NewDense(p, p, metricSigma))
	var acc float64
	for _, r := range k.AcceptanceRates() {
		acc += r / float64(k.Chains())
	}
	if acc < 0.2 || acc > 0.95 {
		t.Fatalf("acceptance %v: the test would not probe the density ratio", acc)
	}
}

// kineticScalarStationary returns the stationary covariance of (x, v) of
// the frozen-gradient kinetic step (Cheng, Chatterji, Bartlett and Jordan
// 2018) with γ = 2 and inverse mass u on the 1-D Gaussian of precision λ:
// the step is z' = Mz + noise, M = [[1 − λ·ax, c], [−λ·av, e]], and the
// covariance solves the discrete Lyapunov equation (kineticLyapunov).
func kineticScalarStationary(lambda, u, h float64) [2][2]float64 {
	c := newKineticCoef(2, u, h)
	m := [2][2]float64{{1 - lambda*c.ax, c.c}, {-lambda * c.av, c.e}}
	return kineticLyapunov(m, [2][2]float64{{c.varX, c.cov}, {c.cov, c.varV}})
}

// Kinetic with metric C on N(0, Σ). Derived here: with C = L·Lᵀ the chain
// on (L⁻¹x, L⁻¹v) is the plain kinetic chain on the Gaussian of covariance
// L⁻¹ΣL⁻ᵀ. With C = Σ that is N(0, I): every coordinate is the scalar
// chain at λ = 1, so Cov(x) = V_xx·Σ, Cov(x, v) = V_xv·Σ, Cov(v) = V_vv·Σ.
// With diagonal C and Σ the coordinates are independent scalar chains at
// λ_i = C_ii/Σ_ii, so Cov(x_i) = C_ii·V_xx(λ_i), Cov(v_i) = C_ii·V_vv(λ_i).
// The draws must match within 4 MCSE.
func TestKineticMetricStationary(t *testing.T) {
	p, h, u := 3, 0.4, 1.0
	zero := make([]float64, p)
	t.Run("dense C=Σ", func(t *testing.T) {
		eval, _ := metricGaussianEval(t, zero, metricSigma)
		k := NewKinetic(p, 16, h, 2, u, zero, nil, NewSource(31))
		k.SetMetric(metricDense(t, p, metricSigma))
		s := kineticScalarStationary(1, u, h)
		d := driveKernel(k, eval, 200, 20200)
		want := mat.NewDense(2*p, 2*p, nil)
		for i := range p {
			for j := range p {
				sig := metricSigma[i*p+j]
				want.Set(i, j, s[0][0]*sig)
				want.Set(i, p+j, s[0][1]*sig)
				want.Set(p+i, j, s[1][0]*sig)
				want.Set(p+i, p+j, s[1][1]*sig)
			}
		}
		metricCheckMoments(t, d, make([]float64, 2*p), want)
	})
	t.Run("diagonal", func(t *testing.T) {
		sigma := []float64{2, 0.5, 1}
		cd := []float64{1, 1, 3}
		sm := make([]float64, p*p)
		for i := range p {
			sm[i*p+i] = sigma[i]
		}
		eval, _ := metricGaussianEval(t, zero, sm)
		k := NewKinetic(p, 16, h, 2, u, zero, nil, NewSource(37))
		dm, _ := NewDiagonalMetric(cd)
		k.SetMetric(dm)
		want := mat.NewDense(2*p, 2*p, nil)
		for i := range p {
			s := kineticScalarStationary(cd[i]/sigma[i], u, h)
			want.Set(i, i, cd[i]*s[0][0])
			want.Set(i, p+i, cd[i]*s[0][1])
			want.Set(p+i, i, cd[i]*s[1][0])
			want.Set(p+i, p+i, cd[i]*s[1][1])
		}
		d := driveKernel(k, eval, 200, 20200)
		metricCheckMoments(t, d, make([]float64, 2*p), want)
	})
}

// BenchmarkMetricStep times one LMC step of one chain with the identity,
// a diagonal and a dense metric at p = 100 and p = 1000, side by side
// (the dense step adds two p×p products, C·g and L·ξ).
func BenchmarkMetricStep(b *testing.B) {
	for _, p := range []int{100, 1000} {
		rng := rand.New(rand.NewPCG(uint64(p), 1))
		d := make([]float64, p)
		for i := range d {
			d[i] = 0.5 + rng.Float64()
		}
		diagM, _ := NewDiagonalMetric(d)
		c := make([]float64, p*p)
		for i := range p {
			for j := range p {
				c[i*p+j] = 0.3 / (1 + math.Abs(float64(i-j)))
			}
			c[i*p+i] = 1
		}
		denseM := metricDense(b, p, c)
		for _, m := range []*Metric{NewIdentityMetric(p), diagM, denseM} {
			b.Run(fmt.Sprintf("p=%d/%v", p, m.Kind()), func(b *testing.B) {
				k := NewLMC(p, 1, 1e-3, make([]float64, p), NewSource(1))
				k.SetMetric(m)
				a := NewAnswer(1, p)
				for i := range a.Grad {
					a.Grad[i] = rng.NormFloat64()
				}
				b.ReportAllocs()
				for b.Loop() {
					k.Next()
					k.Tell(a)
				}
			})
		}
	}
}

// Kinetic's settings change the coefficients from the next Tell exactly as
// a kernel built with them: after SetStep, SetFriction and SetInverseMass
// the draws are bit for bit those of a kernel constructed with the new
// values and the same state.
func TestKineticSetters(t *testing.T) {
	x0 := []float64{0.5, -0.25, 1}
	a := NewKinetic(3, 2, 0.1, 2, 1, x0, nil, NewSource(3))
	b := NewKinetic(3, 2, 0.3, 1.5, 0.5, x0, nil, NewSource(3))
	a.SetStep(0.3)
	a.SetFriction(1.5)
	a.SetInverseMass(0.5)
	aa, ab := &Answer{}, &Answer{}
	for n := range 10 {
		stateTestEval(a.Next(), aa)
		stateTestEval(b.Next(), ab)
		a.Tell(aa)
		b.Tell(ab)
		if !hitrunEqualBits(a.Positions(), b.Positions()) || !hitrunEqualBits(a.Velocities(), b.Velocities()) {
			t.Fatalf("Tell %d: draws differ", n)
		}
	}
	if a.Step() != 0.3 || a.Friction() != 1.5 || a.InverseMass() != 0.5 {
		t.Fatal("settings not reported")
	}
}

// The midpoint kernels with metric C = Σ on N(0, Σ). Derived here: the
// chain on L⁻¹x (and L⁻¹v) is the plain method on N(0, I); its
// coordinates share α within a chain but their noises are independent
// given α, so the stationary cross-covariances between coordinates are 0
// and each coordinate has the 1-D law at λ = 1 (the derived values the
// plain midpoint tests check: Var x = 1.0026238463, Cov(x, v) =
// −0.0046754327, Var v = 1.0105951574 for the kinetic method with u = 1,
// h = 0.5; Var θ = 1.0344827586 for the overdamped one at h = 0.5). Mapped
// back, Cov(x) = Var x·Σ, Cov(x, v) = Cov(x, v)·Σ and Cov(v) = Var v·Σ. The
// draws must match within 4 MCSE. (The kinetic run is 40 000 steps: at
// 10 000 one of its 27 checks, a mean, came out at z = 4.1 while runs four
// times as long on three seeds gave |z| ≤ 2.1 for every mean.)
func TestMidpointMetricStationary(t *testing.T) {
	p, h := 3, 0.5
	zero := make([]float64, p)
	eval, _ := metricGaussianEval(t, zero, metricSigma)
	dense := metricDense(t, p, metricSigma)
	t.Run("kinetic", func(t *testing.T) {
		k := NewMidpoint(p, 16, h, 1, zero, nil, NewSource(41))
		k.SetMetric(dense)
		s := [2][2]float64{{1.0026238463, -0.0046754327}, {-0.0046754327, 1.0105951574}}
		want := mat.NewDense(2*p, 2*p, nil)
		for i := range p {
			for j := range p {
				sig := metricSigma[i*p+j]
				want.Set(i, j, s[0][0]*sig)
				want.Set(i, p+j, s[0][1]*sig)
				want.Set(p+i, j, s[1][0]*sig)
				want.Set(p+i, p+j, s[1][1]*sig)
			}
		}
		metricCheckMoments(t, driveKernel(k, eval, 200, 40200), make([]float64, 2*p), want)
	})
	t.Run("overdamped", func(t *testing.T) {
		k := NewOverdampedMidpoint(p, 16, h, zero, NewSource(43))
		k.SetMetric(dense)
		want := mat.NewDense(p, p, nil)
		want.Scale(1.0344827586, mat.NewDense(p, p, metricSigma))
		metricCheckMoments(t, driveKernel(k, eval, 200, 20200), zero, want)
	})
}

// With exact gradients the stochastic-gradient kernels are LMC (Welling
// and Teh 2011 with no minibatch noise; the control variates of Baker et
// al. 2019 and Dubey et al. 2016 then cancel to rounding), and they draw
// their noise in LMC's order, so with the same dense metric and seed
// their draws must equal LMC's: bit for bit for SGLD (same arithmetic),
// to 1e-12 relative for SGLD-CV and SVRG over 20 steps. SGLD-CV's search
// draws nothing and leaves the chains at their start.
func TestStochasticGradientMetricMatchesLMC(t *testing.T) {
	p, c, h := 3, 2, 0.05
	x0 := []float64{0.5, -0.25, 1, 0.1, 0.2, -0.3}
	dense := metricDense(t, p, metricSigma)
	eval, _ := metricGaussianEval(t, metricMu, metricSigma)
	for _, k := range []Kernel{
		NewSGLD(p, c, h, SGLDSchedule{}, x0, NewSource(9)),
		NewSGLDCV(p, c, h, SGLDCVOptions{}, x0, NewSource(9)),
		NewSVRG(p, c, h, 4, x0, NewSource(9)),
	} {
		t.Run(fmt.Sprintf("%T", k), func(t *testing.T) {
			ref := NewLMC(p, c, h, x0, NewSource(9))
			ref.SetMetric(dense)
			k.(MetricUser).SetMetric(dense)
			a, ar := &Answer{}, &Answer{}
			for k.Steps() < 20 {
				eval(k.Next(), a)
				if !k.Tell(a) {
					continue
				}
				eval(ref.Next(), ar)
				ref.Tell(ar)
				if _, plain := k.(*SGLD); plain {
					if !hitrunEqualBits(k.Positions(), ref.Positions()) {
						t.Fatalf("step %d: SGLD differs from LMC", k.Steps())
					}
					continue
				}
				metricClose(t, fmt.Sprintf("step %d", k.Steps()), k.Positions(), ref.Positions(), 1e-12)
			}
		})
	}
}

// A metric and a covariance accumulator written and read back are the
// same bit for bit: the metric's C, factor and condition number, and an
// accumulator restored half-way through its draws gives the same
// Ledoit–Wolf estimate as the one that pooled them all; truncated records
// are errors, never panics.
func TestMetricAndCovarianceCodec(t *testing.T) {
	src := NewSource(5)
	normal := rand.New(src).NormFloat64
	for _, dim := range []int{3, MaxDenseMetricDim + 1} {
		draws := make([]float64, 40*dim)
		for i := range draws {
			draws[i] = normal() * float64(1+i%dim%4)
		}
		whole, half := NewCovariance(dim), NewCovariance(dim)
		whole.Add(draws)
		half.Add(draws[:20*dim])
		b, err := half.MarshalBinary()
		if err != nil {
			t.Fatal(err)
		}
		var back Covariance
		if err := back.UnmarshalBinary(b); err != nil {
			t.Fatal(err)
		}
		back.Add(draws[20*dim:])
		mw, lw, err := whole.Shrunk()
		if err != nil {
			t.Fatal(err)
		}
		mb, lb, err := back.Shrunk()
		if err != nil {
			t.Fatal(err)
		}
		if math.Float64bits(lw) != math.Float64bits(lb) || !sameFloats(mw.Matrix(), mb.Matrix()) {
			t.Fatalf("dim %d: restored accumulator's estimate differs", dim)
		}
		for n := 0; n < len(b); n += 1 + n/20 {
			if err := back.UnmarshalBinary(b[:n]); err == nil {
				t.Fatalf("dim %d: covariance truncated at %d read", dim, n)
			}
		}
		for _, m := range []*Metric{mw, NewIdentityMetric(dim)} {
			mb, err := m.MarshalBinary()
			if err != nil {
				t.Fatal(err)
			}
			got, err := UnmarshalMetric(mb)
			if err != nil {
				t.Fatal(err)
			}
			if got.Kind() != m.Kind() || got.Dim() != dim || math.Float64bits(got.Condition()) != math.Float64bits(m.Condition()) ||
				!sameFloats(got.Matrix(), m.Matrix()) || !sameFloats(got.l, m.l) {
				t.Fatalf("dim %d %v: metric read back differs", dim, m.Kind())
			}
			for n := 0; n < len(mb); n += 1 + n/20 {
				if _, err := UnmarshalMetric(mb[:n]); err == nil {
					t.Fatalf("dim %d: metric truncated at %d read", dim, n)
				}
			}
		}
	}
}

func sameFloats(a, b []float64) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if math.Float64bits(a[i]) != math.Float64bits(b[i]) {
			return false
		}
	}
	return true
}
