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
		_, h, q, dlog := steinMatrix(c2, beta, p, z, sz, nil)
		u, psi := steinInfluence(p, z, h, dlog)
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

// The level for dependent draws: 4 chains of 100 steps of a stationary
// AR(1) with ρ = 0.5 in each of 2 coordinates (x_{t+1} = ρx_t +
// √(1−ρ²)e_t, whose law at every step is exactly N(0, I), the target),
// laid out as a StreamKSD keeps them (one row per chain per step). With
// the Markov multiplier the state must be SteinIndistinguishable in at
// least 0.888 of 200 seeds (4 binomial standard deviations below 95 %).
// The count treating the same draws as independent is logged: neighbouring
// draws make U positive on average, so that test over-rejects.
func TestSteinTestLevelChains(t *testing.T) {
	const seeds, chains, steps, p, rho = 200, 4, 100, 2, 0.5
	lo := 0.95 - 4*math.Sqrt(0.95*0.05/seeds)
	indist, naive := 0, 0
	var blocks float64
	for seed := range seeds {
		r := rand.New(rand.NewPCG(uint64(seed), 2024))
		x := make([]float64, steps*chains*p)
		for c := range chains {
			for j := range p {
				v := r.NormFloat64()
				for t := range steps {
					x[(t*chains+c)*p+j] = v
					v = rho*v + math.Sqrt(1-rho*rho)*r.NormFloat64()
				}
			}
		}
		s := stdNormalScores(x)
		res := AssessStein(p, x, s, SteinOptions{Chains: chains, Replicates: 99}, r)
		if res.State == SteinIndistinguishable {
			indist++
		}
		blocks += res.Block
		if AssessStein(p, x, s, SteinOptions{Replicates: 99}, r).State == SteinIndistinguishable {
			naive++
		}
	}
	frac := float64(indist) / seeds
	t.Logf("chains: indistinguishable in %.3f of %d seeds (want ≥ %.3f), mean block %.2f; as if independent: %.3f", frac, seeds, lo, blocks/seeds, float64(naive)/seeds)
	if frac < lo {
		t.Errorf("AR(1) chains with the target law indistinguishable in %.3f of seeds, want ≥ %.3f", frac, lo)
	}
}

// Stein identity in standardised coordinates: for X ~ N(μ, Q⁻¹) exact and
// any fixed scale σ, E k₀(X/σ, σ∘s(X); y/σ, σ∘s(y)) = 0 for fixed y (the
// identity of Liu, Lee and Jordan 2016 holds for the law of X/σ, whose
// score is σ∘s), by Monte Carlo over 50000 draws within 4 standard
// errors; σ = (0.15, 2, 0.5) is far from 1. Control: transforming the
// scores the wrong way (s/σ) breaks the identity by more than 4 standard
// errors, so the check can fail.
func TestSteinIdentityStandardised(t *testing.T) {
	g := newGaussian([]float64{0.5, -1, 0.2}, testPrecision3)
	r := rand.New(rand.NewPCG(89, 97))
	const n = 50000
	x, s := g.sample(r, n)
	sigma := []float64{0.15, 2, 0.5}
	y := []float64{1.5, -2, 0.7}
	sy := make([]float64, 3)
	g.score(y, sy)
	meanK := func(right bool) (m, se float64) {
		tr := func(v, sv []float64) (z, sz []float64) {
			z, sz = make([]float64, 3), make([]float64, 3)
			for j := range 3 {
				z[j] = v[j] / sigma[j]
				if right {
					sz[j] = sv[j] * sigma[j]
				} else {
					sz[j] = sv[j] / sigma[j]
				}
			}
			return z, sz
		}
		zy, szy := tr(y, sy)
		var sum, sum2 float64
		for i := range n {
			zx, szx := tr(x[3*i:3*i+3], s[3*i:3*i+3])
			v := IMQ{}.Stein(zx, szx, zy, szy)
			sum += v
			sum2 += v * v
		}
		m = sum / n
		return m, math.Sqrt((sum2/n - m*m) / n)
	}
	if m, se := meanK(true); math.Abs(m) > 4*se {
		t.Errorf("standardised kernel: E k₀ = %.3g ± %.2g, want 0 within 4 standard errors", m, se)
	}
	if m, se := meanK(false); !(math.Abs(m) > 4*se) {
		t.Errorf("control with scores s/σ: E k₀ = %.3g ± %.2g, want far from 0", m, se)
	}
}

