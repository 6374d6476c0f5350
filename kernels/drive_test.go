package kernels

import (
	"math"

	"sluice/kernels/diag"
)

// The one in-process test driver and the Monte Carlo moment helpers that
// every kernel's tests share.

// driveCount counts the requests and rows a run asked for, full-data ones
// apart.
type driveCount struct {
	requests, rows, fullRows, fullRequests int
}

// velocityKernel is a kernel that carries velocities.
type velocityKernel interface {
	Kernel
	Velocities() []float64
}

// drive runs k until it has completed steps steps, answering every
// request with eval, and records the state after every completed step
// s > burnIn with s % thin == 0: out[coord][chain][draw], coordinates
// 0…p−1 the positions and, for a kernel with velocities, p…2p−1 the
// velocities. The answer handed to eval has room for 2·chains rows of
// gradients and log densities; eval may grow it (Answer.Reserve).
func drive(k Kernel, eval func(*Request, *Answer), burnIn, steps, thin int) ([][][]float64, driveCount) {
	p, c := k.Dim(), k.Chains()
	kv, withV := k.(velocityKernel)
	coords := p
	if withV {
		coords = 2 * p
	}
	out := make([][][]float64, coords)
	for i := range out {
		out[i] = make([][]float64, c)
		for j := range out[i] {
			out[i][j] = make([]float64, 0, max(steps-burnIn, 0)/thin+1)
		}
	}
	var n driveCount
	a := NewAnswer(2*c, p)
	for k.Steps() < steps {
		req := k.Next()
		n.requests++
		n.rows += req.Rows
		if req.Need.Has(NeedFullData) {
			n.fullRequests++
			n.fullRows += req.Rows
		}
		eval(req, a)
		if !k.Tell(a) || k.Steps() <= burnIn || k.Steps()%thin != 0 {
			continue
		}
		x := k.Positions()
		for ch := range c {
			for i := range p {
				out[i][ch] = append(out[i][ch], x[ch*p+i])
			}
		}
		if withV {
			v := kv.Velocities()
			for ch := range c {
				for i := range p {
					out[p+i][ch] = append(out[p+i][ch], v[ch*p+i])
				}
			}
		}
	}
	return out, n
}

// driveKernel is drive without thinning or counts.
func driveKernel(k Kernel, eval func(*Request, *Answer), burnIn, steps int) [][][]float64 {
	d, _ := drive(k, eval, burnIn, steps, 1)
	return d
}

// gradEval answers gradient requests with grad(points, rows, out), which
// writes ∇log π at rows points.
func gradEval(grad func(points []float64, rows int, out []float64)) func(*Request, *Answer) {
	return func(req *Request, a *Answer) {
		a.Reserve(req.Need, req.Rows, len(req.Points)/max(req.Rows, 1))
		grad(req.Points, req.Rows, a.Grad)
	}
}

// seriesMean returns the mean over all chains and draws of x[chain][draw]
// and its Monte Carlo standard error sd/√ESS, with the ESS of the split
// chains from diag (Vehtari, Gelman, Simpson, Carpenter and Bürkner 2021).
func seriesMean(x [][]float64) (est, mcse float64) {
	var s, s2 float64
	var n int
	for _, c := range x {
		for _, v := range c {
			s += v
			s2 += v * v
			n++
		}
	}
	est = s / float64(n)
	sd := math.Sqrt((s2 - float64(n)*est*est) / float64(n-1))
	return est, sd / math.Sqrt(diag.ESS(diag.SplitChains(x)))
}

// moment returns the mean of (x_i − mi)(x_j − mj) over the draws d and its
// Monte Carlo standard error (seriesMean).
func moment(d [][][]float64, i, j int, mi, mj float64) (est, mcse float64) {
	prod := make([][]float64, len(d[i]))
	for ch := range d[i] {
		prod[ch] = make([]float64, len(d[i][ch]))
		for t := range prod[ch] {
			prod[ch][t] = (d[i][ch][t] - mi) * (d[j][ch][t] - mj)
		}
	}
	return seriesMean(prod)
}

// statOf returns the mean over all chains and draws of f(draw) and its
// Monte Carlo standard error (seriesMean).
func statOf(d [][][]float64, f func(x []float64) float64) (est, mcse float64) {
	p, c, n := len(d), len(d[0]), len(d[0][0])
	series := make([][]float64, c)
	x := make([]float64, p)
	for ch := range c {
		series[ch] = make([]float64, n)
		for t := range n {
			for i := range p {
				x[i] = d[i][ch][t]
			}
			series[ch][t] = f(x)
		}
	}
	return seriesMean(series)
}
