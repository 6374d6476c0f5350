package session

import (
	"math"
	"testing"

	"sluice/kernels"
)

// runLanczos drives a Lanczos probe on the Gaussian with precision
// diag(lam) and returns its estimates.
func runLanczos(t *testing.T, lam []float64, metric *kernels.Metric, x0 []float64, k int) (m, bigM float64, evals int) {
	t.Helper()
	p := len(lam)
	v0 := make([]float64, p)
	for i := range v0 {
		v0[i] = 1 + 0.1*float64(i%3)
	}
	done := false
	pr := newLanczosProbe(x0, metric, k, v0, func(a, b float64, e int) { m, bigM, evals, done = a, b, e, true })
	ans := kernels.NewAnswer(1, p)
	for range 10 * k {
		req := pr.Next()
		for i := range p {
			ans.Grad[i] = -lam[i] * req.Points[i]
		}
		if pr.Tell(ans) {
			break
		}
	}
	if !done {
		t.Fatal("the probe did not finish")
	}
	return m, bigM, evals
}

// On a Gaussian the Hessian is constant, so k ≥ p Lanczos steps give its
// extreme eigenvalues up to the finite differences' rounding: in the
// identity's units min and max of λ; in the metric C = diag(1/λ) both 1
// (LᵀHL = I, exact algebra).
func TestLanczosProbeGaussian(t *testing.T) {
	lam := []float64{1, 3, 10, 30, 100}
	x0 := []float64{0.5, -1, 2, 0.1, 0.3}
	m, bigM, evals := runLanczos(t, lam, nil, x0, 10)
	if math.Abs(m-1) > 1e-6 || math.Abs(bigM-100) > 1e-4 || evals != 6 {
		t.Fatalf("identity: m̂ %v, M̂ %v, %d evaluations; want 1, 100, 6", m, bigM, evals)
	}
	inv := make([]float64, len(lam))
	for i, l := range lam {
		inv[i] = 1 / l
	}
	d, _ := kernels.NewDiagonalMetric(inv)
	m, bigM, _ = runLanczos(t, lam, d, x0, 10)
	if math.Abs(m-1) > 1e-6 || math.Abs(bigM-1) > 1e-6 {
		t.Fatalf("diagonal metric: m̂ %v, M̂ %v; want 1, 1", m, bigM)
	}
	// A dense metric: C = Q·diag(1/λ)·Qᵀ for the rotation Q of the first
	// two coordinates by 30°, so LᵀHL has eigenvalues λ_i·(QᵀC⁻¹... ) — here
	// H = diag(λ) and C⁻¹ = Q diag(λ) Qᵀ, so CH has the eigenvalues of
	// diag(1/λ)·QᵀHQ; computed below for the 2×2 block in closed form.
	c, s := math.Cos(math.Pi/6), math.Sin(math.Pi/6)
	p := len(lam)
	cm := make([]float64, p*p)
	for i := 2; i < p; i++ {
		cm[i*p+i] = 1 / lam[i]
	}
	// 2×2 block Q diag(1/λ0, 1/λ1) Qᵀ.
	a, b := 1/lam[0], 1/lam[1]
	cm[0], cm[1], cm[p], cm[p+1] = c*c*a+s*s*b, c*s*(a-b), c*s*(a-b), s*s*a+c*c*b
	dm, err := kernels.NewDenseMetric(p, cm)
	if err != nil {
		t.Fatal(err)
	}
	m, bigM, _ = runLanczos(t, lam, dm, x0, 10)
	// Eigenvalues of the 2×2 block of C·H: trace T and determinant D.
	h00, h11 := lam[0], lam[1]
	tr := cm[0]*h00 + cm[p+1]*h11
	det := (cm[0]*cm[p+1] - cm[1]*cm[p]) * h00 * h11
	e1, e2 := (tr-math.Sqrt(tr*tr-4*det))/2, (tr+math.Sqrt(tr*tr-4*det))/2
	if math.Abs(m-math.Min(e1, 1)) > 1e-6 || math.Abs(bigM-math.Max(e2, 1)) > 1e-5 {
		t.Fatalf("dense metric: m̂ %v, M̂ %v; want %v, %v", m, bigM, math.Min(e1, 1), math.Max(e2, 1))
	}
}

// The Sturm-bisection extremes of the tridiagonal matrix with 2 on the
// diagonal and −1 beside it are 2 − 2cos(kπ/(n+1)), k = 1 and n (closed
// form, e.g. Golub and Van Loan, section 4.8).
func TestTridiagonalExtremes(t *testing.T) {
	for _, n := range []int{1, 2, 5, 30} {
		a, b := make([]float64, n), make([]float64, max(0, n-1))
		for i := range a {
			a[i] = 2
		}
		for i := range b {
			b[i] = -1
		}
		lo, hi := tridiagonalExtremes(a, b)
		wlo := 2 - 2*math.Cos(math.Pi/float64(n+1))
		whi := 2 - 2*math.Cos(float64(n)*math.Pi/float64(n+1))
		if math.Abs(lo-wlo) > 1e-12 || math.Abs(hi-whi) > 1e-12 {
			t.Fatalf("n = %d: extremes %v, %v; want %v, %v", n, lo, hi, wlo, whi)
		}
	}
}
