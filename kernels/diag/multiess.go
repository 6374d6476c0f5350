package diag

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat"
	"gonum.org/v1/gonum/stat/distuv"
)

// MultiESS is the multivariate effective sample size of one chain's draws
// Y_1..Y_n ∈ R^p, draws[t][j] (Vats, Flegal and Jones 2019):
//
//	mESS = n·(det Λ̂ / det Σ̂_BM)^{1/p}
//	Λ̂     = sample covariance of the n draws (divisor n − 1)
//	Σ̂_BM  = (b/(a−1))·Σ_k (Ȳ_k − Ȳ)(Ȳ_k − Ȳ)ᵀ over a = ⌊n/b⌋ batch means
//
// Ȳ is the mean of the batch means (the first a·b draws). batch ≤ 0 asks
// for the default b = ⌊√n⌋. It panics unless there are at least two
// batches; it returns NaN when either matrix is not positive definite
// (a constant coordinate, or fewer than p+1 batches).
func MultiESS(draws [][]float64, batch int) float64 {
	n := len(draws)
	if n < 2 {
		panic(fmt.Sprintf("diag: MultiESS needs at least 2 draws, have %d", n))
	}
	p := len(draws[0])
	if p < 1 {
		panic("diag: MultiESS of draws of dimension 0")
	}
	y := mat.NewDense(n, p, nil)
	for t, row := range draws {
		if len(row) != p {
			panic(fmt.Sprintf("diag: draw %d has dimension %d, draw 0 has %d", t, len(row), p))
		}
		y.SetRow(t, row)
	}
	if batch <= 0 {
		batch = isqrt(n)
	}
	if n/batch < 2 {
		panic(fmt.Sprintf("diag: MultiESS with %d draws and batch size %d has fewer than 2 batches", n, batch))
	}
	return capESS(float64(n)*detRatio(sampleCov(y), batchMeansCov(y, batch)), n)
}

// sampleCov is Λ̂, divisor n − 1.
func sampleCov(y *mat.Dense) *mat.SymDense {
	var c mat.SymDense
	stat.CovarianceMatrix(&c, y, nil)
	return &c
}

// batchMeansCov is Σ̂_BM with batch size b over the first ⌊n/b⌋·b rows:
// b times the sample covariance (divisor a − 1) of the batch means.
func batchMeansCov(y *mat.Dense, b int) *mat.SymDense {
	n, p := y.Dims()
	a := n / b
	bm := mat.NewDense(a, p, nil)
	for k := range a {
		row := bm.RawRowView(k)
		for t := k * b; t < (k+1)*b; t++ {
			for j, v := range y.RawRowView(t) {
				row[j] += v
			}
		}
		for j := range row {
			row[j] /= float64(b)
		}
	}
	var sig mat.SymDense
	stat.CovarianceMatrix(&sig, bm, nil)
	sig.ScaleSym(float64(b), &sig)
	return &sig
}

// detRatio is (det Λ / det Σ)^{1/p} for symmetric positive definite Λ and
// Σ, through their Cholesky factors; NaN if either is not positive definite.
func detRatio(lambda, sigma mat.Symmetric) float64 {
	var cl, cs mat.Cholesky
	if !cl.Factorize(lambda) || !cs.Factorize(sigma) {
		return math.NaN()
	}
	return math.Exp((cl.LogDet() - cs.LogDet()) / float64(lambda.SymmetricDim()))
}

// MinESS is the effective sample size needed to estimate a p-dimensional
// mean with relative precision eps at confidence 1 − alpha (Vats, Flegal and Jones 2019,
// from memory there):
//
//	minESS(p, α, ε) = [2^{2/p} π / (p Γ(p/2))^{2/p}] · χ²_{1−α, p} / ε²
//
// Equivalently, the ESS at which the volume of the (1−α) confidence
// ellipsoid of the mean, to the power 1/p, is ε times (det Λ)^{1/(2p)}.
func MinESS(p int, alpha, eps float64) float64 {
	if p < 1 || !(alpha > 0 && alpha < 1) || !(eps > 0) {
		panic(fmt.Sprintf("diag: MinESS(%d, %v, %v) outside p ≥ 1, 0 < α < 1, ε > 0", p, alpha, eps))
	}
	fp := float64(p)
	lg, _ := math.Lgamma(fp / 2)
	logC := (2/fp)*math.Ln2 + math.Log(math.Pi) - (2/fp)*(math.Log(fp)+lg)
	chi := distuv.ChiSquared{K: fp}.Quantile(1 - alpha)
	return math.Exp(logC) * chi / (eps * eps)
}

// isqrt is ⌊√n⌋ for n ≥ 0.
func isqrt(n int) int {
	r := int(math.Sqrt(float64(n)))
	for r*r > n {
		r--
	}
	for (r+1)*(r+1) <= n {
		r++
	}
	return r
}
