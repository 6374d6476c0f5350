package kernels

import (
	"math"
	"math/rand/v2"
	"testing"
)

// covDraws returns n draws of N(0, diag(sd²)) in dimension len(sd), one
// per row, shifted by offset in every coordinate.
func covDraws(rng *rand.Rand, n int, sd []float64, offset float64) []float64 {
	p := len(sd)
	out := make([]float64, n*p)
	for i := range out {
		out[i] = offset + sd[i%p]*rng.NormFloat64()
	}
	return out
}

// covDirect is the shrinkage estimate computed directly, as one would in
// numpy from the n×p data matrix X:
//
//	Xc = X − X.mean(0);  S = Xc.T @ Xc / n;  mu = trace(S)/p
//	d2 = ‖S − mu·I‖²_F / p
//	b2bar = Σ_k ‖outer(Xc[k], Xc[k]) − S‖²_F / p / n²
//	lam = min(b2bar, d2) / d2;  est = lam·mu·I + (1 − lam)·S
//
// (Ledoit and Wolf, J. Multivariate Analysis 88 (2004), Section 3, with
// their norm ‖A‖² = tr(AAᵀ)/p), every outer product formed explicitly.
func covDirect(x []float64, p int) (mean, s, est []float64, lam float64) {
	n := len(x) / p
	mean = make([]float64, p)
	for k := range n {
		for i := range p {
			mean[i] += x[k*p+i] / float64(n)
		}
	}
	xc := make([]float64, len(x))
	for k := range n {
		for i := range p {
			xc[k*p+i] = x[k*p+i] - mean[i]
		}
	}
	s = make([]float64, p*p)
	for k := range n {
		for i := range p {
			for j := range p {
				s[i*p+j] += xc[k*p+i] * xc[k*p+j] / float64(n)
			}
		}
	}
	var mu float64
	for i := range p {
		mu += s[i*p+i] / float64(p)
	}
	var d2, b2 float64
	for i := range p {
		for j := range p {
			e := s[i*p+j]
			if i == j {
				e -= mu
			}
			d2 += e * e / float64(p)
		}
	}
	for k := range n {
		for i := range p {
			for j := range p {
				e := xc[k*p+i]*xc[k*p+j] - s[i*p+j]
				b2 += e * e / float64(p) / float64(n*n)
			}
		}
	}
	lam = math.Min(b2, d2) / d2
	est = make([]float64, p*p)
	for i := range s {
		est[i] = (1 - lam) * s[i]
	}
	for i := range p {
		est[i*p+i] += lam * mu
	}
	return mean, s, est, lam
}

// The pooled mean, covariance and Ledoit–Wolf estimate against the direct
// computation above, with the draws added in uneven batches and away from
// the origin (the shifted sums must not lose digits). Tolerance 1e-9
// relative: both are double-precision evaluations of the same sums, the
// streaming one through a different but stable route.
func TestCovarianceShrinkageMatchesDirect(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	p := 4
	for _, tc := range []struct {
		n      int
		sd     []float64
		offset float64
	}{
		{40, []float64{1, 2, 0.5, 3}, 100},
		{6, []float64{1, 1.1, 0.9, 1}, -3},
		{500, []float64{1, 2, 3, 4}, 0},
	} {
		x := covDraws(rng, tc.n, tc.sd, tc.offset)
		// Correlate the coordinates a little.
		for k := range tc.n {
			x[k*p+1] += 0.5 * x[k*p]
		}
		a := NewCovariance(p)
		for lo, step := 0, 1; lo < tc.n; lo, step = lo+step, step+1 {
			hi := min(lo+step, tc.n)
			a.Add(x[lo*p : hi*p])
		}
		mean, s, est, lam := covDirect(x, p)
		if a.Count() != tc.n {
			t.Fatalf("count %d, want %d", a.Count(), tc.n)
		}
		metricClose(t, "mean", a.Mean(), mean, 1e-9)
		metricClose(t, "S", a.Matrix(), s, 1e-9)
		m, gotLam, err := a.Shrunk()
		if err != nil {
			t.Fatal(err)
		}
		if math.Abs(gotLam-lam) > 1e-9*math.Max(lam, 1e-3) {
			t.Fatalf("n=%d: λ = %.15g, direct %.15g", tc.n, gotLam, lam)
		}
		metricClose(t, "shrunk", m.Matrix(), est, 1e-9)
		if m.Kind() != DenseMetric {
			t.Fatalf("kind %v", m.Kind())
		}
	}
}

