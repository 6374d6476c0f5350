package report

import (
	"math"
	"sort"

	"sluice/kernels/diag"
)

// Stat is what the report says of one parameter, computed from the draws
// in the file.
type Stat struct {
	Name             string
	Mean, SD         float64
	Lo, Median, Hi   float64 // equal-tailed interval at the report's level, and the median
	Rhat             float64 // split-rank R-hat, max of bulk and folded
	BulkESS, TailESS float64
}

// computeStats summarises every parameter: mean, sd and type-7 quantiles
// of the pooled draws, and R-hat, bulk- and tail-ESS from kernels/diag
// (rank-normalised split R-hat and ESS of Vehtari, Gelman, Simpson,
// Carpenter and Bürkner, Bayesian Analysis 16(2), 2021).
func computeStats(r *Run, level float64) []Stat {
	out := make([]Stat, len(r.Names))
	for i, name := range r.Names {
		pooled := pool(r.Draws[i])
		sort.Float64s(pooled)
		m, sd := meanSD(pooled)
		s := Stat{Name: name, Mean: m, SD: sd,
			Lo: quantile7(pooled, (1-level)/2), Median: quantile7(pooled, 0.5), Hi: quantile7(pooled, (1+level)/2),
			Rhat: math.NaN(), BulkESS: math.NaN(), TailESS: math.NaN()}
		if finite(pooled) {
			s.Rhat = diag.Rhat(r.Draws[i]).Reported
			if r.Len() >= 8 {
				s.BulkESS, s.TailESS = diag.BulkESS(r.Draws[i]), diag.TailESS(r.Draws[i])
			}
		}
		out[i] = s
	}
	return out
}

func pool(chains [][]float64) []float64 {
	var n int
	for _, c := range chains {
		n += len(c)
	}
	out := make([]float64, 0, n)
	for _, c := range chains {
		out = append(out, c...)
	}
	return out
}

func finite(x []float64) bool {
	for _, v := range x {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return false
		}
	}
	return true
}

func meanSD(x []float64) (float64, float64) {
	var s float64
	for _, v := range x {
		s += v
	}
	m := s / float64(len(x))
	var ss float64
	for _, v := range x {
		ss += (v - m) * (v - m)
	}
	if len(x) < 2 {
		return m, math.NaN()
	}
	return m, math.Sqrt(ss / float64(len(x)-1))
}

// quantile7 is the linear-interpolation quantile of sorted x (the "type
// 7" definition of Hyndman and Fan, The American Statistician 50(4),
// 1996).
func quantile7(x []float64, q float64) float64 {
	if len(x) == 0 {
		return math.NaN()
	}
	h := q * float64(len(x)-1)
	lo := math.Floor(h)
	i := int(lo)
	if i+1 >= len(x) {
		return x[len(x)-1]
	}
	return x[i] + (h-lo)*(x[i+1]-x[i])
}
