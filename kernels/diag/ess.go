package diag

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/dsp/fourier"
)

// SplitChains cuts every chain into its first and last ⌊N/2⌋ draws,
// dropping the middle draw when N is odd (Vehtari et al. 2021). The result
// lists all first halves, then all second halves; it shares memory with
// the input.
func SplitChains(chains [][]float64) [][]float64 {
	return splitInto(nil, chains)
}

// splitInto is SplitChains appending to dst[:0].
func splitInto(dst, chains [][]float64) [][]float64 {
	n := checkChains(chains)
	half := n / 2
	dst = dst[:0]
	for _, c := range chains {
		dst = append(dst, c[:half])
	}
	for _, c := range chains {
		dst = append(dst, c[n-half:])
	}
	return dst
}

// ESS returns the effective sample size of the chains as they are (not
// split), by Geyer's (1992) initial positive and monotone sequence over the
// multi-chain autocorrelation of Vehtari et al. (2021), with τ̂ floored at
// 1/log₁₀ S (S = all draws), so 0 < ESS ≤ S·log₁₀ S. Chains must all have
// the same length N ≥ 4. A constant input, or one with a value that is not
// finite, has no defined ESS and gives NaN.
func ESS(chains [][]float64) float64 {
	n := checkChains(chains)
	if n < 4 {
		panic(fmt.Sprintf("diag: ESS needs at least 4 draws per chain, have %d", n))
	}
	var s acovScratch
	return geyerESS(chains, &s, nil)
}

// geyerTrace records the intermediate sequences of one ESS computation,
// for tests: rho[t] = ρ̂_t for every lag computed, pairs[k] = P̂_k after the
// monotone step for every k included in τ̂.
type geyerTrace struct {
	rho   []float64
	pairs []float64
	tau   float64
}

// geyerESS is the effective sample size of an M×N array (N ≥ 4, checked by
// the caller) by the multi-chain autocorrelation of Vehtari, Gelman,
// Simpson, Carpenter and Bürkner (2021) and Geyer's (1992) initial positive
// and monotone sequence, with τ̂ floored at 1/log₁₀(N·M) as in Vehtari et
// al. (2021). s holds reusable scratch; tr, when not nil, receives the
// trace. A draw that is not finite gives NaN. Draws of magnitude beyond
// 1e100 (a diverged run) or all below 1e-100 are rescaled by their largest
// magnitude first, which leaves the ESS unchanged and keeps their squares
// finite.
func geyerESS(chains [][]float64, s *acovScratch, tr *geyerTrace) float64 {
	n := len(chains[0])
	m := len(chains)
	var big float64 // max |v|
	nan := false
	for _, c := range chains {
		for _, v := range c {
			if a := math.Abs(v); a > big {
				big = a
			} else if a != a {
				nan = true
			}
		}
	}
	if nan || math.IsInf(big, 0) {
		return math.NaN()
	}
	if big > 1e100 || (big > 0 && big < 1e-100) {
		s.scaled = growFloats(s.scaled, n*m)
		s.scaledViews = s.scaledViews[:0]
		for j, c := range chains {
			row := s.scaled[j*n : (j+1)*n]
			for i, v := range c {
				row[i] = v / big
			}
			s.scaledViews = append(s.scaledViews, row)
		}
		chains = s.scaledViews
	}
	s.means = growFloats(s.means, m)
	means := s.means
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
	if !(varPlus > 0) || math.IsInf(varPlus, 0) {
		return math.NaN()
	}
	s.reset(chains)
	rho := func(t int) float64 {
		r := 1 - (w-s.at(t))/varPlus
		if tr != nil {
			for len(tr.rho) <= t {
				tr.rho = append(tr.rho, math.NaN())
			}
			tr.rho[t] = r
		}
		return r
	}
	if tr != nil {
		tr.rho = append(tr.rho[:0], 1)
		tr.pairs = tr.pairs[:0]
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
		if tr != nil {
			tr.pairs = append(tr.pairs, p)
		}
	}
	tau = math.Max(tau, tauFloor(n*m))
	if tr != nil {
		tr.tau = tau
	}
	return float64(n*m) / tau
}

