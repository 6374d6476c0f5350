package session

import (
	"fmt"
	"math"

	"sluice/kernels"
	"sluice/kernels/bound"
)

// noiseMeter measures stochastic-gradient noise from replicates: for
// every row and coordinate, the unbiased sample variance of the r
// replicates, s² = Σ_j (g_j − ḡ)²/(r − 1), is an unbiased estimate of one
// replicate's error variance σ² (common practice). A request's estimate
// is the mean of s² over its rows and coordinates; the meter keeps the
// mean of those per-request estimates and their spread, whose standard
// error (sd/√requests) is the estimate's uncertainty. It also counts data
// passes (epochs).
type noiseMeter struct {
	sum   float64 // Σ s² over the current request
	count int64   // terms in sum
	// Welford over per-request estimates.
	n        int64
	mean, m2 float64
	// Data points touched, for epochs.
	touched float64
}

// replicates averages rows×reps×dim replicated gradients into dst
// (rows×dim) and accumulates their spread.
func (m *noiseMeter) replicates(dst, g []float64, rows, reps, dim int) {
	for r := range rows {
		block := g[r*reps*dim : (r+1)*reps*dim]
		for i := range dim {
			var mean float64
			for j := range reps {
				mean += block[j*dim+i]
			}
			mean /= float64(reps)
			var ss float64
			for j := range reps {
				d := block[j*dim+i] - mean
				ss += d * d
			}
			dst[r*dim+i] = mean
			m.sum += ss / float64(reps-1)
			m.count++
		}
	}
}

// request closes the accounting of one completed request.
func (m *noiseMeter) request(req *kernels.Request, n Noise) {
	if n.DataSize > 0 && n.MinibatchSize > 0 {
		if req.Need.Has(kernels.NeedFullData) {
			m.touched += float64(req.Rows) * float64(n.DataSize)
		} else {
			m.touched += float64(req.Rows) * float64(n.Replicates) * float64(n.MinibatchSize)
		}
	}
	if m.count == 0 {
		return
	}
	est := m.sum / float64(m.count)
	m.sum, m.count = 0, 0
	m.n++
	d := est - m.mean
	m.mean += d / float64(m.n)
	m.m2 += d * (est - m.mean)
}

// estimate reports the noise; a warning when the measurement disagrees
// with the declared variance beyond four standard errors (after at least
// ten requests), or when a declared bias puts a floor under the bounds.
func (m *noiseMeter) estimate(n Noise) NoiseEstimate {
	e := NoiseEstimate{Variance: -1, SE: -1, Requests: m.n, Declared: n.Variance}
	if n.DataSize > 0 && n.MinibatchSize > 0 {
		e.Epochs = m.touched / float64(n.DataSize)
	}
	if m.n > 0 {
		e.Variance = m.mean
	}
	if m.n > 1 {
		e.SE = math.Sqrt(m.m2/float64(m.n-1)) / math.Sqrt(float64(m.n))
	}
	switch {
	case n.Variance > 0 && m.n >= 10 && e.SE >= 0 && math.Abs(e.Variance-n.Variance) > 4*e.SE:
		e.Warning = fmt.Sprintf("measured gradient noise variance %.4g ± %.2g disagrees with the declared %.4g", e.Variance, e.SE, n.Variance)
	case n.Bias > 0:
		e.Warning = fmt.Sprintf("declared gradient bias %.4g adds a bound term that no step size removes", n.Bias)
	}
	return e
}

// updateNoise feeds the noise level into the guaranteed bound: the kernel
// sees the mean of r replicates, whose error variance is σ²/r. A declared
// variance is used as declared; otherwise the measured one, once there
// are enough requests for it to mean something.
func (s *Session) updateNoise(e NoiseEstimate) {
	if s.guarantee == nil {
		return
	}
	v := s.spec.Noise.Variance
	if v == 0 && e.Requests >= 10 {
		v = e.Variance
	}
	sd := math.Sqrt(v / float64(s.spec.Noise.Replicates))
	g := s.guarantee
	if sd == g.setting.Noise {
		return
	}
	g.setting.Noise = sd
	k := s.kernel.Steps()
	if st, ok := s.kernel.(kernels.StepSetter); ok && g.replan && e.Requests >= 10 && int64(k) < s.spec.BurnIn {
		// Plan the step again with the measured noise, once, in burn-in:
		// the step of Dalalyan and Karagulyan (2019) for inaccurate
		// gradients.
		g.replan = false
		p, err := bound.NewPlan(bound.Spec{Setting: g.setting, Metric: g.metric, Eps: g.eps, Chains: g.chains})
		if err == nil && p.Step < g.h {
			st.SetStep(p.Step)
			g.h, g.k0, g.planned = p.Step, k, k+p.Iterations
		}
	}
	if s.spec.Wants.Eps > 0 {
		s.epsSteps = g.stepsTo(s.spec.Wants.Eps, k)
	}
}
