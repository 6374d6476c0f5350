package benchkit

import (
	"fmt"
	"math"

	"sluice/kernels/targets"
)

// DiagGaussian is N(Mean, diag(Q)⁻¹), the density
//
//	log π(x) = −½ Σᵢ Qᵢ (xᵢ − Meanᵢ)² + const,   ∇log π(x)ᵢ = −Qᵢ (xᵢ − Meanᵢ),
//
// whose gradient costs O(dim) per point. It implements targets.Target and
// allocates nothing.
type DiagGaussian struct {
	Mean, Q []float64
}

var _ targets.Target = (*DiagGaussian)(nil)

// NewDiagGaussian returns the benchmarks' target in dimension dim: mean
// i%7/7 − ½ and precision 1 + i/dim in coordinate i, so the eigenvalues
// lie in [1, 2) and the step Step is stable. It panics if dim < 1.
func NewDiagGaussian(dim int) *DiagGaussian {
	if dim < 1 {
		panic(fmt.Sprintf("benchkit: DiagGaussian of dimension %d", dim))
	}
	g := &DiagGaussian{Mean: make([]float64, dim), Q: make([]float64, dim)}
	for i := range dim {
		g.Mean[i] = float64(i%7)/7 - 0.5
		g.Q[i] = 1 + float64(i)/float64(dim)
	}
	return g
}

// Dim implements targets.Target.
func (g *DiagGaussian) Dim() int { return len(g.Mean) }

// LogDensity implements targets.Target.
func (g *DiagGaussian) LogDensity(x []float64) float64 {
	var s float64
	for i, m := range g.Mean {
		d := x[i] - m
		s += g.Q[i] * d * d
	}
	return -0.5 * s
}

// GradLogDensity implements targets.Target.
func (g *DiagGaussian) GradLogDensity(dst, x []float64) {
	x, dst = x[:len(g.Mean)], dst[:len(g.Mean)]
	for i, m := range g.Mean {
		dst[i] = -(g.Q[i] * (x[i] - m))
	}
}

// Curvature implements targets.Target: the smallest and largest precision.
func (g *DiagGaussian) Curvature() (m, M float64) {
	m, M = math.Inf(1), 0
	for _, v := range g.Q {
		m, M = min(m, v), max(M, v)
	}
	return m, M
}