// With scale 1 in every coordinate (draws whose sd is exactly 1) the
// assessment's U-statistic is the plain one of SteinDiscrepancy with the
// same kernel, which the worked values above check (c = 1, β = −½).
func TestAssessSteinUnitScaleMatchesPlainU(t *testing.T) {
	// 8 points in 1-D with mean 0, rescaled to sd 1 (divisor N − 1).
	x8 := []float64{-1.5, 1.5, -0.5, 0.5, 0.25, -0.25, 2, -2}
	f := 1 / stdDev(x8, 0)
	for i := range x8 {
		x8[i] *= f
	}
	s := stdNormalScores(x8)
	res := AssessStein(1, x8, s, SteinOptions{Replicates: 19}, rand.New(rand.NewPCG(1, 1)))
	want := SteinDiscrepancy(IMQ{}, 1, x8, s).U2
	if !near(res.Scale[0], 1, 1e-12) || !near(res.U2, want, 1e-12) || res.Kernel != (IMQ{C: 1, Beta: -0.5}) {
		t.Errorf("unit scale: scale %v, U² %v, kernel %+v; want 1, %v (SteinDiscrepancy), c 1 β −½", res.Scale, res.U2, res.Kernel, want)
	}
}

// A stream's Assess is AssessStein of its kept draws with one chain per
// row of a round, and the same generator state gives the same result.
func TestStreamKSDAssess(t *testing.T) {
	const dim, rows = 2, 3
	r := rand.New(rand.NewPCG(101, 103))
	st := NewStreamKSD(IMQ{}, dim, rows, 60)
	var all, allS []float64
	for range 20 {
		x, s := normalSample(r, rows, dim, 0.2, 1)
		st.Add(x, s)
		all, allS = append(all, x...), append(allS, s...)
	}
	got := st.Assess(49, 0, rand.New(rand.NewPCG(5, 5)))
	want := AssessStein(dim, all, allS, SteinOptions{Chains: rows, Replicates: 49}, rand.New(rand.NewPCG(5, 5)))
	if got.N != 60 || got.U2 != want.U2 || got.SE != want.SE || got.PValue != want.PValue || got.State != want.State {
		t.Errorf("stream Assess %+v, want %+v", got, want)
	}
}

// The target rule and the states: Below needs the upper bound under the
// target and a defined result; too few draws or a NaN are undefined, with
// NaN figures and a plain-words state.
func TestSteinResultBelowAndUndefined(t *testing.T) {
	r := rand.New(rand.NewPCG(7, 7))
	res := SteinResult{State: SteinIndistinguishable, KSD: 0, Upper95: 0.2}
	if res.Below(0.1) || !res.Below(0.3) || res.Below(0.2) {
		t.Errorf("Below with upper bound 0.2: %v %v %v, want false true false", res.Below(0.1), res.Below(0.3), res.Below(0.2))
	}
	if (SteinResult{State: SteinUndefined, Upper95: math.NaN()}).Below(1) {
		t.Error("an undefined result met a target")
	}
	x, s := normalSample(r, 7, 2, 0, 1)
	few := AssessStein(2, x, s, SteinOptions{}, r)
	x, s = normalSample(r, 50, 2, 0, 1)
	s[3] = math.NaN()
	bad := AssessStein(2, x, s, SteinOptions{}, r)
	for _, u := range []SteinResult{few, bad} {
		if u.State != SteinUndefined || !math.IsNaN(u.U2) || !math.IsNaN(u.Upper95) || u.Below(math.Inf(1)) {
			t.Errorf("undefined input gave %+v", u)
		}
	}
	for st, want := range map[SteinState]string{
		SteinUndefined:         "undefined: too few draws or values that are not finite",
		SteinIndistinguishable: "not distinguishable from 0 at this sample size",
		SteinSignificant:       "distinguishable from 0: the draws differ from the target",
	} {
		if st.String() != want {
			t.Errorf("%d.String() = %q, want %q", int(st), st.String(), want)
		}
	}
	for name, f := range map[string]func(){
		"chains": func() { AssessStein(2, x[:20], s[:20], SteinOptions{Chains: 3}, r) },
		"rng":    func() { AssessStein(2, x, s, SteinOptions{}, nil) },
		"reps":   func() { AssessStein(2, x, s, SteinOptions{Replicates: -1}, r) },
	} {
		if msg := panicMessage(f); len(msg) < 6 || msg[:6] != "diag: " {
			t.Errorf("%s: panic %q, want a diag: panic", name, msg)
		}
	}
}

