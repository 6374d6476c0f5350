package diag

import (
	"math"
	"math/rand/v2"
	"testing"
)

// normalSample returns n exact draws of N(μ·1, σ²I) in dimension p, with
// the scores of N(0, I) at them (s(x) = −x).
func normalSample(r *rand.Rand, n, p int, mu, sigma float64) (x, s []float64) {
	x = make([]float64, n*p)
	for i := range x {
		x[i] = mu + sigma*r.NormFloat64()
	}
	return x, stdNormalScores(x)
}

// The level of the test: for exact i.i.d. draws of the target N(0, I)
// (p = 2 and 10, N = 500) the state must be SteinIndistinguishable in
// about 95 % of 200 seeds. The band is 4 binomial standard deviations,
// √(0.95·0.05/200) = 0.0154, below 95 % (above it a test may only be
// conservative): at least 0.888. 99 replicates make (B + 1)·0.05 an
// integer, so the Monte Carlo p-value has level 5 % under exchangeability.
func TestSteinTestLevelIID(t *testing.T) {
	const seeds, n = 200, 500
	lo := 0.95 - 4*math.Sqrt(0.95*0.05/seeds)
	for _, p := range []int{2, 10} {
		indist, upperPos := 0, 0
		for seed := range seeds {
			r := rand.New(rand.NewPCG(uint64(seed), uint64(1000+p)))
			x, s := normalSample(r, n, p, 0, 1)
			res := AssessStein(p, x, s, SteinOptions{Replicates: 99}, r)
			if res.State == SteinIndistinguishable {
				indist++
			}
			if res.Upper95 > 0 {
				upperPos++
			}
			if res.N != n || res.State == SteinUndefined || !(res.SE > 0) || res.KSD != math.Sqrt(math.Max(res.U2, 0)) || !(res.Upper95 > res.KSD) {
				t.Fatalf("p = %d seed %d: %+v", p, seed, res)
			}
		}
		frac := float64(indist) / seeds
		t.Logf("p = %d: indistinguishable in %.3f of %d seeds (want ≥ %.3f), upper bound > 0 in %d", p, frac, seeds, lo, upperPos)
		if frac < lo {
			t.Errorf("p = %d: exact draws indistinguishable from the target in %.3f of seeds, want ≥ %.3f", p, frac, lo)
		}
	}
}

// Draws from a visibly different law, N(0, 1.5²I) or N(0.3·1, I) scored
// against N(0, I) (p = 2, N = 1000): the test rejects, the upper bound is
// positive and the discrepancy is not below it. After standardising,
// N(0, 1.5²I) becomes N(0, I) against a target N(0, I/2.25), still a
// different law.
func TestSteinTestDetectsBiasedLaws(t *testing.T) {
	r := rand.New(rand.NewPCG(71, 73))
	for _, c := range []struct {
		name      string
		mu, sigma float64
	}{{"N(0, 1.5²I)", 0, 1.5}, {"N(0.3·1, I)", 0.3, 1}} {
		x, s := normalSample(r, 1000, 2, c.mu, c.sigma)
		res := AssessStein(2, x, s, SteinOptions{}, r)
		t.Logf("%s: U² %.4g ± %.2g, KSD %.4f ≤ %.4f, p %.3f, %v", c.name, res.U2, res.SE, res.KSD, res.Upper95, res.PValue, res.State)
		if res.State != SteinSignificant || !(res.Upper95 > 0) || !(res.KSD > 0) || res.Below(res.KSD) {
			t.Errorf("%s: %+v, want a significant discrepancy with a positive upper bound", c.name, res)
		}
	}
}

// The standard error against the spread of U over repeated samples in the
// non-degenerate case: N(0, 1.5²I) in 2-D scored against N(0, I), N = 300,
// R = 300 repeats, each standardised by its own scale as AssessStein does.
// The mean SE must match the empirical sd of U within 4 standard errors of
// the comparison: the relative standard error of an sd from R draws is
// √((κ − 1)/(4R)), κ the kurtosis of U (estimated from the repeats), and
// the mean SE has its own √(var(SE)/R)/mean(SE). Without the scale term of
// the influence (the SE of Hoeffding's projection alone, logged) the SE
// would ignore that the scale is estimated from the same draws.
func TestSteinStandardErrorMatchesSpread(t *testing.T) {
	const n, p, reps = 300, 2, 300
	r := rand.New(rand.NewPCG(79, 83))
	c2, beta := IMQ{}.params()
	var us, ses, hoeff []float64
	for range reps {
		x, s := normalSample(r, n, p, 0, 1.5)
		z, sz, _ := standardise(p, x, s)
		_, h, q := steinMatrix(c2, beta, p, z, sz)
		u, psi := steinInfluence(c2, beta, p, z, sz, h)
		_, hse := steinMoments(h)
		us = append(us, u)
		ses = append(ses, steinSE(psi, q))
		hoeff = append(hoeff, hse)
	}
	mu := mean(us)
	sd := stdDev(us, mu)
	var m4 float64
	for _, u := range us {
		m4 += math.Pow(u-mu, 4)
	}
	kurt := m4 / reps / math.Pow(sd, 4)
	meanSE := mean(ses)
	sdSE := stdDev(ses, meanSE)
	relTol := 4 * math.Sqrt((kurt-1)/(4*reps)+sdSE*sdSE/(reps*meanSE*meanSE))
	t.Logf("sd(U) %.4g, mean SE %.4g (ratio %.3f, tolerance ±%.3f, kurtosis %.2f); Hoeffding term alone %.4g", sd, meanSE, meanSE/sd, relTol, kurt, mean(hoeff))
	if math.Abs(meanSE/sd-1) > relTol {
		t.Errorf("mean SE %.4g vs empirical sd of U %.4g: ratio %.3f, want 1 ± %.3f", meanSE, sd, meanSE/sd, relTol)
	}
}
