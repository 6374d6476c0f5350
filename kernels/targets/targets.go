package targets

import (
	"fmt"
	"math"
)

// Target is a density on R^Dim() with an exact gradient.
//
// Implementations in this package are safe for concurrent use by multiple
// goroutines, and LogDensity and GradLogDensity allocate nothing.
type Target interface {
	Dim() int
	// LogDensity returns log π(x) up to an additive constant.
	LogDensity(x []float64) float64
	// GradLogDensity writes ∇log π(x) into dst (len Dim). dst must not
	// overlap x.
	GradLogDensity(dst, x []float64)
	// Curvature returns m and M of the potential f = −log π (m may be 0).
	Curvature() (m, M float64)
}

// EvalBatch evaluates rows points (row-major, rows×dim) into grad (rows×dim)
// and, if logDensity is non-nil, logDensity (rows). Panics on wrong lengths.
func EvalBatch(t Target, points []float64, rows int, grad, logDensity []float64) {
	if rows < 0 {
		panic(fmt.Sprintf("targets: negative row count %d", rows))
	}
	p := t.Dim()
	n := rows * p
	if len(points) != n {
		panic(fmt.Sprintf("targets: points has length %d, want rows×dim = %d×%d", len(points), rows, p))
	}
	if len(grad) != n {
		panic(fmt.Sprintf("targets: grad has length %d, want rows×dim = %d×%d", len(grad), rows, p))
	}
	if logDensity != nil && len(logDensity) != rows {
		panic(fmt.Sprintf("targets: logDensity has length %d, want rows = %d", len(logDensity), rows))
	}
	for i := range rows {
		x := points[i*p : (i+1)*p : (i+1)*p]
		t.GradLogDensity(grad[i*p:(i+1)*p:(i+1)*p], x)
		if logDensity != nil {
			logDensity[i] = t.LogDensity(x)
		}
	}
}

// checkPoint panics unless x has length p.
func checkPoint(x []float64, p int) {
	if len(x) != p {
		panic(fmt.Sprintf("targets: point has length %d, want dim %d", len(x), p))
	}
}

// checkGrad panics unless dst and x have length p and dst does not start
// where x starts (the gradient is written while x is still being read).
func checkGrad(dst, x []float64, p int) {
	if len(dst) != p {
		panic(fmt.Sprintf("targets: gradient destination has length %d, want dim %d", len(dst), p))
	}
	checkPoint(x, p)
	if p > 0 && &dst[0] == &x[0] {
		panic("targets: gradient destination aliases the point")
	}
}

// allFinite reports whether every element of v is finite.
func allFinite(v []float64) bool {
	for _, a := range v {
		if math.IsNaN(a) || math.IsInf(a, 0) {
			return false
		}
	}
	return true
}

// softplus returns log(1+exp(z)) without overflow or loss of precision.
func softplus(z float64) float64 {
	if z > 0 {
		return z + math.Log1p(math.Exp(-z))
	}
	return math.Log1p(math.Exp(z))
}

// sigmoid returns 1/(1+exp(−z)) without overflow.
func sigmoid(z float64) float64 {
	if z >= 0 {
		return 1 / (1 + math.Exp(-z))
	}
	e := math.Exp(z)
	return e / (1 + e)
}

// dot returns aᵀb; b must be at least as long as a. Four partial sums break
// the floating-point add dependency chain.
func dot(a, b []float64) float64 {
	b = b[:len(a)]
	var s0, s1, s2, s3 float64
	j := 0
	for ; j+4 <= len(a); j += 4 {
		s0 += a[j] * b[j]
		s1 += a[j+1] * b[j+1]
		s2 += a[j+2] * b[j+2]
		s3 += a[j+3] * b[j+3]
	}
	for ; j < len(a); j++ {
		s0 += a[j] * b[j]
	}
	return (s0 + s1) + (s2 + s3)
}

// dotDiff returns aᵀ(x − mu); x and mu must be at least as long as a.
func dotDiff(a, x, mu []float64) float64 {
	x = x[:len(a)]
	mu = mu[:len(a)]
	var s0, s1, s2, s3 float64
	j := 0
	for ; j+4 <= len(a); j += 4 {
		s0 += a[j] * (x[j] - mu[j])
		s1 += a[j+1] * (x[j+1] - mu[j+1])
		s2 += a[j+2] * (x[j+2] - mu[j+2])
		s3 += a[j+3] * (x[j+3] - mu[j+3])
	}
	for ; j < len(a); j++ {
		s0 += a[j] * (x[j] - mu[j])
	}
	return (s0 + s1) + (s2 + s3)
}