// D_l = ∂U/∂log σ_l in closed form against a central difference of U
// (SteinDiscrepancy of the rescaled draws; step 1e-4, truncation error
// O(1e-8) relative), for two kernels in 3-D.
func TestSteinScaleDerivative(t *testing.T) {
	r := rand.New(rand.NewPCG(107, 109))
	x, s := normalSample(r, 40, 3, 0.2, 1.3)
	for _, k := range []IMQ{{}, {C: 0.7, Beta: -0.3}} {
		c2, beta := k.params()
		_, _, _, dlog := steinMatrix(c2, beta, 3, x, s, nil)
		for l := range 3 {
			u := func(e float64) float64 {
				xe, se := append([]float64(nil), x...), append([]float64(nil), s...)
				for i := l; i < len(xe); i += 3 {
					xe[i] *= math.Exp(-e)
					se[i] *= math.Exp(e)
				}
				return SteinDiscrepancy(k, 3, xe, se).U2
			}
			const e = 1e-4
			want := (u(e) - u(-e)) / (2 * e)
			if !near(dlog[l], want, 1e-6*(1+math.Abs(want))) {
				t.Errorf("%+v, coordinate %d: ∂U/∂log σ = %.10g, central difference %.10g", k, l, dlog[l], want)
			}
		}
	}
}

// The test on a thinned subsample (SteinOptions.BootstrapDraws) keeps the
// level of the test on every draw: exact i.i.d. draws of N(0, I) (p = 2,
// N = 600, 200 tested) and AR(1) chains whose every draw has the target
// law (4 chains of 200 steps, ρ = 0.5, 200 tested: every 4th round) must
// be SteinIndistinguishable in at least 0.888 of 200 seeds, the band of
// TestSteinTestLevelIID (4 binomial standard deviations below 95 %). The
// test is the wild bootstrap of Chwialkowski, Strathmann and Gretton
// (2016) applied to a sample of the same law, so the level is the same
// claim; the estimate and SE must still be those of every draw (checked
// on the first 5 seeds).
func TestSteinSubsampleTestLevel(t *testing.T) {
	const seeds, p = 200, 2
	lo := 0.95 - 4*math.Sqrt(0.95*0.05/seeds)
	for _, c := range []struct {
		name          string
		chains, steps int
		rho           float64
	}{{"i.i.d.", 0, 600, 0}, {"AR(1) chains", 4, 200, 0.5}} {
		indist := 0
		for seed := range seeds {
			r := rand.New(rand.NewPCG(uint64(seed), 4242))
			width := max(c.chains, 1)
			x := make([]float64, c.steps*width*p)
			for ch := range width {
				for j := range p {
					v := r.NormFloat64()
					for st := range c.steps {
						x[(st*width+ch)*p+j] = v
						v = c.rho*v + math.Sqrt(1-c.rho*c.rho)*r.NormFloat64()
					}
				}
			}
			s := stdNormalScores(x)
			opt := SteinOptions{Chains: c.chains, Replicates: 99, BootstrapDraws: 200}
			res := AssessStein(p, x, s, opt, rand.New(rand.NewPCG(uint64(seed), 1)))
			if res.TestDraws != 200 || res.N != c.steps*width {
				t.Fatalf("%s seed %d: tested %d of %d draws, want 200 of %d", c.name, seed, res.TestDraws, res.N, c.steps*width)
			}
			if seed >= 5 { // the comparison below costs a test on every draw
				if res.State == SteinIndistinguishable {
					indist++
				}
				continue
			}
			opt.BootstrapDraws = 0
			all := AssessStein(p, x, s, opt, rand.New(rand.NewPCG(uint64(seed), 1)))
			if res.U2 != all.U2 || res.SE != all.SE || res.Upper95 != all.Upper95 || all.TestDraws != all.N {
				t.Fatalf("%s seed %d: estimate %v ± %v on the subsample's run, %v ± %v on every draw's", c.name, seed, res.U2, res.SE, all.U2, all.SE)
			}
			if res.State == SteinIndistinguishable {
				indist++
			}
		}
		frac := float64(indist) / seeds
		t.Logf("%s: indistinguishable in %.3f of %d seeds (want ≥ %.3f)", c.name, frac, seeds, lo)
		if frac < lo {
			t.Errorf("%s with the target law, tested on 200 draws: indistinguishable in %.3f of seeds, want ≥ %.3f", c.name, frac, lo)
		}
	}
}

