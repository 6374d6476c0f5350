package benchkit

import (
	"context"
	"math"
	"math/rand/v2"
	"slices"
	"testing"
	"time"

	"gonum.org/v1/gonum/mat"

	"sluice/kernels/targets"
)

// The benchmarks' target has the gradient of the Gaussian with the same
// mean and (diagonal) precision: targets.Gaussian, which works with a
// dense precision through gonum, and the closed form −Q(x − mean).
func TestDiagGaussianGradient(t *testing.T) {
	for _, dim := range []int{1, 10, 100} {
		g := NewDiagGaussian(dim)
		prec := mat.NewSymDense(dim, nil)
		for i, q := range g.Q {
			prec.SetSym(i, i, q)
		}
		ref, err := targets.NewGaussian(g.Mean, prec)
		if err != nil {
			t.Fatal(err)
		}
		const rows = 5
		rng := rand.New(rand.NewPCG(1, 2))
		x := make([]float64, rows*dim)
		for i := range x {
			x[i] = 3 * rng.NormFloat64()
		}
		got, want := make([]float64, rows*dim), make([]float64, rows*dim)
		targets.EvalBatch(g, x, rows, got, nil)
		targets.EvalBatch(ref, x, rows, want, nil)
		for i := range want {
			j := i % dim
			closed := -g.Q[j] * (x[i] - g.Mean[j])
			if math.Abs(got[i]-want[i]) > 1e-12*(1+math.Abs(want[i])) || math.Abs(got[i]-closed) > 1e-12*(1+math.Abs(closed)) {
				t.Fatalf("dim %d, value %d: gradient %v, targets.Gaussian %v, closed form %v", dim, i, got[i], want[i], closed)
			}
		}
		// Log densities agree up to the constant: compare differences.
		d0, r0 := g.LogDensity(x[:dim]), ref.LogDensity(x[:dim])
		d1, r1 := g.LogDensity(x[dim:2*dim]), ref.LogDensity(x[dim:2*dim])
		if math.Abs((d1-d0)-(r1-r0)) > 1e-9*(1+math.Abs(r1-r0)) {
			t.Errorf("dim %d: log-density difference %v, targets.Gaussian %v", dim, d1-d0, r1-r0)
		}
		m, M := g.Curvature()
		if m != 1 || M != g.Q[dim-1] || !(M < 2) {
			t.Errorf("dim %d: curvature (%v, %v), want (1, %v) below 2", dim, m, M, g.Q[dim-1])
		}
	}
}

// The fused loop makes the kernel's steps: the same positions after many
// steps (up to rounding), at several shapes.
func TestFusedLoopMatchesKernel(t *testing.T) {
	for _, s := range []Shape{{1, 1}, {8, 10}, {3, 17}} {
		g := NewDiagGaussian(s.Dim)
		got, want := RunFused(s, g, 500), RunKernel(s, g, 500)
		for i := range want {
			if math.Abs(got[i]-want[i]) > 1e-9*(1+math.Abs(want[i])) {
				t.Fatalf("%v: position %d: fused %v, kernel %v", s, i, got[i], want[i])
			}
		}
	}
}

func TestMedian(t *testing.T) {
	for _, c := range []struct {
		xs   []float64
		want float64
	}{
		{[]float64{3}, 3},
		{[]float64{5, 1, 3}, 3},
		{[]float64{4, 1, 3, 2}, 2.5},
		{[]float64{2, 2, 9, 2, 9}, 2},
	} {
		in := slices.Clone(c.xs)
		if got := median(c.xs); got != c.want {
			t.Errorf("median(%v) = %v, want %v", in, got, c.want)
		}
		if !slices.Equal(in, c.xs) {
			t.Errorf("median reordered its input: %v", c.xs)
		}
	}
	if !math.IsNaN(median(nil)) {
		t.Error("median of nothing is not NaN")
	}
}

