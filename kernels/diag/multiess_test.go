package diag

import (
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distuv"
)

const workedVats = "worked example of Vats, Flegal and Jones (2019), computed for the project"

// var1Moments returns, for Y_t = A Y_{t−1} + e_t with Cov(e) = C, the
// stationary covariance Λ (solving the discrete Lyapunov equation
// Λ = AΛAᵀ + C through vec(Λ) = (I − A⊗A)⁻¹ vec(C)) and the CLT
// covariance Σ = Σ_{t∈ℤ} Γ_t = (I − A)⁻¹ C (I − A)⁻ᵀ (derived here:
// Γ_t = AᵗΛ for t ≥ 0, and Λ − AΛAᵀ = C).
func var1Moments(t *testing.T, a, c *mat.Dense) (lambda, sigma *mat.SymDense) {
	t.Helper()
	p, _ := a.Dims()
	var k mat.Dense
	k.Kronecker(a, a)
	var lhs mat.Dense
	lhs.Sub(eye(p*p), &k)
	vecC := mat.NewVecDense(p*p, nil)
	for i := range p {
		for j := range p {
			vecC.SetVec(i*p+j, c.At(i, j)) // row-major vec, consistent with A⊗A acting on it
		}
	}
	var vecL mat.VecDense
	if err := vecL.SolveVec(&lhs, vecC); err != nil {
		t.Fatal(err)
	}
	lambda = mat.NewSymDense(p, nil)
	for i := range p {
		for j := i; j < p; j++ {
			lambda.SetSym(i, j, vecL.AtVec(i*p+j))
		}
	}
	var ima, inv, tmp, s mat.Dense
	ima.Sub(eye(p), a)
	if err := inv.Inverse(&ima); err != nil {
		t.Fatal(err)
	}
	tmp.Mul(&inv, c)
	s.Mul(&tmp, inv.T())
	sigma = mat.NewSymDense(p, nil)
	for i := range p {
		for j := i; j < p; j++ {
			sigma.SetSym(i, j, s.At(i, j))
		}
	}
	return lambda, sigma
}

func eye(n int) *mat.Dense {
	d := mat.NewDense(n, n, nil)
	for i := range n {
		d.Set(i, i, 1)
	}
	return d
}

// Vats, Flegal and Jones 2019 exact vectors: mESS/n = (det Λ/det Σ)^{1/p} with the exact
// Λ and Σ of independent AR(1) coordinates and of a VAR(1).
func TestMultiESSExactRatios(t *testing.T) {
	l, s := var1Moments(t, mat.NewDense(2, 2, []float64{0.5, 0, 0, 0.9}), eye(2))
	checkAbs(t, "AR(1)×2 mESS/n", detRatio(l, s), 0.1324532357, 1e-8, workedVats)
	checkAbs(t, "AR(1)×2 closed form", detRatio(l, s), math.Sqrt((1.0/3)*(1.0/19)), 1e-14, "AR(1) closed form, derived here")

	a := mat.NewDense(2, 2, []float64{0.5, 0.2, 0.1, 0.7})
	c := mat.NewDense(2, 2, []float64{1, 0.3, 0.3, 0.5})
	l, s = var1Moments(t, a, c)
	// Lyapunov residual as an independent check of the solve.
	var ala, res mat.Dense
	ala.Mul(a, l)
	ala.Mul(&ala, a.T())
	res.Sub(l, &ala)
	res.Sub(&res, c)
	if n := mat.Norm(&res, math.Inf(1)); n > 1e-14 {
		t.Errorf("Lyapunov residual %g", n)
	}
	for i, want := range []float64{1.6363001048, 0.8850396845, 0.8850396845, 1.2554285429} {
		checkAbs(t, "VAR(1) Λ", l.At(i/2, i%2), want, 1e-8, workedVats)
	}
	for i, want := range []float64{8.6390532544, 7.7514792899, 7.7514792899, 9.7633136095} {
		checkAbs(t, "VAR(1) Σ", s.At(i/2, i%2), want, 1e-8, workedVats)
	}
	checkAbs(t, "VAR(1) mESS/n", detRatio(l, s), 0.2288852528, 1e-8, workedVats)
}

