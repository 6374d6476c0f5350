package kernels

// Internal tests: the Ozaki test vectors (computed for the project) need the transition with a
// chosen ξ, which only the unexported workspace offers.

import (
	"bytes"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// ozakiEval answers any request for π = N(0, Q⁻¹) with a dense precision q
// (row-major p×p): ∇log π = −Qx, ∇²log π = −Q, (∇²log π)v = −Qv.
func ozakiEval(q []float64, p int) func(*Request, *Answer) {
	mulNeg := func(dst, v []float64) {
		for i := range p {
			var s float64
			for j := range p {
				s += q[i*p+j] * v[j]
			}
			dst[i] = -s
		}
	}
	return func(req *Request, a *Answer) {
		a.Reserve(req.Need, req.Rows, p)
		for r := range req.Rows {
			if req.Need.Has(NeedGradient) {
				mulNeg(a.Grad[r*p:(r+1)*p], req.Points[r*p:(r+1)*p])
			}
			if req.Need.Has(NeedHessian) {
				for i := range q {
					a.Hessian[r*p*p+i] = -q[i]
				}
			}
			if req.Need.Has(NeedHessianVector) {
				mulNeg(a.HessVec[r*p:(r+1)*p], req.Vectors[r*p:(r+1)*p])
			}
		}
	}
}

func ozakiClose(t *testing.T, what string, got, want, tol float64) {
	t.Helper()
	if math.Abs(got-want) > tol*math.Max(1, math.Abs(want)) {
		t.Errorf("%s = %.17g, want %.17g (tolerance %g)", what, got, want, tol)
	}
}

// ozakiTransition factors one transition for step h at a point with score
// s = ∇log π and Hessian hess = ∇²log π (row-major), and returns its mean
// (the move with ξ = 0), its covariance V diag(φ₂) Vᵀ and the workspace.
func ozakiTransition(h float64, x, s, hess []float64) (mean []float64, cov *mat.SymDense, w ozakiWork) {
	p := len(x)
	w = newOzakiWork(p)
	w.factor(hess, p, h)
	mean = append([]float64(nil), x...)
	w.move(mean, s, make([]float64, p), p)
	cov = mat.NewSymDense(p, nil)
	for i := range p {
		for j := i; j < p; j++ {
			var v float64
			for q := range p {
				v += w.v[i*p+q] * w.sphi2[q] * w.sphi2[q] * w.v[j*p+q]
			}
			cov.SetSym(i, j, v)
		}
	}
	return mean, cov, w
}

// Ozaki (1992) step, values computed for the project: φ values at h = 0.1, including the series branch
// (λ = 1e-9) and a negative eigenvalue, where both stay positive.
func TestOzakiPhi(t *testing.T) {
	for _, tc := range []struct{ lam, phi1, phi2 float64 }{
		{2, 0.09063462346100908, 0.16483997698218036},
		{1e-9, 0.099999999995, 0.19999999998},
		{0, 0.1, 0.2},
		{-1, 0.10517091807564763, 0.22140275816016985},
	} {
		ozakiClose(t, fmt.Sprintf("φ₁(%g)", tc.lam), ozakiPhi1(0.1, tc.lam), tc.phi1, 1e-12)
		ozakiClose(t, fmt.Sprintf("φ₂(%g)", tc.lam), ozakiPhi2(0.1, tc.lam), tc.phi2, 1e-12)
	}
	// The two branches meet at |hλ| = 1e-6: the series' truncation error
	// there is below (hλ)³/24 ≈ 4e-20 relative, expm1 is accurate to an ulp.
	for _, x := range []float64{1e-6, -1e-6} {
		lo, hi := math.Nextafter(x, 0), x
		for _, f := range []func(h, l float64) float64{ozakiPhi1, ozakiPhi2} {
			a, b := f(1, lo), f(1, hi)
			if math.Abs(a-b) > 1e-15*math.Abs(b) {
				t.Errorf("series %v and expm1 %v disagree at hλ = %g", a, b, x)
			}
		}
	}
	for _, l := range []float64{-1e-3, -5, -100} {
		if !(ozakiPhi1(0.2, l) > 0 && ozakiPhi2(0.2, l) > 0) {
			t.Errorf("φ not positive at λ = %v", l)
		}
	}
}

// Ozaki (1992) step, values computed for the project, 1-D example: f(θ) = log(1+e^θ) + θ²/2 at θ = 0.5,
// h = 0.1; the move with ξ = 0.3 gives θ' = mean + √variance·0.3.
func TestOzakiSoftplus1D(t *testing.T) {
	th, h := 0.5, 0.1
	sig := 1 / (1 + math.Exp(-th))
	g, hf := sig+th, sig*(1-sig)+1 // ∇f and ∇²f
	ozakiClose(t, "g", g, 1.1224593312018545, 1e-12)
	ozakiClose(t, "H", hf, 1.2350037122015944, 1e-12)
	mean, cov, w := ozakiTransition(h, []float64{th}, []float64{-g}, []float64{-hf})
	ozakiClose(t, "mean", mean[0], 0.3944085350908374, 1e-12)
	ozakiClose(t, "variance", cov.At(0, 0), 0.17721395025493536, 1e-12)
	x := []float64{th}
	w.move(x, []float64{-g}, []float64{0.3}, 1)
	ozakiClose(t, "θ'", x[0], 0.5206988970467055, 1e-12)
}

// Ozaki (1992) step, values computed for the project, 2-D example: H = [[2, .5], [.5, 1]], θ = (1, −1),
// g = Hθ + (0.1, 0), h = 0.2. The kernel's noise is V diag(√φ₂)ξ, the
// vector's is L z with the lower Cholesky factor L of Σ (gonum); the same
// Σ makes both the same law, and L z + mean must give the vector's θ'.
func TestOzaki2DVector(t *testing.T) {
	hf := []float64{2, .5, .5, 1}
	th := []float64{1, -1}
	g := []float64{hf[0]*th[0] + hf[1]*th[1] + 0.1, hf[2]*th[0] + hf[3]*th[1]}
	s := []float64{-g[0], -g[1]}
	hess := []float64{-2, -.5, -.5, -1}
	mean, cov, w := ozakiTransition(0.2, th, s, hess)
	ozakiClose(t, "mean[0]", mean[0], 0.7317287155, 1e-9)
	ozakiClose(t, "mean[1]", mean[1], -0.8960746547, 1e-9)
	want := [2][2]float64{{0.2769742874, -0.0272554536}, {-0.0272554536, 0.3314851946}}
	for i := range 2 {
		for j := range 2 {
			ozakiClose(t, fmt.Sprintf("Σ[%d][%d]", i, j), cov.At(i, j), want[i][j], 1e-9)
		}
	}
	var ch mat.Cholesky
	if !ch.Factorize(cov) {
		t.Fatal("Σ not positive definite")
	}
	var l mat.TriDense
	ch.LTo(&l)
	wantL := [2][2]float64{{0.5262834667, 0}, {-0.0517885424, 0.5734135868}}
	for i := range 2 {
		for j := range 2 {
			ozakiClose(t, fmt.Sprintf("L[%d][%d]", i, j), l.At(i, j), wantL[i][j], 1e-9)
		}
	}
	z := []float64{0.3, -0.7}
	wantX := []float64{0.8896137555, -1.3130007281}
	for i := range 2 {
		ozakiClose(t, fmt.Sprintf("θ'[%d]", i), l.At(i, 0)*z[0]+l.At(i, 1)*z[1]+mean[i], wantX[i], 1e-9)
	}

	// The kernel's own step, with the stream's normals ξ: θ' − mean =
	// V diag(√φ₂)ξ, so (θ' − mean)ᵀΣ⁻¹(θ' − mean) = ‖ξ‖² whatever the
	// signs of the eigenvectors. Σ and the mean from the vector above.
	const seed = 11
	k := NewOzaki(2, 1, 0.2, th, NewSource(seed))
	req := k.Next()
	if req.Need != NeedGradient|NeedHessian || req.Rows != 1 || req.Chain[0] != 0 {
		t.Fatalf("request %+v", req)
	}
	k.Tell(&Answer{Grad: s, Hessian: hess})
	xi := randNormals(seed, 2)
	d := []float64{k.Positions()[0] - 0.7317287155, k.Positions()[1] + 0.8960746547}
	var inv mat.Dense
	if err := inv.Inverse(mat.NewDense(2, 2, []float64{want[0][0], want[0][1], want[1][0], want[1][1]})); err != nil {
		t.Fatal(err)
	}
	var q float64
	for i := range 2 {
		for j := range 2 {
			q += d[i] * inv.At(i, j) * d[j]
		}
	}
	ozakiClose(t, "Mahalanobis norm of the kernel's noise", q, xi[0]*xi[0]+xi[1]*xi[1], 1e-8)
	// And the step is the workspace's move with those normals.
	x := append([]float64(nil), th...)
	w.move(x, s, xi, 2)
	for i := range 2 {
		if x[i] != k.Positions()[i] {
			t.Errorf("Tell gave %v, the move with the stream's normals %v", k.Positions(), x)
		}
	}
}

// Derived here (Ozaki is exact for Gaussians): for a Gaussian target the step is the exact diffusion
// transition, mean e^{−hQ}θ and covariance Q⁻¹(I − e^{−2hQ}).
//
// Erratum: the reference sheet gave its 2-D vector for h = 0.2, but its numbers are
// those of h = 0.5 (recomputed with gonum's mat.Exp in
// TestOzakiAgainstMatrixExponential's way, and by hand with scipy's expm:
// at h = 0.2 the covariance is the 2-D example's Σ, which the same Q and h must give,
// and is checked below).
func TestOzakiExactGaussianStep(t *testing.T) {
	mean, cov, _ := ozakiTransition(0.5, []float64{1}, []float64{-2}, []float64{-2})
	ozakiClose(t, "1-D mean", mean[0], 0.36787944117144233, 1e-12)
	ozakiClose(t, "1-D variance", cov.At(0, 0), 0.43233235838169365, 1e-12)

	q := []float64{-2, -.5, -.5, -1}
	_, cov, _ = ozakiTransition(0.2, []float64{1, -1}, []float64{-1.5, 0.5}, q)
	sigma13 := [2][2]float64{{0.2769742874, -0.0272554536}, {-0.0272554536, 0.3314851946}} // the 2-D example
	for i := range 2 {
		for j := range 2 {
			ozakiClose(t, fmt.Sprintf("h = 0.2 Σ[%d][%d]", i, j), cov.At(i, j), sigma13[i][j], 1e-9)
		}
	}
	e := mat.NewDense(2, 2, []float64{-0.4, -0.1, -0.1, -0.2}) // −hQ at h = 0.2
	var ex mat.Dense
	ex.Exp(e)
	mean, _, _ = ozakiTransition(0.2, []float64{1, -1}, []float64{-1.5, 0.5}, q)
	for i := range 2 {
		ozakiClose(t, fmt.Sprintf("h = 0.2 mean[%d] against mat.Exp", i), mean[i], ex.At(i, 0)-ex.At(i, 1), 1e-12)
	}

	mean, cov, _ = ozakiTransition(0.5, []float64{1, -1}, []float64{-1.5, 0.5}, q)
	ozakiClose(t, "2-D mean[0]", mean[0], 0.5021982768, 1e-9)
	ozakiClose(t, "2-D mean[1]", mean[1], -0.7433328828, 1e-9)
	want := [2][2]float64{{0.4452986477, -0.1015519402}, {-0.1015519402, 0.6484025281}}
	for i := range 2 {
		for j := range 2 {
			ozakiClose(t, fmt.Sprintf("2-D Σ[%d][%d]", i, j), cov.At(i, j), want[i][j], 1e-9)
		}
	}
}

// ozakiRandomSym returns a p×p symmetric matrix V diag(eig) Vᵀ with a
// random orthogonal V (QR of a Gaussian matrix, gonum), row-major.
func ozakiRandomSym(rng *rand.Rand, eig []float64) []float64 {
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
	out := make([]float64, p*p)
	for i := range p {
		for j := range p {
			var s float64
			for k := range p {
				s += q.At(i, k) * eig[k] * q.At(j, k)
			}
			out[i*p+j] = s
		}
	}
	return out
}

// The transition against gonum's matrix exponential (mat.Exp) and inverse
// on random 5×5 matrices, definite and indefinite: mean
// θ − A⁻¹(I − e^{−hA})g and covariance A⁻¹(I − e^{−2hA}) (Ozaki 1992).
func TestOzakiAgainstMatrixExponential(t *testing.T) {
	rng := rand.New(NewSource(21))
	for _, eig := range [][]float64{{0.3, 1, 2, 4, 7}, {-0.8, -0.1, 0.5, 1.5, 3}} {
		const p, h = 5, 0.3
		a := ozakiRandomSym(rng, eig)
		x, g := make([]float64, p), make([]float64, p)
		for i := range p {
			x[i], g[i] = rng.NormFloat64(), rng.NormFloat64()
		}
		hess, s := make([]float64, p*p), make([]float64, p)
		for i := range a {
			hess[i] = -a[i]
		}
		for i := range g {
			s[i] = -g[i]
		}
		mean, cov, _ := ozakiTransition(h, x, s, hess)

		am := mat.NewDense(p, p, a)
		var ainv, e1, e2, m1, m2 mat.Dense
		if err := ainv.Inverse(am); err != nil {
			t.Fatal(err)
		}
		var ha mat.Dense
		ha.Scale(-h, am)
		e1.Exp(&ha)
		ha.Scale(-2*h, am)
		e2.Exp(&ha)
		id := mat.NewDiagDense(p, nil)
		for i := range p {
			id.SetDiag(i, 1)
		}
		m1.Sub(id, &e1)
		m1.Mul(&ainv, &m1)
		m2.Sub(id, &e2)
		m2.Mul(&ainv, &m2)
		var step mat.VecDense
		step.MulVec(&m1, mat.NewVecDense(p, g))
		for i := range p {
			ozakiClose(t, fmt.Sprintf("eig %v mean[%d]", eig, i), mean[i], x[i]-step.AtVec(i), 1e-10)
			for j := range p {
				ozakiClose(t, fmt.Sprintf("eig %v Σ[%d][%d]", eig, i, j), cov.At(i, j), m2.At(i, j), 1e-10)
			}
		}
	}
}

// Derived here: Ozaki is exact for Gaussians, so its stationary law is
// N(0, Q⁻¹) for any h. With Q = [[2, .5], [.5, 1]] and h = 2.0, far above
// the LMC stability limit 2/λ_max = 0.906 (derived here), the means and every
// covariance entry must be within 4 MCSE of 0 and Q⁻¹, while LMC at the
// same step diverges (|1 − hλ_max| = 3.41 > 1).
func TestOzakiGaussianStationary(t *testing.T) {
	q := []float64{2, .5, .5, 1}
	cov := [2][2]float64{{0.5714285714285714, -0.2857142857142857}, {-0.2857142857142857, 1.1428571428571428}}
	k := NewOzaki(2, 16, 2.0, []float64{3, -3}, NewSource(4))
	d := driveKernel(k, ozakiEval(q, 2), 100, 4100)
	for i := range 2 {
		est, se := statOf(d, func(x []float64) float64 { return x[i] })
		if z := est / se; math.Abs(z) > 4 {
			t.Errorf("mean[%d] = %.5f, exact 0, MCSE %.5f (z = %.1f)", i, est, se, z)
		}
		for j := i; j < 2; j++ {
			est, se := statOf(d, func(x []float64) float64 { return x[i] * x[j] })
			if z := (est - cov[i][j]) / se; math.Abs(z) > 4 {
				t.Errorf("Σ[%d][%d] = %.5f, exact %.5f, MCSE %.5f (z = %.1f)", i, j, est, cov[i][j], se, z)
			}
		}
	}
	l := NewLMC(2, 1, 2.0, []float64{3, -3}, NewSource(4))
	a := NewAnswer(1, 2)
	for range 100 {
		ozakiEval(q, 2)(l.Next(), a)
		l.Tell(a)
	}
	if x := l.Positions(); !(math.Abs(x[0])+math.Abs(x[1]) > 1e20) {
		t.Errorf("LMC at h = 2 stayed at %v", x)
	}
}

// One OzakiKrylov step against the dense transition on random 80×80
// matrices: the step θ' = θ + φ₁(A)s + √φ₂(A)ξ computed with gonum's
// mat.EigenSym, for tolerances 1e-4 … 1e-10 and spectra mild, indefinite
// and stiff (hλ up to 100). The error relative to ‖φ₁(A)s‖ + ‖√φ₂(A)ξ‖ must
// stay below 10·tol, the kernel must report every vector converged, and
// the reported estimate must lie below tol (Ozaki 1992; the Lanczos
// approximation of f(A)b is common practice).
func TestOzakiKrylovAccuracy(t *testing.T) {
	const p, chains = 80, 2
	rng := rand.New(NewSource(8))
	spectra := map[string]struct {
		lo, hi, h float64
	}{"mild": {0.1, 10, 0.5}, "indefinite": {-1, 10, 0.5}, "stiff": {0.01, 1000, 0.1}}
	for _, name := range []string{"mild", "indefinite", "stiff"} {
		sp := spectra[name]
		eig := make([]float64, p)
		for i := range eig {
			eig[i] = sp.lo * math.Pow(sp.hi/sp.lo, float64(i)/(p-1))
			if sp.lo < 0 {
				eig[i] = sp.lo + (sp.hi-sp.lo)*float64(i)/(p-1)
			}
		}
		a := ozakiRandomSym(rng, eig)
		x := make([]float64, chains*p)
		s := make([]float64, chains*p)
		for i := range x {
			x[i], s[i] = rng.NormFloat64(), 3*rng.NormFloat64()
		}
		var es mat.EigenSym
		if !es.Factorize(mat.NewSymDense(p, append([]float64(nil), a...)), true) {
			t.Fatal("reference eigendecomposition failed")
		}
		var v mat.Dense
		es.VectorsTo(&v)
		lam := es.Values(nil)
		apply := func(f func(l float64) float64, b []float64) []float64 {
			out := make([]float64, p)
			for q := range p {
				var c float64
				for i := range p {
					c += v.At(i, q) * b[i]
				}
				c *= f(lam[q])
				for i := range p {
					out[i] += v.At(i, q) * c
				}
			}
			return out
		}
		for _, tol := range []float64{1e-4, 1e-7, 1e-10} {
			const seed = 5
			k := NewOzakiKrylov(p, chains, sp.h, x, tol, p, NewSource(seed))
			xi := randNormals(seed, chains*p)
			eval := func(req *Request, ans *Answer) {
				ans.Reserve(req.Need, req.Rows, p)
				for r := range req.Rows {
					c := req.Chain[r]
					if req.Need.Has(NeedGradient) {
						copy(ans.Grad[r*p:(r+1)*p], s[c*p:(c+1)*p])
					}
					vr, hv := req.Vectors[r*p:(r+1)*p], ans.HessVec[r*p:(r+1)*p]
					for i := range p {
						var acc float64
						for j := range p {
							acc += a[i*p+j] * vr[j]
						}
						hv[i] = -acc
					}
				}
			}
			ans := &Answer{}
			for done := false; !done; {
				eval(k.Next(), ans)
				done = k.Tell(ans)
			}
			st := k.LastStep()
			for c := range chains {
				u1 := apply(func(l float64) float64 { return ozakiPhi1(sp.h, l) }, s[c*p:(c+1)*p])
				u2 := apply(func(l float64) float64 { return ozakiSqrtPhi2(sp.h, l) }, xi[c*p:(c+1)*p])
				var e2, n1, n2 float64
				for i := range p {
					want := x[c*p+i] + u1[i] + u2[i]
					e2 += (k.Positions()[c*p+i] - want) * (k.Positions()[c*p+i] - want)
					n1 += u1[i] * u1[i]
					n2 += u2[i] * u2[i]
				}
				rel := math.Sqrt(e2) / (math.Sqrt(n1) + math.Sqrt(n2))
				t.Logf("%s tol %g chain %d: relative error %.2e, estimate %.2e, iterations ≤ %d, rows %d",
					name, tol, c, rel, st.MaxEstimate, st.MaxIterations, st.Rows)
				if rel > 10*tol {
					t.Errorf("%s tol %g chain %d: relative error %.2e above 10·tol", name, tol, c, rel)
				}
			}
			if st.Unconverged != 0 || !(st.MaxEstimate < tol) {
				t.Errorf("%s tol %g: %d unconverged, estimate %g", name, tol, st.Unconverged, st.MaxEstimate)
			}
			if k.EvaluationsPerStep() != st.Rows {
				t.Errorf("EvaluationsPerStep %d, last step rows %d", k.EvaluationsPerStep(), st.Rows)
			}
		}
	}
}

// Derived here (Ozaki is exact for Gaussians), through the Krylov mode: on N(0, Q⁻¹) with a random
// 24×24 Q (eigenvalues 0.5 … 5) and h = 1.0 (LMC needs h < 0.4), tol 1e-8
// and fewer Lanczos iterations than the dimension, the stationary law is
// N(0, Q⁻¹): E[xᵀQx] = p, and the variances along the softest and stiffest
// eigenvectors are 1/λ, each within 4 MCSE.
func TestOzakiKrylovGaussianStationary(t *testing.T) {
	const p = 24
	rng := rand.New(NewSource(12))
	eig := make([]float64, p)
	for i := range eig {
		eig[i] = 0.5 + 4.5*float64(i)/(p-1)
	}
	q := ozakiRandomSym(rng, eig)
	var es mat.EigenSym
	es.Factorize(mat.NewSymDense(p, append([]float64(nil), q...)), true)
	var v mat.Dense
	es.VectorsTo(&v)
	lam := es.Values(nil)
	k := NewOzakiKrylov(p, 4, 1.0, make([]float64, p), 1e-8, p, NewSource(13))
	d := driveKernel(k, ozakiEval(q, p), 50, 450)
	if it := k.LastStep().MaxIterations; it >= p {
		t.Fatalf("Lanczos used %d iterations: the Krylov space was exhausted, not approximated", it)
	} else {
		t.Logf("Lanczos iterations per vector ≤ %d of %d", it, p)
	}
	est, se := statOf(d, func(x []float64) float64 {
		var s float64
		for i := range p {
			for j := range p {
				s += x[i] * q[i*p+j] * x[j]
			}
		}
		return s
	})
	if z := (est - p) / se; math.Abs(z) > 4 {
		t.Errorf("E[xᵀQx] = %.3f, exact %d, MCSE %.3f (z = %.1f)", est, p, se, z)
	}
	for _, col := range []int{0, p - 1} {
		est, se := statOf(d, func(x []float64) float64 {
			var s float64
			for i := range p {
				s += v.At(i, col) * x[i]
			}
			return s * s
		})
		if z := (est - 1/lam[col]) / se; math.Abs(z) > 4 {
			t.Errorf("variance along λ = %.3f: %.4f, exact %.4f, MCSE %.4f (z = %.1f)", lam[col], est, 1/lam[col], se, z)
		}
	}
}

// Request layout and evaluation accounting (by the method's definition: LMCO costs one
// gradient and one Hessian per chain per step).
func TestOzakiEvaluationsPerStep(t *testing.T) {
	k := NewOzaki(3, 5, 0.1, make([]float64, 3), NewSource(1))
	if k.EvaluationsPerStep() != 5 {
		t.Fatalf("evaluations per step %d, want 5", k.EvaluationsPerStep())
	}
	q := []float64{1, 0, 0, 0, 2, 0, 0, 0, 3}
	var rows int
	a := &Answer{}
	for range 7 {
		req := k.Next()
		if req.Need != NeedGradient|NeedHessian || req.Rows != 5 || &req.Points[0] != &k.Positions()[0] {
			t.Fatalf("request %+v", req)
		}
		rows += req.Rows
		ozakiEval(q, 3)(req, a)
		if !k.Tell(a) {
			t.Fatal("Tell did not complete a step")
		}
	}
	if rows != 35 || k.Steps() != 7 {
		t.Fatalf("rows %d steps %d, want 35 and 7", rows, k.Steps())
	}

	// Krylov mode: the first request asks gradients and products for every
	// chain, the others products only, at each row's chain position; the
	// rows of a step add up to LastStep().Rows.
	kk := NewOzakiKrylov(3, 2, 0.1, []float64{1, 2, 3, 4, 5, 6}, 1e-8, 3, NewSource(2))
	if kk.EvaluationsPerStep() != 2*2*3 {
		t.Fatalf("bound before the first step %d, want 12", kk.EvaluationsPerStep())
	}
	rows = 0
	for first, done := true, false; !done; first = false {
		req := kk.Next()
		want := NeedHessianVector
		if first {
			want |= NeedGradient
			if req.Rows != 2 {
				t.Fatalf("first request has %d rows", req.Rows)
			}
		}
		if req.Need != want || req.Rows < 1 || req.Rows > 4 {
			t.Fatalf("request need %v rows %d", req.Need, req.Rows)
		}
		for r := range req.Rows {
			c := req.Chain[r]
			for i := range 3 {
				if req.Points[r*3+i] != kk.Positions()[c*3+i] {
					t.Fatalf("row %d is not chain %d's position", r, c)
				}
			}
		}
		rows += req.Rows
		ozakiEval(q, 3)(req, a)
		done = kk.Tell(a)
	}
	if rows != kk.LastStep().Rows || kk.EvaluationsPerStep() != rows || kk.Steps() != 1 {
		t.Fatalf("rows %d, LastStep %+v, EvaluationsPerStep %d", rows, kk.LastStep(), kk.EvaluationsPerStep())
	}
}

// A checkpointed kernel resumes bit for bit; the Krylov kernel also from a
// state taken in the middle of a step.
func TestOzakiStateRoundTrip(t *testing.T) {
	q := []float64{2, .5, 0, .5, 1, .2, 0, .2, 3}
	eval := ozakiEval(q, 3)
	cases := []struct {
		name     string
		k, blank interface {
			Kernel
			Checkpointer
		}
		tells int
	}{
		{"dense", NewOzaki(3, 3, 0.3, []float64{1, -1, 0.5}, NewSource(5)), &Ozaki{}, 10},
		{"krylov", NewOzakiKrylov(3, 3, 0.3, []float64{1, -1, 0.5}, 1e-6, 2, NewSource(5)), &OzakiKrylov{}, 7},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			a := &Answer{}
			for range tc.tells {
				eval(tc.k.Next(), a)
				tc.k.Tell(a)
			}
			state, err := tc.k.MarshalBinary()
			if err != nil {
				t.Fatal(err)
			}
			r := tc.blank
			if err := r.UnmarshalBinary(state); err != nil {
				t.Fatal(err)
			}
			if r.Steps() != tc.k.Steps() || r.Dim() != 3 || r.Chains() != 3 {
				t.Fatalf("restored header wrong: steps %d dim %d chains %d", r.Steps(), r.Dim(), r.Chains())
			}
			if tc.name == "krylov" && tc.k.Next().Rows == 3 && tc.k.Next().Need.Has(NeedGradient) {
				t.Fatal("state taken at a step boundary; the test wants one mid-step")
			}
			want := driveKernel(tc.k, eval, 0, tc.k.Steps()+20)
			got := driveKernel(r, eval, 0, r.Steps()+20)
			for i := range want {
				for c := range want[i] {
					for s := range want[i][c] {
						if want[i][c][s] != got[i][c][s] {
							t.Fatalf("resumed draw differs at coord %d chain %d step %d", i, c, s)
						}
					}
				}
			}
			again, _ := r.MarshalBinary()
			now, _ := tc.k.MarshalBinary()
			if !bytes.Equal(again, now) {
				t.Fatal("states differ after identical continuation")
			}
			if err := r.UnmarshalBinary(state[:30]); err == nil {
				t.Fatal("truncated state accepted")
			}
			if err := r.UnmarshalBinary(state[:len(state)-30]); err == nil {
				t.Fatal("state without its random stream accepted")
			}
			if err := r.UnmarshalBinary([]byte("sluice.lmc.v1 not ours")); err == nil {
				t.Fatal("foreign state accepted")
			}
		})
	}
}

