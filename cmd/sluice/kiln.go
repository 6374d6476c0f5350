package main

import (
	"context"
	"math"
	"math/rand/v2"

	"gonum.org/v1/gonum/mat"

	"sluice/client"
	"sluice/kernels/targets"
)

// The demo's scenario, invented for sluice: a workshop fires batches of
// glazed tiles and records, for each firing, the peak kiln temperature,
// the cooling rate, and whether the batch came out cracked. The question
// is how both settings drive the chance of cracking, and what that chance
// is at a planned firing schedule.
//
// The data are made up here from a fixed random stream (so every run sees
// the same 300 firings) by a logistic model with the coefficients below.
const (
	kilnFirings = 300
	// Standardisation of the two settings (the model's scale).
	tempCentre, tempScale = 1160.0, 50.0 // °C
	coolCentre, coolScale = 6.0, 3.0     // °C per minute
	// Prior: each coefficient ~ N(0, 2²) on the standardised scale.
	kilnPriorPrecision = 0.25
)

// kilnTruth are the coefficients the invented data were drawn from:
// intercept, per 50 °C of peak temperature, per 3 °C/min of cooling.
var kilnTruth = []float64{-1.2, 1.0, 0.8}

var kilnNames = []string{"intercept", "temperature", "cooling_rate"}

// kilnFiring is one invented firing.
type kilnFiring struct {
	tempC, coolCPerMin float64
	cracked            bool
}

func kilnData() []kilnFiring {
	r := rand.New(rand.NewPCG(1160, 6))
	out := make([]kilnFiring, kilnFirings)
	for i := range out {
		t := 1080 + 160*r.Float64()
		c := 1 + 11*r.Float64()
		p := sigmoid(dot(kilnTruth, kilnFeatures(t, c)))
		out[i] = kilnFiring{tempC: math.Round(t), coolCPerMin: math.Round(c*10) / 10, cracked: r.Float64() < p}
	}
	return out
}

// kilnFeatures is the model's row for one firing: 1, standardised
// temperature, standardised cooling rate.
func kilnFeatures(tempC, coolCPerMin float64) []float64 {
	return []float64{1, (tempC - tempCentre) / tempScale, (coolCPerMin - coolCentre) / coolScale}
}

// kilnTarget is the posterior of the logistic regression on the data.
func kilnTarget(data []kilnFiring) (*targets.Logistic, error) {
	x := mat.NewDense(len(data), 3, nil)
	y := make([]float64, len(data))
	for i, f := range data {
		x.SetRow(i, kilnFeatures(f.tempC, f.coolCPerMin))
		if f.cracked {
			y[i] = 1
		}
	}
	return targets.NewLogistic(x, y, kilnPriorPrecision)
}

func sigmoid(z float64) float64 {
	if z >= 0 {
		return 1 / (1 + math.Exp(-z))
	}
	e := math.Exp(z)
	return e / (1 + e)
}

func dot(a, b []float64) float64 {
	var s float64
	for i := range a {
		s += a[i] * b[i]
	}
	return s
}

// kilnMinibatch answers with stochastic gradients of log π: for each
// point and replicate, the prior's gradient plus N/n times the sum of the
// per-firing gradients over n firings drawn uniformly with replacement
// (an unbiased estimate, as in Welling and Teh (2011), "Bayesian learning
// via stochastic gradient Langevin dynamics"). The stream is seeded, so a run
// is reproducible.
func kilnMinibatch(data []kilnFiring, n int, seed uint64) client.Evaluator {
	r := rand.New(rand.NewPCG(seed, 7))
	rows := make([][]float64, len(data))
	ys := make([]float64, len(data))
	for i, f := range data {
		rows[i] = kilnFeatures(f.tempC, f.coolCPerMin)
		if f.cracked {
			ys[i] = 1
		}
	}
	scale := float64(len(data)) / float64(n)
	return func(_ context.Context, b *client.Batch) error {
		reps := b.Replicates
		for row := range b.Rows {
			theta := b.Point(row)
			for j := range reps {
				g := b.Grad[(row*reps+j)*b.Dim : (row*reps+j+1)*b.Dim]
				for i := range g {
					g[i] = -kilnPriorPrecision * theta[i]
				}
				if b.FullData {
					for k, x := range rows {
						addDatum(g, x, ys[k], theta, 1)
					}
					continue
				}
				for range n {
					k := r.IntN(len(data))
					addDatum(g, rows[k], ys[k], theta, scale)
				}
			}
		}
		return nil
	}
}

// addDatum adds w·x·(y − σ(xᵀθ)), one firing's gradient of its
// log-likelihood, to g.
func addDatum(g, x []float64, y float64, theta []float64, w float64) {
	d := w * (y - sigmoid(dot(x, theta)))
	for i := range g {
		g[i] += d * x[i]
	}
}

// kilnExact answers whatever a kernel asks of the exact posterior:
// gradients, log densities, Hessians and Hessian-vector products.
func kilnExact(target *targets.Logistic) client.Evaluator {
	d := target.Dim()
	h := mat.NewSymDense(d, nil)
	return func(_ context.Context, b *client.Batch) error {
		for row := range b.Rows {
			x := b.Point(row)
			target.GradLogDensity(b.Grad[row*d:(row+1)*d], x)
			if b.WantLogDensity {
				b.LogDensity[row] = target.LogDensity(x)
			}
			if b.WantHessian || b.WantHessianVector {
				target.Hessian(h, x)
				for i := range d {
					var s float64
					for j := range d {
						if b.WantHessian {
							b.Hessian[row*d*d+i*d+j] = h.At(i, j)
						}
						if b.WantHessianVector {
							s += h.At(i, j) * b.Vectors[row*d+j]
						}
					}
					if b.WantHessianVector {
						b.HessVec[row*d+i] = s
					}
				}
			}
		}
		return nil
	}
}