// Quantiles interpolate linearly between order statistics at rank
// p·(n−1): numpy's default method ("linear"), values worked by hand.
func TestQuantile(t *testing.T) {
	xs := []float64{7, 1, 3, 5} // sorted 1, 3, 5, 7
	for _, c := range []struct{ p, want float64 }{
		{0, 1}, {0.25, 2.5}, {0.5, 4}, {0.75, 5.5}, {1, 7}, {1.0 / 3, 3},
	} {
		if got := Quantile(xs, c.p); math.Abs(got-c.want) > 1e-12 {
			t.Errorf("Quantile(%v, %v) = %v, want %v", xs, c.p, got, c.want)
		}
	}
	if !math.IsNaN(Quantile(xs, 1.5)) || !math.IsNaN(Quantile(nil, 0.5)) {
		t.Error("Quantile outside [0, 1] or of nothing is not NaN")
	}
}

// alternate runs A, B, A, B, … and takes the median of the rounds' own
// ratios, which is not the ratio of the medians.
func TestAlternate(t *testing.T) {
	var order []byte
	// Wall times in µs over one step; CPU times twice the wall times.
	a := []float64{10, 30, 20}
	b := []float64{5, 10, 20}
	i, j := 0, 0
	us := func(x float64) sample {
		return sample{wall: time.Duration(x * 1e3), cpu: time.Duration(2 * x * 1e3), hasCPU: true}
	}
	as, bs, err := alternate(3, func() (sample, error) {
		order = append(order, 'A')
		i++
		return us(a[i-1]), nil
	}, func() (sample, error) {
		order = append(order, 'B')
		j++
		return us(b[j-1]), nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if string(order) != "ABABAB" {
		t.Errorf("order %s, want ABABAB", order)
	}
	am, bm, rs, cpu := compare(as, bs, 1)
	if !slices.Equal(am.Rounds, a) || !slices.Equal(bm.Rounds, b) || am.Median != 20 || bm.Median != 10 {
		t.Errorf("rounds %v, %v", am, bm)
	}
	if !slices.Equal(rs, []float64{2, 3, 1}) || median(rs) != 2 {
		t.Errorf("ratios %v, want 2, 3, 1 (median 2)", rs)
	}
	if cpu == nil || cpu.Value.Median != 40 || cpu.Floor.Median != 20 || cpu.Ratio != 2 {
		t.Errorf("CPU comparison %+v, want medians 40 and 20, ratio 2", cpu)
	}
	as[1].hasCPU = false
	if _, _, _, cpu := compare(as, bs, 1); cpu != nil {
		t.Errorf("a round without CPU time still gave a CPU comparison: %+v", cpu)
	}
}

// A short transport comparison runs end to end: the session delivers every
// draw, its last draws equal the in-process kernel's bit for bit (checked
// inside Transport), and every figure is positive.
func TestTransportRuns(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	srv, err := ServeSluice()
	if err != nil {
		t.Fatal(err)
	}
	defer srv.Close()
	r, err := Transport(ctx, srv, Shape{Chains: 3, Dim: 4}, 7, 2, 0)
	if err != nil {
		t.Fatal(err)
	}
	if len(r.Session.Rounds) != 2 || len(r.Echo.Rounds) != 2 || !(r.Ratio > 0) || !(r.Session.Median > 0) || !(r.Echo.Median > 0) {
		t.Errorf("result %+v", r)
	}
}

// The echo refuses a payload of the wrong size and more round trips than
// it allows, so a comparison cannot silently measure the wrong thing.
func TestEchoChecks(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	echo, err := ServeEcho(64, 1, 3)
	if err != nil {
		t.Fatal(err)
	}
	defer echo.Close()
	if err := RunEcho(ctx, echo.Conn(), 3, 1, make([]byte, 64)); err != nil {
		t.Errorf("3 rounds of 64 bytes: %v", err)
	}
	if err := RunEcho(ctx, echo.Conn(), 1, 1, make([]byte, 32)); err == nil {
		t.Error("32 bytes to a 64-byte echo: no error")
	}
	if err := RunEcho(ctx, echo.Conn(), 4, 1, make([]byte, 64)); err == nil {
		t.Error("4 rounds to a 3-round echo: no error")
	}
}