// The power left to the test on a subsample: the laws of
// TestSteinTestDetectsBiasedLaws (N = 1000, p = 2), tested on 250 draws,
// are still told apart from the target.
func TestSteinSubsampleTestDetectsBiasedLaws(t *testing.T) {
	r := rand.New(rand.NewPCG(71, 73))
	for _, c := range []struct {
		name      string
		mu, sigma float64
	}{{"N(0, 1.5²I)", 0, 1.5}, {"N(0.3·1, I)", 0.3, 1}} {
		x, s := normalSample(r, 1000, 2, c.mu, c.sigma)
		res := AssessStein(2, x, s, SteinOptions{BootstrapDraws: 250}, r)
		t.Logf("%s: U² %.4g ± %.2g, p %.3f on %d draws, %v", c.name, res.U2, res.SE, res.PValue, res.TestDraws, res.State)
		if res.State != SteinSignificant || res.TestDraws != 250 {
			t.Errorf("%s: %+v, want a significant discrepancy tested on 250 draws", c.name, res)
		}
	}
}

// CopyFrom gives a snapshot that assesses and summarises exactly as its
// source, and does not move when the source goes on.
func TestWindowCopies(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 9))
	const dim, rows = 3, 4
	st, cp := NewStreamKSD(IMQ{}, dim, rows, 64), NewStreamKSD(IMQ{}, dim, rows, 64)
	h, hc := NewHistory(rows, dim, 32), NewHistory(rows, dim, 32)
	round := func() {
		x, s := normalSample(r, rows, dim, 0, 1)
		st.Add(x, s)
		h.Add(x)
	}
	for range 100 {
		round()
	}
	cp.CopyFrom(st)
	hc.CopyFrom(h)
	want, wantSum := st.Assess(49, 0, rand.New(rand.NewPCG(1, 1))), h.Summarize()
	for range 37 {
		round()
	}
	got, gotSum := cp.Assess(49, 0, rand.New(rand.NewPCG(1, 1))), hc.Summarize()
	if got.U2 != want.U2 || got.SE != want.SE || got.PValue != want.PValue || got.N != want.N {
		t.Errorf("copied window: %+v, source at the copy: %+v", got, want)
	}
	for j := range wantSum {
		if gotSum[j].Rhat.Reported != wantSum[j].Rhat.Reported || gotSum[j].BulkESS != wantSum[j].BulkESS || gotSum[j].Mean != wantSum[j].Mean {
			t.Errorf("coordinate %d: copied history %+v, source at the copy %+v", j, gotSum[j], wantSum[j])
		}
	}
	cp.Add(make([]float64, rows*dim), make([]float64, rows*dim)) // the copy works on its own
	hc.Add(make([]float64, rows*dim))
}

// A stop that never fires changes nothing (the same figures, bit for bit);
// one that fires gives up with the undefined result, whether it fires at
// the first row of the Stein matrix or only before the bootstrap.
func TestAssessUntilStops(t *testing.T) {
	const dim, rows = 2, 3
	r := rand.New(rand.NewPCG(107, 109))
	st := NewStreamKSD(IMQ{}, dim, rows, 60)
	for range 20 {
		x, s := normalSample(r, rows, dim, 0.2, 1)
		st.Add(x, s)
	}
	want := st.Assess(49, 0, rand.New(rand.NewPCG(5, 5)))
	got := st.AssessUntil(49, 0, rand.New(rand.NewPCG(5, 5)), func() bool { return false })
	if got.U2 != want.U2 || got.SE != want.SE || got.PValue != want.PValue || got.State != want.State {
		t.Errorf("with a stop that never fires: %+v, want %+v", got, want)
	}
	for _, after := range []int{0, 60} { // asked once per row (60), then before the bootstrap
		calls := 0
		stopped := st.AssessUntil(49, 0, rand.New(rand.NewPCG(5, 5)), func() bool { calls++; return calls > after })
		if stopped.State != SteinUndefined || !math.IsNaN(stopped.U2) || !math.IsNaN(stopped.PValue) || stopped.Below(math.Inf(1)) {
			t.Errorf("stopped after %d calls: %+v, want the undefined result", after, stopped)
		}
	}
}
