package diag_test

import (
	"math"
	"testing"

	"sluice/kernels"
	"sluice/kernels/diag"
)

// Calibration of the Monte Carlo standard error: over 200 independent
// short runs of an exact kernel on a Gaussian with known mean, the
// interval mean ± 1.96·MCSE must cover the true mean in between 92 % and
// 98 % of runs (the acceptance band; a calibrated 95 % interval
// over 200 runs has binomial sd 1.5 %). The kernel is ozaki, whose step
// is the exact Langevin transition on a Gaussian (THEORY.md §11c), so the
// draws have exactly the target law and the only error is Monte Carlo
// error. MCSE = sd/√ESS on split chains (THEORY.md §9 step 7).
func TestMCSECoverageOfExactKernel(t *testing.T) {
	const runs, chains, draws = 200, 4, 250
	q := []float64{2, .5, .5, 1}   // THEORY.md §11a's precision
	mu := []float64{1.5, -0.5}     // the known mean
	grad := func(x, g []float64) { // ∇log π = −Q(x − μ)
		for i := range 2 {
			g[i] = -(q[2*i]*(x[0]-mu[0]) + q[2*i+1]*(x[1]-mu[1]))
		}
	}
	hess := []float64{-2, -.5, -.5, -1}
	covered := [2]int{}
	for run := range runs {
		// Start each run in the stationary law's neighbourhood but not at
		// it: a point start, mildly dispersed across chains, and a short
		// burn-in of 20 steps (e^{−20·0.5·0.79} ≈ 4e-4 of the start left).
		start := []float64{2, 0, 1, -1, 1.5, 0.5, 1, -0.2}
		k := kernels.NewOzaki(2, chains, 0.5, start, kernels.NewSource(uint64(1000+run)))
		a := kernels.NewAnswer(chains, 2)
		a.Reserve(kernels.NeedGradient|kernels.NeedHessian, chains, 2)
		out := [2][][]float64{make([][]float64, chains), make([][]float64, chains)}
		for k.Steps() < 20+draws {
			req := k.Next()
			for r := range req.Rows {
				grad(req.Points[2*r:2*r+2], a.Grad[2*r:2*r+2])
				copy(a.Hessian[4*r:4*r+4], hess)
			}
			if !k.Tell(a) || k.Steps() <= 20 {
				continue
			}
			x := k.Positions()
			for c := range chains {
				for i := range 2 {
					out[i][c] = append(out[i][c], x[2*c+i])
				}
			}
		}
		for i := range 2 {
			var s float64
			for _, c := range out[i] {
				for _, v := range c {
					s += v
				}
			}
			mean := s / float64(chains*draws)
			if math.Abs(mean-mu[i]) <= 1.96*diag.MeanMCSE(out[i]) {
				covered[i]++
			}
		}
	}
	for i, c := range covered {
		frac := float64(c) / runs
		t.Logf("coordinate %d: coverage %.3f over %d runs", i, frac, runs)
		if frac < 0.92 || frac > 0.98 {
			t.Errorf("coordinate %d: mean ± 1.96·MCSE covered the true mean in %.1f%% of runs, want 92–98%%", i, 100*frac)
		}
	}
}
