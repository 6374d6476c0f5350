package diag

import (
	"fmt"
	"math"
)

// SplitChains cuts every chain into its first and last ⌊N/2⌋ draws,
// dropping the middle draw when N is odd (THEORY.md §9 step 1). The result
// lists all first halves, then all second halves; it shares memory with
// the input.
func SplitChains(chains [][]float64) [][]float64 {
	n := checkChains(chains)
	half := n / 2
	out := make([][]float64, 0, 2*len(chains))
	for _, c := range chains {
		out = append(out, c[:half])
	}
	for _, c := range chains {
		out = append(out, c[n-half:])
	}
	return out
}

// ESS returns the effective sample size of the chains as they are (not
// split), by Geyer's initial positive and monotone sequence over the
// multi-chain autocorrelation (THEORY.md §9 step 5). Chains must all have
// the same length N ≥ 4. A constant input has no defined ESS and gives NaN.
func ESS(chains [][]float64) float64 {
	n := checkChains(chains)
	if n < 4 {
		panic(fmt.Sprintf("diag: ESS needs at least 4 draws per chain, have %d", n))
	}
	m := len(chains)
	means := make([]float64, m)
	var w float64
	for j, c := range chains {
		means[j] = mean(c)
		w += variance(c, means[j])
	}
	w /= float64(m)
	varPlus := w * float64(n-1) / float64(n)
	if m > 1 {
		varPlus += variance(means, mean(means)) // B/N = var of chain means
	}
	if !(varPlus > 0) {
		return math.NaN()
	}
	rho := func(t int) float64 {
		var g float64
		for j, c := range chains {
			g += autocov(c, means[j], t)
		}
		g /= float64(m)
		return 1 - (w-g)/varPlus
	}
	tau := -1.0
	prev := math.Inf(1)
	for k := 0; 2*k+1 <= n-1; k++ {
		var p float64
		if k == 0 {
			p = 1 + rho(1)
		} else {
			p = rho(2*k) + rho(2*k+1)
		}
		if p < 0 {
			break
		}
		p = math.Min(p, prev)
		prev = p
		tau += 2 * p
	}
	return float64(n*m) / tau
}

func checkChains(chains [][]float64) int {
	if len(chains) == 0 {
		panic("diag: no chains")
	}
	n := len(chains[0])
	for i, c := range chains {
		if len(c) != n {
			panic(fmt.Sprintf("diag: chain %d has %d draws, chain 0 has %d", i, len(c), n))
		}
	}
	return n
}

func mean(x []float64) float64 {
	var s float64
	for _, v := range x {
		s += v
	}
	return s / float64(len(x))
}

// variance with divisor n−1.
func variance(x []float64, mu float64) float64 {
	var s float64
	for _, v := range x {
		d := v - mu
		s += d * d
	}
	return s / float64(len(x)-1)
}

// autocov at lag t with divisor n.
func autocov(x []float64, mu float64, t int) float64 {
	var s float64
	for i := 0; i+t < len(x); i++ {
		s += (x[i] - mu) * (x[i+t] - mu)
	}
	return s / float64(len(x))
}