// tauFloor is the least autocorrelation time credited to s draws,
// 1/log₁₀ s (Vehtari, Gelman, Simpson, Carpenter and Bürkner 2021): after
// Geyer's truncation τ̂ = −1 + 2·Σ_k P̂_k can be near zero or negative
// (an antithetic or diverged chain), which would make S/τ̂ huge or
// negative. With the floor, 0 < ESS ≤ s·log₁₀ s. For s < 10 the floor
// exceeds 1, so such tiny samples never claim more than s/τ_floor < s.
func tauFloor(s int) float64 { return 1 / math.Log10(float64(s)) }

// capESS applies the same limit to an effective sample size estimated
// another way (batch means, multivariate): ESS ≤ s·log₁₀ s, and NaN stays
// NaN. Derived here by analogy with tauFloor, so that every ESS the
// package reports obeys one bound.
func capESS(ess float64, s int) float64 {
	if math.IsNaN(ess) {
		return ess
	}
	return math.Min(ess, float64(s)/tauFloor(s))
}

// directLags is the number of lags computed directly, at O(M·N) each,
// before the autocovariances of all lags are computed at once by FFT
// (O(M·N·log N)). Geyer's sequence usually stops within a few
// autocorrelation times, so well-mixed chains never reach the FFT. The
// value is the measured cost ratio (BenchmarkAutocov: for 8 chains of
// 10⁴ draws one FFT of all lags costs about 100 direct lags), which keeps
// any chain within twice the cheaper of the two ways.
const directLags = 96

// acovScratch evaluates mean_m γ̂_{t,m} (divisor N) lag by lag and keeps
// its buffers between calls.
type acovScratch struct {
	chains      [][]float64
	means       []float64
	full        []float64 // all lags, valid when have
	scaled      []float64 // rescaled copy of huge or tiny chains
	scaledViews [][]float64
	have        bool
	dev         []float64 // the chains' deviations from their means, flat, when centred
	centred     bool
	fft         *fourier.FFT
	buf         []float64
	coef        []complex128
	power       []complex128
}

// reset points s at new chains whose means are already in s.means.
func (s *acovScratch) reset(chains [][]float64) {
	s.chains, s.have, s.centred = chains, false, false
}

// at returns the chain-averaged autocovariance at lag t.
func (s *acovScratch) at(t int) float64 {
	if !s.have && t < directLags {
		return s.direct(t)
	}
	if !s.have {
		s.allLags()
	}
	return s.full[t]
}

// direct is the chain-averaged autocovariance at lag t by direct sums:
// the mean over chains, in chain order, of autocov(c, mean, t). The
// chains' deviations from their means are computed once per reset (the
// same differences autocov takes), and four chains are summed side by
// side, each in its own accumulator in autocov's order, so the result is
// autocov's bit for bit while the additions of different chains overlap.
func (s *acovScratch) direct(t int) float64 {
	n, m := len(s.chains[0]), len(s.chains)
	if !s.centred {
		s.dev = growFloats(s.dev, n*m)
		for j, c := range s.chains {
			mu := s.means[j]
			for i, v := range c {
				s.dev[j*n+i] = v - mu
			}
		}
		s.centred = true
	}
	var g float64
	fn := float64(n)
	j := 0
	for ; j+4 <= m; j += 4 {
		a0, b0 := s.dev[j*n:j*n+n-t], s.dev[j*n+t:j*n+n]
		a1, b1 := s.dev[(j+1)*n:(j+1)*n+n-t], s.dev[(j+1)*n+t:(j+1)*n+n]
		a2, b2 := s.dev[(j+2)*n:(j+2)*n+n-t], s.dev[(j+2)*n+t:(j+2)*n+n]
		a3, b3 := s.dev[(j+3)*n:(j+3)*n+n-t], s.dev[(j+3)*n+t:(j+3)*n+n]
		b0, a1, b1, a2, b2, a3, b3 = b0[:len(a0)], a1[:len(a0)], b1[:len(a0)], a2[:len(a0)], b2[:len(a0)], a3[:len(a0)], b3[:len(a0)]
		var s0, s1, s2, s3 float64
		for i, x := range a0 {
			s0 += x * b0[i]
			s1 += a1[i] * b1[i]
			s2 += a2[i] * b2[i]
			s3 += a3[i] * b3[i]
		}
		g += s0 / fn
		g += s1 / fn
		g += s2 / fn
		g += s3 / fn
	}
	for ; j < m; j++ {
		a, b := s.dev[j*n:j*n+n-t], s.dev[j*n+t:j*n+n]
		b = b[:len(a)]
		var s0 float64
		for i, x := range a {
			s0 += x * b[i]
		}
		g += s0 / fn
	}
	return g / float64(m)
}

