package kernels_test

import (
	"fmt"
	"math"
	"sort"
	"strings"
	"testing"

	"sluice/kernels"
	"sluice/kernels/diag"
)

// essCase is one kernel with its step grid and run length for
// BenchmarkESSPerEvaluation.
type essCase struct {
	name  string
	steps []float64 // candidate step sizes
	burn  int
	keep  int // steps kept after burn-in
	build func(h float64, start []float64, seed uint64) kernels.Kernel
}

// BenchmarkESSPerEvaluation prints one table: for every kernel at its
// best stable step on a p = 100 Gaussian with condition number 100
// (precision diag(λ), λ log-spaced from 1 to 100), the smallest ESS of
// the mean over the coordinates (Vehtari et al. 2021 on split chains)
// per point evaluated, and the largest relative error of the stationary
// variances at that step (the discretisation bias the ESS does not see;
// exact variances 1/λ; the figure includes Monte Carlo error, about
// √(2/ESS) per coordinate, maximised over 100 coordinates). "Stable"
// means finite draws and a variance error below 50 %. A point counts
// once whatever it asks (gradient, log density, Hessian or a
// Hessian-vector product). Run it with
//
//	go test -run XXX -bench ESSPerEvaluation -benchtime 1x ./kernels/
func BenchmarkESSPerEvaluation(b *testing.B) {
	const p, chains = 100, 8
	lambda := make([]float64, p)
	for i := range lambda {
		lambda[i] = math.Pow(100, float64(i)/float64(p-1))
	}
	const M = 100.0
	cases := []essCase{
		{"lmc", []float64{0.25 / M, 0.5 / M, 1 / M, 1.5 / M, 1.9 / M}, 500, 4000, func(h float64, x []float64, s uint64) kernels.Kernel {
			return kernels.NewLMC(p, chains, h, x, kernels.NewSource(s))
		}},
		{"kinetic", []float64{0.1, 0.25, 0.5, 1, 1.5}, 500, 4000, func(h float64, x []float64, s uint64) kernels.Kernel {
			return kernels.NewKinetic(p, chains, h, 0, 1/M, x, nil, kernels.NewSource(s))
		}},
		{"midpoint", []float64{0.25, 0.5, 1, 1.5, 2}, 300, 2000, func(h float64, x []float64, s uint64) kernels.Kernel {
			return kernels.NewMidpoint(p, chains, h, 1/M, x, nil, kernels.NewSource(s))
		}},
		{"midpoint-overdamped", []float64{0.5 / M, 1 / M, 2 / M, 3 / M}, 500, 3000, func(h float64, x []float64, s uint64) kernels.Kernel {
			return kernels.NewOverdampedMidpoint(p, chains, h, x, kernels.NewSource(s))
		}},
		{"mala", []float64{1 / M}, 1000, 4000, func(h float64, x []float64, s uint64) kernels.Kernel {
			return kernels.NewMALA(p, chains, h, 1000, x, kernels.NewSource(s)) // adapts toward 0.574 in burn-in
		}},
		{"ozaki", []float64{2, 8}, 20, 200, func(h float64, x []float64, s uint64) kernels.Kernel {
			return kernels.NewOzaki(p, chains, h, x, kernels.NewSource(s))
		}},
		{"hit-and-run", []float64{0}, 200, 3000, func(h float64, x []float64, s uint64) kernels.Kernel {
			// density-only: no step; the slice's initial width is the
			// softest direction's sd
			return kernels.NewHitAndRun(p, chains, x, kernels.HitAndRunOptions{Width: 1}, kernels.NewSource(s))
		}},
		{"ozaki-krylov", []float64{8}, 10, 100, func(h float64, x []float64, s uint64) kernels.Kernel {
			return kernels.NewOzakiKrylov(p, chains, h, x, 1e-6, 40, kernels.NewSource(s))
		}},
	}
	type row struct {
		name          string
		step          float64
		essPerEval    float64
		varErr        float64
		evals, minESS float64
	}
	var table []row
	for _, c := range cases {
		b.Run(c.name, func(b *testing.B) {
			var best row
			for b.Loop() {
				best = row{name: c.name, essPerEval: -1}
				var any row
				for _, h := range c.steps {
					ess, evals, verr, ok := essRun(c, h, lambda, chains)
					if ok && verr < 0.5 && ess/evals > best.essPerEval {
						best = row{c.name, h, ess / evals, verr, evals, ess}
					}
					if ok && (any.name == "" || verr < any.varErr) {
						any = row{c.name + " (unsettled)", h, ess / evals, verr, evals, ess}
					}
				}
				if best.essPerEval < 0 && any.name != "" {
					best = any // no step met the variance criterion: show the closest, marked
				}
			}
			b.ReportMetric(best.essPerEval, "ESS/eval")
			b.ReportMetric(best.step, "step")
			b.ReportMetric(best.varErr, "var-error")
			table = append(table, best)
		})
	}
	sort.Slice(table, func(i, j int) bool { return table[i].essPerEval > table[j].essPerEval })
	var sb strings.Builder
	fmt.Fprintf(&sb, "\nESS per evaluation, p = 100 Gaussian, condition number 100, %d chains\n", chains)
	fmt.Fprintf(&sb, "%-20s %10s %12s %12s %10s %14s\n", "kernel", "step", "min ESS", "evaluations", "ESS/eval", "variance error")
	for _, r := range table {
		fmt.Fprintf(&sb, "%-20s %10.4g %12.0f %12.0f %10.4f %13.1f%%\n", r.name, r.step, r.minESS, r.evals, r.essPerEval, 100*r.varErr)
	}
	fmt.Print(sb.String()) // the table is the benchmark's output: print it whatever the flags
}

