package bound

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/integrate/quad"
)

// ShiftTV against a numerical integral (gonum's Gauss–Legendre rule) of
// ½∫|p − q| for two 2-D Gaussians N(a, M⁻¹I), N(b, M⁻¹I) with a − b along
// the first axis: the densities cross on the line x₁ = d/2, so the
// integral is split there and each piece is smooth. This checks the
// closed form erf(r√M/(2√2)) and its reduction to one dimension, and the
// linear bound r√M/√(2π) above it.
func TestShiftTVMatchesIntegral(t *testing.T) {
	for _, c := range []struct{ r, M float64 }{{0.01, 1}, {0.3, 4}, {1, 1}, {2.5, 0.5}} {
		sd := 1 / math.Sqrt(c.M)
		phi := func(x float64) float64 { return math.Exp(-x*x/(2*sd*sd)) / (sd * math.Sqrt(2*math.Pi)) }
		half := func(lo, hi float64) float64 {
			return quad.Fixed(func(x float64) float64 {
				inner := quad.Fixed(func(y float64) float64 {
					return phi(y) * math.Abs(phi(x)-phi(x-c.r))
				}, -12*sd, 12*sd, 200, nil, 0)
				return inner
			}, lo, hi, 400, nil, 0)
		}
		tv := 0.5 * (half(-14*sd, c.r/2) + half(c.r/2, c.r+14*sd))
		got := ShiftTV(c.r, c.M)
		if math.Abs(got-tv) > 1e-9 {
			t.Errorf("r %v M %v: ShiftTV %.12g, integral %.12g", c.r, c.M, got, tv)
		}
		if lin := c.r * math.Sqrt(c.M) / math.Sqrt(2*math.Pi); !(got <= lin) {
			t.Errorf("r %v M %v: ShiftTV %v above the linear bound %v", c.r, c.M, got, lin)
		}
	}
}

// ShiftRadius inverts ShiftTV from below.
func TestShiftRadiusInverts(t *testing.T) {
	for _, tv := range []float64{1e-6, 0.01, 0.049, 0.3} {
		for _, M := range []float64{0.25, 1, 400} {
			r := ShiftRadius(tv, M)
			if got := ShiftTV(r, M); !(got <= tv) || !(got > tv*(1-1e-9)) {
				t.Errorf("tv %v M %v: ShiftTV(ShiftRadius) = %.17g", tv, M, got)
			}
		}
	}
}

// On the quadratic f(x) = ½(m·x₁² + M·x₂²) (m-strongly convex, M-smooth),
// gradient descent with step 2/(m+M) multiplies x₁ by (M−m)/(M+m) and x₂
// by −(M−m)/(M+m) exactly (derived here), the contraction of Nesterov's
// (2004) Theorem 2.1.15; the iterations it needs to certify a radius r,
// counted by running it, never exceed ModeSearchIterations.
func TestModeSearchIterationsSuffice(t *testing.T) {
	for _, c := range []struct{ m, M, r float64 }{{1, 1, 0.01}, {0.5, 1, 0.025}, {1, 4, 1e-3}, {0.01, 1, 1e-4}} {
		h := ModeSearchStep(c.m, c.M)
		x := []float64{30, -17}
		grad := func() (float64, float64) { return c.m * x[0], c.M * x[1] }
		g1, g2 := grad()
		r0 := math.Hypot(g1, g2) / c.m
		bound := ModeSearchIterations(c.m, c.M, r0, c.r)
		k := 0
		for ; math.Hypot(g1, g2)/c.m > c.r; k++ {
			if k > bound {
				t.Fatalf("%+v: radius %v after %d steps, the bound says %d suffice", c, math.Hypot(g1, g2)/c.m, k, bound)
			}
			x[0] -= h * g1
			x[1] -= h * g2
			g1, g2 = grad()
		}
		if k > bound || bound < 0 {
			t.Fatalf("%+v: took %d steps, bound %d", c, k, bound)
		}
		t.Logf("%+v: %d steps, bound %d", c, k, bound)
	}
	if ModeSearchIterations(1, 1, 5, 10) != 0 || ModeSearchIterations(0, 1, 5, 1) != -1 || ModeSearchIterations(1e-12, 1, 1e300, 1e-300) != -1 {
		t.Fatal("edge cases")
	}
}