// Vats, Flegal and Jones 2019 batch means on explicit data: n = 16, p = 2, b = 4.
func TestMultiESSBatchMeansVector(t *testing.T) {
	draws := make([][]float64, 16)
	for i := range draws {
		ti := float64(i)
		draws[i] = []float64{math.Round((math.Sin(0.7*ti)+0.1*ti)*1000) / 1000, math.Round(math.Cos(0.4*ti)*1000) / 1000}
	}
	rows := [][2]float64{{0.0, 1.0}, {0.744, 0.921}, {1.185, 0.697}, {1.163, 0.362}, {0.735, -0.029}, {0.149, -0.416},
		{-0.272, -0.737}, {-0.282, -0.942}, {0.169, -0.998}, {0.917, -0.897}, {1.657, -0.654}, {2.088, -0.307},
		{2.055, 0.087}, {1.619, 0.469}, {1.034, 0.776}, {0.62, 0.96}}
	for i, r := range rows {
		if draws[i][0] != r[0] || draws[i][1] != r[1] {
			t.Fatalf("row %d = %v, %s lists %v", i, draws[i], workedVats, r)
		}
	}
	y := mat.NewDense(16, 2, nil)
	for i, r := range draws {
		y.SetRow(i, r)
	}
	sig := batchMeansCov(y, 4)
	for i, want := range []float64{1.2737182292, 0.4946889167, 0.4946889167, 2.231705} {
		checkAbs(t, "Σ̂_BM", sig.At(i/2, i%2), want, 1e-8, workedVats)
	}
	lam := sampleCov(y)
	for i, want := range []float64{0.5847417625, 0.1124603833, 0.1124603833, 0.5425386} {
		checkAbs(t, "Λ̂", lam.At(i/2, i%2), want, 1e-8, workedVats)
	}
	checkAbs(t, "mESS", MultiESS(draws, 4), 5.4786875072, 1e-8, workedVats)
	checkAbs(t, "mESS, default b = ⌊√16⌋", MultiESS(draws, 0), 5.4786875072, 1e-8, workedVats)
}

// Large-sample check of the batch-means estimator on the VAR(1) of the worked example,
// whose exact mESS/n is 0.2288852528. K = 4 stationary runs of n = 10⁶,
// default b = 1000, a = 1000 batches.
//
// Tolerance on log(mESS/n), derived here. When b ≫ τ the batch means are
// nearly i.i.d. Gaussian, so (a−1)Σ̂ ≈ Σ^{1/2} W Σ^{1/2} with W Wishart(a−1, I);
// Var(log det W) ≈ 2p/(a−1) (sum of trigammas), so log(mESS/n) has sd
// √(2/(p(a−1))) per run (Λ̂'s share is O(τ/n), negligible), and the mean of K
// runs sd/√K. Biases: batch means first order E Σ̂ ≈ Σ − G/b with
// G = Σ_{t≠0}|t|Γ_t = A(I−A)⁻²Λ + (…)ᵀ (common practice for batch means),
// giving |Δlog| ≈ tr(Σ⁻¹G)/(p·b); Jensen's term of the log-determinant,
// (p+1)/(2(a−1)). Tolerance = 4·sd/√K + both biases.
func TestMultiESSOfVAR1(t *testing.T) {
	const n, k, p = 1000000, 4, 2
	a := mat.NewDense(2, 2, []float64{0.5, 0.2, 0.1, 0.7})
	c := mat.NewDense(2, 2, []float64{1, 0.3, 0.3, 0.5})
	lam, sig := var1Moments(t, a, c)
	var cc, cl mat.Cholesky
	cc.Factorize(mat.NewSymDense(2, []float64{1, 0.3, 0.3, 0.5}))
	cl.Factorize(lam)
	var lc, ll mat.TriDense
	cc.LTo(&lc)
	cl.LTo(&ll)

	l00, l10, l11 := ll.At(0, 0), ll.At(1, 0), ll.At(1, 1)
	c00, c10, c11 := lc.At(0, 0), lc.At(1, 0), lc.At(1, 1)
	r := rand.New(rand.NewPCG(51, 53))
	draws := make([][]float64, n)
	flat := make([]float64, 2*n)
	for i := range draws {
		draws[i] = flat[2*i : 2*i+2]
	}
	var sumLog float64
	for range k {
		z0, z1 := r.NormFloat64(), r.NormFloat64()
		y0, y1 := l00*z0, l10*z0+l11*z1 // stationary start
		for i := 0; i < 2*n; i += 2 {
			flat[i], flat[i+1] = y0, y1
			z0, z1 = r.NormFloat64(), r.NormFloat64()
			e0, e1 := c00*z0, c10*z0+c11*z1
			y0, y1 = 0.5*y0+0.2*y1+e0, 0.1*y0+0.7*y1+e1
		}
		sumLog += math.Log(MultiESS(draws, 0) / n)
	}
	got := math.Exp(sumLog / k)

	// Bias terms.
	var ima, inv, inv2, g, gs mat.Dense
	ima.Sub(eye(2), a)
	if err := inv.Inverse(&ima); err != nil {
		t.Fatal(err)
	}
	inv2.Mul(&inv, &inv)
	g.Mul(a, &inv2)
	g.Mul(&g, lam)
	var gt mat.Dense
	gt.CloneFrom(g.T())
	g.Add(&g, &gt)
	var sinv mat.Dense
	if err := sinv.Inverse(sig); err != nil {
		t.Fatal(err)
	}
	gs.Mul(&sinv, &g)
	const b, nb = 1000, 1000
	bias := math.Abs(mat.Trace(&gs))/(p*b) + (p+1)/(2.0*(nb-1))
	sd := math.Sqrt(2 / (p * (nb - 1.0)))
	tol := 4*sd/math.Sqrt(k) + bias
	want := 0.2288852528
	if d := math.Abs(math.Log(got / want)); d > tol {
		t.Errorf("VAR(1) batch-means mESS/n = %.6f, want %.6f: |Δlog| = %.4f > %.4f (%s)", got, want, d, tol, workedVats)
	}
	t.Logf("mESS/n = %.6f (exact %.6f), |Δlog| tolerance %.4f of which bias %.4f", got, want, tol, bias)
}