// essRun drives c at step h on N(0, diag(1/λ)) and returns the smallest
// ESS of the mean over coordinates, the points evaluated (burn-in
// included), the largest relative error of the variances, and whether
// the draws stayed finite.
func essRun(c essCase, h float64, lambda []float64, chains int) (minESS, evals, varErr float64, ok bool) {
	p := len(lambda)
	start := make([]float64, p*chains)
	for i := range start {
		start[i] = float64(i%7-3) / math.Sqrt(lambda[i%p]) // dispersed, within a few sds
	}
	k := c.build(h, start, 77)
	a := kernels.NewAnswer(chains, p)
	draws := make([][][]float64, p)
	for i := range draws {
		draws[i] = make([][]float64, chains)
	}
	var rows int
	for k.Steps() < c.burn+c.keep {
		req := k.Next()
		a.Reserve(req.Need, req.Rows, p)
		rows += req.Rows
		for r := range req.Rows {
			x := req.Points[r*p : (r+1)*p]
			var ld float64
			for i, v := range x {
				a.Grad[r*p+i] = -lambda[i] * v
				ld -= lambda[i] * v * v / 2
				if req.Need.Has(kernels.NeedHessian) {
					for j := range p {
						a.Hessian[r*p*p+i*p+j] = 0
					}
					a.Hessian[r*p*p+i*p+i] = -lambda[i]
				}
				if req.Need.Has(kernels.NeedHessianVector) {
					a.HessVec[r*p+i] = -lambda[i] * req.Vectors[r*p+i]
				}
			}
			a.LogDensity[r] = ld
		}
		if !k.Tell(a) || k.Steps() <= c.burn {
			continue
		}
		x := k.Positions()
		for ch := range chains {
			for i := range p {
				v := x[ch*p+i]
				if math.IsNaN(v) || math.IsInf(v, 0) || math.Abs(v) > 1e6 {
					return 0, 0, 0, false
				}
				draws[i][ch] = append(draws[i][ch], v)
			}
		}
	}
	minESS = math.Inf(1)
	for i := range p {
		minESS = math.Min(minESS, diag.MeanESS(draws[i]))
		var s, n float64
		for _, ch := range draws[i] {
			for _, v := range ch {
				s += v * v
				n++
			}
		}
		varErr = math.Max(varErr, math.Abs(s/n*lambda[i]-1))
	}
	return minESS, float64(rows), varErr, true
}