// The limits of the shrinkage intensity. With n ≫ p and a covariance far
// from a multiple of I, λ → 0: for Gaussian draws its limit is
// b²/d² with b² = E‖xxᵀ − Σ‖²/n = ((tr Σ)² + tr Σ²)/(pn) and d² = ‖Σ − μI‖²
// (Ledoit and Wolf 2004, Lemma 3.3 and Theorem 3.1; the Gaussian fourth
// moment E‖xxᵀ − Σ‖²_F = (tr Σ)² + tr Σ² is Isserlis' theorem). For
// Σ = diag(1, 4, 9, 16), n = 20000 that is 4.9e-4; the test allows ten
// times it. With Σ = I the target is the truth and λ → 1 as n and p grow
// together: derived here from Isserlis' theorem for uncentred draws,
// E b̄² = (n − 1)(p + 1)/n² and E d² = (p + 1)/n − 2/(np), so λ ≈
// (n − 1)/n, whatever p. At n = 200 < p = 400 that is 0.995 (0.99 for
// the centred draws, one degree of freedom fewer); a few seeds are
// checked, each must give λ ≥ 0.97, and the estimate's condition number
// must be near 1 although S itself is singular.
func TestCovarianceShrinkageLimits(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	a := NewCovariance(4)
	a.Add(covDraws(rng, 20000, []float64{1, 2, 3, 4}, 0))
	_, lam, err := a.Shrunk()
	if err != nil {
		t.Fatal(err)
	}
	const limit = (30.0*30 + 354) / (4 * 20000) / 32.25
	if !(lam > 0 && lam < 10*limit) {
		t.Fatalf("n ≫ p: λ = %v, want about %v", lam, limit)
	}
	for seed := range uint64(3) {
		rng := rand.New(rand.NewPCG(seed, 7))
		p := 400
		sd := make([]float64, p)
		for i := range sd {
			sd[i] = 1
		}
		a := NewCovariance(p)
		a.Add(covDraws(rng, 200, sd, 0))
		m, lam, err := a.Shrunk()
		if err != nil {
			t.Fatal(err)
		}
		t.Logf("seed %d: λ = %.4f", seed, lam)
		if lam < 0.97 {
			t.Fatalf("n < p, seed %d: λ = %v, want near 1", seed, lam)
		}
		if m.Condition() > 1.5 {
			t.Fatalf("n < p, seed %d: condition %v of a nearly scaled identity", seed, m.Condition())
		}
	}
}

// Reset forgets the window; too few draws or no spread are errors; above
// the dense limit the estimate is the diagonal of pooled variances
// (compared with the direct two-pass variances at 1e-9 relative).
func TestCovarianceResetErrorsAndDiagonal(t *testing.T) {
	rng := rand.New(rand.NewPCG(8, 9))
	a := NewCovariance(3)
	a.Add(covDraws(rng, 30, []float64{5, 5, 5}, 10))
	a.Reset()
	if _, _, err := a.Shrunk(); err == nil || a.Count() != 0 {
		t.Fatal("reset accumulator gives an estimate")
	}
	x := covDraws(rng, 25, []float64{1, 2, 3}, 0)
	a.Add(x)
	b := NewCovariance(3)
	b.Add(x)
	ma, _, _ := a.Shrunk()
	mb, _, _ := b.Shrunk()
	if !hitrunEqualBits(ma.Matrix(), mb.Matrix()) {
		t.Fatal("reset accumulator differs from a fresh one")
	}
	c := NewCovariance(2)
	c.Add([]float64{1, 2, 1, 2, 1, 2})
	if _, _, err := c.Shrunk(); err == nil {
		t.Fatal("draws without spread accepted")
	}
	p := MaxDenseMetricDim + 1
	sd := make([]float64, p)
	for i := range sd {
		sd[i] = 1 + float64(i%7)
	}
	x = covDraws(rng, 5, sd, 2)
	d := NewCovariance(p)
	d.Add(x)
	m, lam, err := d.Shrunk()
	if err != nil || m.Kind() != DiagonalMetric || lam != 0 {
		t.Fatalf("above the limit: %v %v %v", m.Kind(), lam, err)
	}
	want := make([]float64, p)
	for i := range p {
		var mean, v float64
		for k := range 5 {
			mean += x[k*p+i] / 5
		}
		for k := range 5 {
			v += (x[k*p+i] - mean) * (x[k*p+i] - mean) / 5
		}
		want[i] = v
	}
	metricClose(t, "variances", m.c, want, 1e-9)
}