// allLags fills s.full with the chain-averaged autocovariance at every lag
// 0..N−1 through the Wiener–Khinchin identity on zero-padded chains (the
// padding to at least 2N removes the circular wrap-around): the power
// spectra of the chains are summed and transformed back once.
func (s *acovScratch) allLags() {
	n := len(s.chains[0])
	size := fftSize(2 * n)
	if s.fft == nil || s.fft.Len() != size {
		s.fft = fourier.NewFFT(size)
		s.buf = make([]float64, size)
		s.coef = make([]complex128, size/2+1)
		s.power = make([]complex128, size/2+1)
	}
	clear(s.power)
	for j, c := range s.chains {
		mu := s.means[j]
		for i, v := range c {
			s.buf[i] = v - mu
		}
		clear(s.buf[n:])
		s.fft.Coefficients(s.coef, s.buf)
		for i, z := range s.coef {
			s.power[i] += complex(real(z)*real(z)+imag(z)*imag(z), 0)
		}
	}
	s.fft.Sequence(s.buf, s.power)
	s.full = growFloats(s.full, n)
	scale := 1 / (float64(size) * float64(n) * float64(len(s.chains)))
	for t := range s.full {
		s.full[t] = s.buf[t] * scale
	}
	s.have = true
}

// fftSize is the smallest 2^i·3^j·5^k ≥ n (sizes the FFT factorises well).
func fftSize(n int) int {
	best := math.MaxInt
	for p2 := 1; p2 < best; p2 *= 2 {
		for p3 := p2; p3 < best; p3 *= 3 {
			p5 := p3
			for p5 < n {
				p5 *= 5
			}
			best = min(best, p5)
		}
	}
	return best
}

func growFloats(x []float64, n int) []float64 {
	if cap(x) < n {
		return make([]float64, n)
	}
	return x[:n]
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

// stdDev is √variance(x, mu), computed on x/max|x − mu| when the
// deviations are so large (a diverged run) or so small that their squares
// would overflow or underflow.
func stdDev(x []float64, mu float64) float64 {
	var big float64
	for _, v := range x {
		big = math.Max(big, math.Abs(v-mu))
	}
	if !(big > 1e100 || (big > 0 && big < 1e-100)) || math.IsInf(big, 0) {
		return math.Sqrt(variance(x, mu))
	}
	var s float64
	for _, v := range x {
		d := (v - mu) / big
		s += d * d
	}
	return big * math.Sqrt(s/float64(len(x)-1))
}

// autocov at lag t with divisor n.
func autocov(x []float64, mu float64, t int) float64 {
	var s float64
	for i := 0; i+t < len(x); i++ {
		s += (x[i] - mu) * (x[i+t] - mu)
	}
	return s / float64(len(x))
}
