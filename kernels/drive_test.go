package kernels

import (
	"math"

	"sluice/kernels/diag"
)

// driveKernel runs k for steps completed steps, answering with eval, and
// returns the draws after burnIn steps: out[coord][chain][draw].
func driveKernel(k Kernel, eval func(*Request, *Answer), burnIn, steps int) [][][]float64 {
	p, c := k.Dim(), k.Chains()
	out := make([][][]float64, p)
	for i := range out {
		out[i] = make([][]float64, c)
	}
	a := &Answer{}
	for k.Steps() < steps {
		eval(k.Next(), a)
		if !k.Tell(a) || k.Steps() <= burnIn {
			continue
		}
		x := k.Positions()
		for ch := range c {
			for i := range p {
				out[i][ch] = append(out[i][ch], x[ch*p+i])
			}
		}
	}
	return out
}

// statOf returns the mean over all chains and draws of the series
// f(draw) and its Monte Carlo standard error sd/√ESS, with the ESS of the
// split chains from diag (Vehtari, Gelman, Simpson, Carpenter and Bürkner 2021).
func statOf(d [][][]float64, f func(x []float64) float64) (est, mcse float64) {
	p, c, n := len(d), len(d[0]), len(d[0][0])
	series := make([][]float64, c)
	x := make([]float64, p)
	var s, s2 float64
	for ch := range c {
		series[ch] = make([]float64, n)
		for t := range n {
			for i := range p {
				x[i] = d[i][ch][t]
			}
			v := f(x)
			series[ch][t] = v
			s += v
			s2 += v * v
		}
	}
	m := float64(c * n)
	est = s / m
	sd := math.Sqrt((s2 - m*est*est) / (m - 1))
	return est, sd / math.Sqrt(diag.ESS(diag.SplitChains(series)))
}