// A warmed-up step allocates nothing: dsyev is called on
// the preallocated workspace.
func TestOzakiStepAllocatesNothing(t *testing.T) {
	q := make([]float64, 100)
	for i := range 10 {
		q[i*10+i] = float64(i + 1)
		if i > 0 {
			q[i*10+i-1], q[(i-1)*10+i] = 0.3, 0.3
		}
	}
	eval := ozakiEval(q, 10)
	k := NewOzaki(10, 8, 0.1, make([]float64, 10), NewSource(1))
	a := &Answer{}
	eval(k.Next(), a)
	if n := testing.AllocsPerRun(50, func() { k.Tell(a) }); n != 0 {
		t.Errorf("dense: %v allocations per step", n)
	}
	kk := NewOzakiKrylov(10, 8, 0.1, make([]float64, 10), 1e-8, 10, NewSource(1))
	b := &Answer{}
	b.Reserve(NeedGradient|NeedHessianVector, 16, 10)
	step := func() {
		for {
			eval(kk.Next(), b)
			if kk.Tell(b) {
				return
			}
		}
	}
	for range 5 {
		step()
	}
	if n := testing.AllocsPerRun(50, step); n != 0 {
		t.Errorf("krylov: %v allocations per step", n)
	}
}

func TestOzakiPanicsOnProgrammerErrors(t *testing.T) {
	for name, f := range map[string]func(){
		"zero step":      func() { NewOzaki(1, 1, 0, []float64{0}, NewSource(1)) },
		"infinite step":  func() { NewOzaki(1, 1, math.Inf(1), []float64{0}, NewSource(1)) },
		"bad start":      func() { NewOzaki(2, 2, 0.1, []float64{0, 0, 0}, NewSource(1)) },
		"no Hessian":     func() { NewOzaki(2, 1, 0.1, []float64{0, 0}, NewSource(1)).Tell(&Answer{Grad: []float64{0, 0}}) },
		"krylov tol":     func() { NewOzakiKrylov(2, 1, 0.1, []float64{0, 0}, 0, 2, NewSource(1)) },
		"krylov maxIter": func() { NewOzakiKrylov(2, 1, 0.1, []float64{0, 0}, 1e-6, 0, NewSource(1)) },
		"krylov products": func() {
			NewOzakiKrylov(2, 1, 0.1, []float64{0, 0}, 1e-6, 2, NewSource(1)).Tell(&Answer{Grad: []float64{0, 0}})
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

// BenchmarkOzakiStep reports one step over all chains with the answers
// already supplied. dense: the whole step; eigen: dsyev alone for one
// chain (the O(p³) share); krylov: a whole Krylov step with a diagonal
// Hessian (eigenvalues 1 … 10, h = 0.1, tol 1e-8), the products being the
// benchmark's O(p) work.
func BenchmarkOzakiStep(b *testing.B) {
	for _, p := range []int{10, 100, 1000} {
		chains := 8
		if p == 1000 {
			chains = 1
		}
		hess := make([]float64, chains*p*p)
		for c := range chains {
			for i := range p {
				hess[c*p*p+i*p+i] = -1 - 9*float64(i)/float64(p)
				if i > 0 {
					hess[c*p*p+i*p+i-1], hess[c*p*p+(i-1)*p+i] = -0.1, -0.1
				}
			}
		}
		a := &Answer{Grad: make([]float64, chains*p), Hessian: hess}
		b.Run(fmt.Sprintf("dense/p=%d/chains=%d", p, chains), func(b *testing.B) {
			k := NewOzaki(p, chains, 0.1, make([]float64, p), NewSource(1))
			b.ReportAllocs()
			for b.Loop() {
				k.Next()
				k.Tell(a)
			}
		})
		b.Run(fmt.Sprintf("eigen/p=%d/chains=1", p), func(b *testing.B) {
			w := newOzakiWork(p)
			b.ReportAllocs()
			for b.Loop() {
				w.factor(hess[:p*p], p, 0.1)
			}
		})
		b.Run(fmt.Sprintf("krylov/p=%d/chains=8", p), func(b *testing.B) {
			k := NewOzakiKrylov(p, 8, 0.1, make([]float64, p), 1e-8, p, NewSource(1))
			ans := &Answer{}
			ans.Reserve(NeedGradient|NeedHessianVector, 16, p)
			for i := range ans.Grad {
				ans.Grad[i] = 1
			}
			eval := func(req *Request) {
				for r := range req.Rows {
					for i := range p {
						ans.HessVec[r*p+i] = -(1 + 9*float64(i)/float64(p)) * req.Vectors[r*p+i]
					}
				}
			}
			b.ReportAllocs()
			var iters int
			for b.Loop() {
				for {
					eval(k.Next())
					if k.Tell(ans) {
						break
					}
				}
				iters = k.LastStep().MaxIterations
			}
			b.ReportMetric(float64(iters), "lanczos-iters")
		})
	}
}