// minESS (Vats, Flegal and Jones 2019, a formula recalled from memory): the listed values.
func TestMinESSMatchesTheoryVector(t *testing.T) {
	for _, c := range []struct {
		p    int
		want float64
	}{{1, 6146.3341}, {2, 7529.0964}, {5, 8604.9138}, {10, 8830.6302}, {50, 8335.2520}} {
		checkAbs(t, "minESS", MinESS(c.p, 0.05, 0.05), c.want, 5e-5, workedVats+" (printed to 4 decimals), formula from memory")
	}
}

// Exact pairing for the from-memory minESS formula (derived here). The
// (1−α) confidence ellipsoid of a p-dimensional mean estimated from draws
// with CLT covariance Σ is {x: xᵀ(Σ/n)⁻¹x ≤ χ²_{1−α,p}}, of volume
// V_p·(χ²)^{p/2}·det(Σ/n)^{1/2}, V_p the volume of the unit p-ball. Asking
// its p-th root to be ε·(det Λ)^{1/(2p)} and writing
// mESS = n(det Λ/det Σ)^{1/p} gives mESS = V_p^{2/p}·χ²/ε². V_p comes from
// the recursion V_0 = 1, V_1 = 2, V_p = (2π/p)·V_{p−2} (no Γ function), χ²
// from gonum. For p = 1 this is the univariate rule: an interval of
// half-width z_{1−α/2}·σ/√ESS and total length ε·σ needs ESS = (2z/ε)².
func TestMinESSIsConfidenceEllipsoidRule(t *testing.T) {
	vol := []float64{1, 2}
	for p := 2; p <= 60; p++ {
		vol = append(vol, 2*math.Pi/float64(p)*vol[p-2])
	}
	for _, alpha := range []float64{0.05, 0.1, 0.01} {
		for _, eps := range []float64{0.05, 0.2} {
			for p := 1; p <= 60; p++ {
				chi := distuv.ChiSquared{K: float64(p)}.Quantile(1 - alpha)
				want := math.Pow(vol[p], 2/float64(p)) * chi / (eps * eps)
				got := MinESS(p, alpha, eps)
				checkAbs(t, "minESS vs ellipsoid volume", got, want, 1e-11*want, "unit-ball volume recursion")
			}
			z := distuv.UnitNormal.Quantile(1 - alpha/2)
			checkAbs(t, "minESS(1)", MinESS(1, alpha, eps), 4*z*z/(eps*eps), 1e-9*MinESS(1, alpha, eps), "univariate interval length")
		}
	}
}

// Programmer errors panic (RULES: package-prefixed panics); a singular
// covariance from the data is NaN.
func TestPanicsAndNaN(t *testing.T) {
	// A constant coordinate makes Λ̂ singular: NaN, not a panic.
	draws := make([][]float64, 16)
	for i := range draws {
		draws[i] = []float64{float64(i % 3), 1}
	}
	if v := MultiESS(draws, 4); !math.IsNaN(v) {
		t.Errorf("constant coordinate: mESS = %v, want NaN", v)
	}
	for _, f := range []func(){
		func() { MultiESS(draws, 9) },            // one batch
		func() { MultiESS(draws[:1], 0) },        // one draw
		func() { MinESS(0, 0.05, 0.05) },         // p < 1
		func() { MinESS(1, 1, 0.05) },            // α outside (0, 1)
		func() { QuantileMCSE(draws, 1.5) },      // α outside (0, 1)
		func() { NewHistory(1, 1, 8) },           // capacity too small
		func() { NewHistory(2, 2, 16).Add(nil) }, // wrong step length
	} {
		func() {
			defer func() {
				if msg, ok := recover().(string); !ok || !strings.HasPrefix(msg, "diag: ") {
					t.Errorf("panic %q, want a \"diag: \" message", msg)
				}
			}()
			f()
		}()
	}
}
