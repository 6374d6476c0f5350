package session

import (
	"fmt"
	"math"
	"strings"

	"sluice/kernels"
	"sluice/kernels/bound"
	"sluice/kernels/diag"
)

// The verdict: every progress report and the Finished frame carry a list
// of named checks, each passed, warned or failed with the figure it rests
// on and one sentence for a person. A session never ends "target met"
// while a check fails (targetsMet), and a session that would have ended
// with its draws collected or its targets met ends CheckFailed instead,
// naming the check. Every figure a check reads is computed on the step
// cadence (Session.stepped), so the verdict, like the draws, does not
// depend on the client's speed.

// CheckStatus is how a check came out.
type CheckStatus int

const (
	CheckPass CheckStatus = iota + 1
	// CheckWarn: something to look at; the draws may still be usable.
	CheckWarn
	// CheckFail: the draws should not be trusted for what the check
	// covers.
	CheckFail
)

func (c CheckStatus) String() string {
	switch c {
	case CheckPass:
		return "pass"
	case CheckWarn:
		return "warn"
	case CheckFail:
		return "fail"
	}
	return "unknown"
}

// Check is one named check of the verdict.
type Check struct {
	// Name is one of "divergence", "stability", "mixing", "bias",
	// "gradient", "guarantee".
	Name   string
	Status CheckStatus
	// Figure is the number the status rests on (the message says which);
	// NaN when there is none.
	Figure float64
	// Message is one sentence for a person.
	Message string
}

// SteinReport is the kernel Stein discrepancy of the kept draws with its
// uncertainty (diag.AssessStein on the monitor's thinned window).
type SteinReport struct {
	KSD, U2, SE, Upper95, PValue float64
	Draws                        int
	State                        diag.SteinState
}

// Thresholds of the mixing check. R-hat: Vehtari, Gelman, Simpson,
// Carpenter and Bürkner (2021) recommend using draws only when R-hat is
// below 1.01 (their Section 4; from memory); above 1.1, the older rule of
// Gelman and Rubin (1992), the chains clearly disagree. ESS: the same
// paper recommends bulk- and tail-ESS of at least 100 per chain (400 for
// their four chains; from memory); we ask 100 per chain, at most 400 in
// all, so that a run of many short chains is not held to 100 each.
const (
	rhatWarn       = 1.01
	rhatFail       = 1.1
	essPerChain    = 100
	essTotalCap    = 400
	chainsDisagree = 6 // chain means more than this many MCSEs of a chain mean apart
)

// minESS is the mixing check's ESS floor for a session of chains chains.
func minESS(chains int) float64 { return math.Min(essPerChain*float64(chains), essTotalCap) }

// verdict builds the checks at the current state. Every figure it reads
// was computed on the step cadence.
func (s *Session) verdict() []Check {
	var out []Check
	out = append(out, s.div.check())
	if c, ok := s.stabilityCheck(); ok {
		out = append(out, c)
	}
	if c, ok := s.mixingCheck(); ok {
		out = append(out, c)
	}
	if c, ok := s.biasCheck(); ok {
		out = append(out, c)
	}
	if c, ok := s.gradientCheck(); ok {
		out = append(out, c)
	}
	out = append(out, s.guaranteeChecks()...)
	return out
}

// failing returns the failed checks' names and messages, "" when none
// failed.
func failing(checks []Check) string {
	var parts []string
	for _, c := range checks {
		if c.Status == CheckFail {
			parts = append(parts, fmt.Sprintf("check %s failed: %s", c.Name, c.Message))
		}
	}
	return strings.Join(parts, "; ")
}

// curvatureSeen is the largest curvature the session knows of: the
// gradient pairs' certified floor on M (the Lipschitz floor once a pair
// showed non-convexity), the probe's estimate and the declared M.
func (s *Session) curvatureSeen() float64 {
	c := &s.mon.curv
	seen := c.SmoothnessFloor()
	if c.NonConvex() {
		seen = c.LipschitzFloor()
	}
	seen = nanTo(seen, 0)
	if s.spec.Curvature != nil {
		seen = math.Max(seen, s.spec.Curvature.Smoothness)
	}
	for _, ph := range s.phases {
		if p, ok := ph.(*curvatureProbe); ok {
			seen = math.Max(seen, p.bigM)
		}
	}
	return seen
}

// stabilityCheck judges the step against the curvature seen, with the
// kernel's own rule (stability.go).
func (s *Session) stabilityCheck() (Check, bool) {
	h := kernelReport(s.kernel).Step
	lambda := s.curvatureSeen()
	// With a metric C = L·Lᵀ the kernel steps in y = L⁻¹x, where the
	// curvature is that of Lᵀ∇²(−log π)L: the pairs seen in x do not
	// measure it, the tuner's probe in the metric's units does.
	if mu, ok := s.kernel.(kernels.MetricUser); ok && mu.Metric() != nil && mu.Metric().Kind() != kernels.IdentityMetric {
		if s.tune == nil || !(s.tune.bigM > 0) {
			return Check{}, false
		}
		lambda = s.tune.bigM
	}
	rule, ok := stabilityRuleOf(s.spec.Kernel, s.kernel)
	if !ok || !(h > 0) || !(lambda > 0) || math.IsInf(lambda, 0) {
		return Check{}, false
	}
	rho := rule.growth(h, lambda)
	hMax := rule.largestStable(lambda)
	c := Check{Name: "stability", Figure: rho}
	switch {
	case rho >= 1:
		c.Status = CheckFail
		c.Message = fmt.Sprintf("the step %.4g is unstable for the curvature seen (M ≥ %.4g): on the stiffest direction the chains grow by a factor %.3g per step (%s); try a step below %.2g",
			h, lambda, math.Sqrt(rho), rule.source, roundDown2(hMax))
	case h > hMax/2:
		c.Status = CheckWarn
		c.Message = fmt.Sprintf("the step %.4g is more than half the largest stable step %.3g for the curvature seen (M ≥ %.4g; %s): expect a visible discretisation bias along the stiffest direction",
			h, hMax, lambda, rule.source)
	default:
		c.Status = CheckPass
		c.Message = fmt.Sprintf("the step %.4g is below half the largest stable step %.3g for the curvature seen (M ≥ %.4g; %s)", h, hMax, lambda, rule.source)
	}
	return c, true
}

// mixingCheck judges R-hat, the ESSs and the agreement of the chains'
// means.
func (s *Session) mixingCheck() (Check, bool) {
	if !s.mon.measured {
		if s.kept == 0 {
			return Check{}, false
		}
		return Check{Name: "mixing", Status: CheckWarn, Figure: math.NaN(),
			Message: "too few kept draws to measure R-hat and the effective sample sizes; run longer"}, true
	}
	bulk, tail, rhat := s.mon.worst()
	ess := math.Min(bulk, tail)
	floor := minESS(s.spec.Chains)
	c := Check{Name: "mixing", Figure: rhat}
	switch {
	case !(rhat <= rhatFail) && s.guaranteeOnly():
		c.Status = CheckWarn
		c.Message = fmt.Sprintf("R-hat is %.3g (above %g): the kept draws are far from a mixed sample; the guarantee covers each chain's current state, not the kept sequence", rhat, rhatFail)
	case !(rhat <= rhatFail):
		c.Status = CheckFail
		c.Message = fmt.Sprintf("R-hat is %.3g (above %g): the chains disagree, they have not mixed or found different modes; run longer or start them closer", rhat, rhatFail)
	case s.mon.spread > chainsDisagree:
		c.Status = CheckWarn
		c.Figure = s.mon.spread
		c.Message = fmt.Sprintf("chain means differ by %.3g standard errors on %s: the chains may sit in different modes", s.mon.spread, s.mon.spreadName)
	case rhat > rhatWarn:
		c.Status = CheckWarn
		c.Message = fmt.Sprintf("R-hat is %.4g (above %g): the chains are not yet in agreement; run longer", rhat, rhatWarn)
	case !(ess >= floor):
		c.Status = CheckWarn
		c.Figure = ess
		c.Message = fmt.Sprintf("the smallest bulk- or tail-ESS is %.0f, below %.0f: means and quantiles are still imprecise; run longer", ess, floor)
	default:
		c.Status = CheckPass
		c.Message = fmt.Sprintf("R-hat %.4g ≤ %g and every bulk- and tail-ESS ≥ %.0f", rhat, rhatWarn, floor)
	}
	return c, true
}

// biasCheck reads the Stein assessment: with exact gradients a
// discrepancy significantly above 0 is a warning, and a failure when a
// max_ksd target asks for a small one.
func (s *Session) biasCheck() (Check, bool) {
	r := s.mon.stein
	if r == nil || s.spec.Noise.Stochastic {
		return Check{}, false
	}
	c := Check{Name: "bias", Figure: r.KSD}
	switch r.State {
	case diag.SteinSignificant:
		c.Status = CheckWarn
		if s.spec.Wants.MaxKSD > 0 {
			c.Status = CheckFail
		}
		c.Message = fmt.Sprintf("the Stein discrepancy %.3g (upper 95 %% bound %.3g, p = %.3g) is %s; a smaller step or a Metropolis-adjusted kernel reduces the bias",
			r.KSD, r.Upper95, r.PValue, r.State)
	case diag.SteinIndistinguishable:
		c.Status = CheckPass
		c.Figure = r.Upper95
		c.Message = fmt.Sprintf("the Stein discrepancy is %s (upper 95 %% bound %.3g on %d draws)", r.State, r.Upper95, r.Draws)
	default:
		c.Status = CheckWarn
		c.Figure = math.NaN()
		c.Message = "the Stein discrepancy is " + r.State.String()
	}
	return c, true
}

// gradientCheck reports the gradient check phase, or else the sign test
// from gradient pairs: ⟨∇log π(x₁) − ∇log π(x₀), x₁ − x₀⟩ > 0 on every
// pair means −log π curves downward wherever it was seen, which no
// normalisable density does everywhere (derived here: a concave potential
// f is bounded above by an affine function, so e^{−f} is not integrable),
// so it is a warning that the gradient may be that of −log π.
func (s *Session) gradientCheck() (Check, bool) {
	if s.gradCheck != nil && s.gradCheck.done {
		return s.gradCheck.check(), true
	}
	up, n := s.mon.uphill, s.mon.pairs
	if n < 10 {
		return Check{}, false
	}
	frac := float64(up) / float64(n)
	if up == n {
		return Check{Name: "gradient", Status: CheckWarn, Figure: frac,
			Message: fmt.Sprintf("on all %d gradient pairs seen, −log π curves downward, which no proper density does everywhere: is the gradient that of −log π instead of log π?", n)}, true
	}
	return Check{Name: "gradient", Status: CheckPass, Figure: frac,
		Message: fmt.Sprintf("%d of %d gradient pairs show −log π curving upward somewhere, as a proper density's must (no finite-difference check ran)", n-up, n)}, true
}

// divergence watches the chains for leaving the region they explored:
// after every step, the excursion E_k is the largest |x − c| over chains
// and coordinates, c the mean start point. The rule (ours): the chains
// have diverged when a position is not finite; when E_k exceeds
// divergenceFactor times the largest excursion of the reference window
// (the first divergenceWindow steps, or the burn-in if longer, up to 200
// steps); or when E_k grew by at least 1.5 times on each of the last 10
// steps (geometric growth: a diffusion's excursion grows like √k, by
// less than √2 per step after the first; derived here). Its state is in
// plain fields.
type divergence struct {
	Centre       []float64
	Window       int     // steps of the reference window
	Ref          float64 // largest excursion within the window
	Last         float64 // excursion at the last step
	Growing      int     // consecutive steps with E_k ≥ 1.5·E_{k−1}
	Largest      float64 // largest E_k/Ref seen after the window
	At           int     // step at which the chains diverged; 0 if not
	Chain        int     // the chain that went furthest at that step
	AtExcursion  float64
	NotFinite    bool
	DivergedText string
}

const (
	divergenceFactor = 1000
	divergenceWindow = 10
	divergenceGrowth = 1.5
	divergenceRun    = 10
)

func newDivergence(spec *Spec) *divergence {
	d := &divergence{Centre: make([]float64, spec.Dim), Window: int(max(divergenceWindow, min(spec.BurnIn, 200)))}
	for r := range spec.StartRows {
		for i := range spec.Dim {
			d.Centre[i] += spec.Start[r*spec.Dim+i] / float64(spec.StartRows)
		}
	}
	return d
}

// observe checks the positions after step k; it reports whether the
// chains diverged at this step.
func (d *divergence) observe(x []float64, k int) bool {
	if d.At > 0 {
		return true
	}
	dim := len(d.Centre)
	var e float64
	chain := 0
	// Chain by chain, so that the centre is indexed without a division
	// per value, and one comparison per value in the common case: a value
	// that is not finite makes its excursion NaN or +Inf, which fails
	// a < e (as a new largest one does), so only those are looked at
	// further (v−v is 0 for a finite v, NaN for ±Inf and NaN).
	for c := range len(x) / dim {
		centre := d.Centre[:dim]
		for j, v := range x[c*dim : (c+1)*dim] {
			if a := math.Abs(v - centre[j]); !(a < e) {
				if v-v != 0 {
					d.At, d.NotFinite, d.AtExcursion, d.Chain = k, true, math.Inf(1), c
					return true
				}
				if a > e {
					e, chain = a, c
				}
			}
		}
	}
	if d.Last > 0 && e >= divergenceGrowth*d.Last {
		d.Growing++
	} else {
		d.Growing = 0
	}
	d.Last = e
	if k <= d.Window {
		d.Ref = math.Max(d.Ref, e)
	} else if d.Ref > 0 {
		d.Largest = math.Max(d.Largest, e/d.Ref)
	}
	if d.Growing >= divergenceRun || (k > d.Window && e > divergenceFactor*math.Max(d.Ref, math.SmallestNonzeroFloat64)) {
		d.At, d.AtExcursion, d.Chain = k, e, chain
		return true
	}
	return false
}

func (d *divergence) check() Check {
	if d.At > 0 {
		return Check{Name: "divergence", Status: CheckFail, Figure: float64(d.At), Message: d.DivergedText}
	}
	return Check{Name: "divergence", Status: CheckPass, Figure: d.Largest,
		Message: fmt.Sprintf("no chain left the region explored in the first %d steps by more than %.3g times its size", d.Window, math.Max(d.Largest, 1))}
}

// divergedError is the session's failure when the chains diverged at
// step k: it names the step and says what to do.
func (s *Session) divergedError(k int) *Error {
	d := s.div
	h := kernelReport(s.kernel).Step
	what := "a position is not finite"
	switch {
	case d.NotFinite:
	case d.Growing >= divergenceRun:
		what = fmt.Sprintf("a position is %.3g from the start centre and grew geometrically for %d steps", d.AtExcursion, divergenceRun)
	default:
		what = fmt.Sprintf("a position is %.3g from the start centre, over %d times the region explored in the first %d steps", d.AtExcursion, divergenceFactor, d.Window)
	}
	msg := fmt.Sprintf("the chains diverged at step %d (%s)", k, what)
	lambda := s.curvatureSeen()
	rule, ok := stabilityRuleOf(s.spec.Kernel, s.kernel)
	switch {
	case s.mon.pairs >= 10 && s.mon.uphill == s.mon.pairs:
		msg += fmt.Sprintf(": on every gradient pair seen −log π curves downward; is the gradient that of −log π instead of log π? (step %.4g)", h)
	case ok && h > 0 && lambda > 0 && !math.IsInf(lambda, 0):
		msg += fmt.Sprintf(": the step %.4g is too large for the curvature seen (M ≥ %.4g); try a step below %.2g", h, lambda, roundDown2(rule.largestStable(lambda)))
	case h > 0:
		msg += fmt.Sprintf(": the step %.4g is too large for this target; try a smaller one", h)
	default:
		msg += ": check the target's log density and gradient"
	}
	d.DivergedText = msg
	return &Error{Kind: Invalid, Field: "register.step", Chain: d.Chain, Coord: -1, Reason: msg}
}

// boundBroken says why the declared curvature is contradicted by what the
// session has seen, "" when it is not: a gradient pair certifying M above
// the declared M, a pair showing non-convexity while m > 0 was declared,
// or pairs certifying m below the declared m.
func (s *Session) boundBroken() string {
	c := s.spec.Curvature
	if c == nil {
		return ""
	}
	cv := &s.mon.curv
	const slack = 1 + 1e-9
	switch {
	case s.mode != nil && s.mode.fault != nil:
		return s.mode.fault.Reason
	case cv.NonConvex() && c.StrongConvexity > 0:
		return fmt.Sprintf("a gradient pair shows −log π is not convex, but m = %.4g was declared", c.StrongConvexity)
	case cv.Pairs() > 0 && cv.SmoothnessFloor() > c.Smoothness*slack:
		return fmt.Sprintf("gradient pairs show M ≥ %.4g, above the declared M = %.4g", cv.SmoothnessFloor(), c.Smoothness)
	case cv.Pairs() > 0 && c.StrongConvexity > 0 && cv.ConvexityCeiling()*slack < c.StrongConvexity:
		return fmt.Sprintf("gradient pairs show m ≤ %.4g, below the declared m = %.4g", cv.ConvexityCeiling(), c.StrongConvexity)
	}
	return ""
}

// guaranteeChecks judges the bound: whether its assumptions were checked
// and hold, and whether it is informative (a W2 bound larger than the
// posterior's own spread, √(Σ sd²), the W2 distance from π to a point at
// its mean, says little).
func (s *Session) guaranteeChecks() []Check {
	g := s.guarantee
	if g == nil {
		return nil
	}
	if why := s.boundBroken(); why != "" {
		return []Check{{Name: "guarantee", Status: CheckFail, Figure: math.NaN(),
			Message: "the guaranteed bound does not hold: " + why}}
	}
	b, err := g.at(s.kernel.Steps())
	if err != nil {
		return nil
	}
	c := Check{Name: "guarantee", Status: CheckPass, Figure: b.Total,
		Message: fmt.Sprintf("the %s bound %.4g rests on %s; %s", g.metric, b.Total, g.theorem(), g.startText())}
	metric := s.declaredMetric()
	if metric != nil && g.metric == bound.W2 {
		// A W2 bound with a declared metric is a distance between the laws
		// of y = L⁻¹x (C = L·Lᵀ); TV is the same in any coordinates.
		c.Message = "in the declared metric's units (the distance ‖L⁻¹(x − x′)‖, C = L·Lᵀ): " + c.Message
	}
	if g.metric != 0 && g.metric.String() == "W2" && s.mon.measured && (metric == nil || metric.Kind() == kernels.DiagonalMetric) {
		// The posterior's spread in the bound's units: with a diagonal
		// metric y_i = x_i/√c_i.
		var v float64
		var cd []float64
		if metric != nil {
			cd = metric.Matrix()
		}
		for i, p := range s.mon.params {
			if cd != nil {
				v += p.SD * p.SD / cd[i*s.spec.Dim+i]
				continue
			}
			v += p.SD * p.SD
		}
		if spread := math.Sqrt(v); spread > 0 && b.Total > spread {
			c.Status = CheckWarn
			word := "guaranteed"
			if s.tune != nil && s.tune.updates > 0 {
				word = "estimated (the metric was adapted)"
			}
			c.Message = fmt.Sprintf("the %s W2 ≤ %.4g is %.3g× the posterior's spread (%.3g): it says little; %s", word, b.Total, b.Total/spread, spread, c.Message)
		}
	}
	return []Check{c}
}

// guaranteeOnly reports whether the session's only target is a
// guaranteed error (Wants.Eps) whose declared assumptions hold: the
// promise is then about each chain's current law, which R-hat on the kept
// sequence does not measure.
func (s *Session) guaranteeOnly() bool {
	w := s.spec.Wants
	return s.guarantee != nil && w.Eps > 0 && w.MinBulkESS == 0 && w.MinTailESS == 0 && w.MaxRhat == 0 && w.MaxKSD == 0 &&
		s.boundBroken() == ""
}

// certifyStart bounds the W2 start distance of a guaranteed W2 bound from
// the gradients at the chains' start points, when the client declared m
// but no start distance: by m-strong convexity of f = −log π,
// ‖x₀ − x*‖ ≤ ‖∇f(x₀)‖/m, and E_π‖X − x*‖² ≤ p/m (Durmus and Moulines
// 2019, from memory), so by the triangle inequality
//
//	W2(δ_{x₀}, π) ≤ ‖∇log π(x₀)‖/m + √(p/m)
//
// per chain; the bound takes the worst chain. With a declared metric
// C = L·Lᵀ the theorem holds for the chains on y = L⁻¹x, whose score is
// Lᵀ∇log π and whose m is the declared one (read in the metric's units),
// so the norm is taken of Lᵀ∇log π(x₀) and the distance is in the
// metric's units. It runs on the kernel's first request (steps = 0) when
// that asks the gradient at every chain's start, as the unadjusted
// Langevin kernels do.
func (s *Session) certifyStart(req *kernels.Request) {
	g := s.guarantee
	c := s.spec.Curvature
	if g == nil || c == nil || g.startSource != "" || !req.Need.Has(kernels.NeedGradient) || req.Rows != s.spec.Chains {
		return
	}
	// A TV bound's start is the mode search's (modesearch.go).
	if g.metric != bound.W2 || c.StrongConvexity <= 0 || c.StartDistance > 0 {
		return
	}
	d := s.spec.Dim
	starts := s.spec.Start
	worst := 0.0
	metric := s.declaredMetric()
	var score []float64
	if metric != nil {
		score = make([]float64, d)
	}
	for r := range req.Rows {
		row := r % s.spec.StartRows
		if s.spec.StartRows == 1 {
			row = 0
		}
		x := req.Points[r*d : (r+1)*d]
		for i, v := range x {
			if v != starts[row*d+i] {
				return // not the start points
			}
		}
		gr := s.answer.Grad[r*d : (r+1)*d]
		if metric != nil {
			metric.ApplyFactorT(score, gr)
			gr = score
		}
		var n2 float64
		for _, v := range gr {
			n2 += v * v
		}
		worst = math.Max(worst, math.Sqrt(n2)/c.StrongConvexity)
	}
	g.setting.StartDistance = worst + math.Sqrt(float64(d)/c.StrongConvexity)
	g.startSource = fmt.Sprintf("the start distance %.4g certified from the start gradients (‖∇log π(x₀)‖/m + √(p/m), worst chain; strong convexity, Durmus and Moulines 2019)", g.setting.StartDistance)
	if metric != nil {
		g.startSource = fmt.Sprintf("the start distance %.4g, in the declared metric's units, certified from the start gradients (‖Lᵀ∇log π(x₀)‖/m + √(p/m) with C = L·Lᵀ, worst chain; strong convexity, Durmus and Moulines 2019)", g.setting.StartDistance)
	}
	g.startPending = false
	if s.spec.Wants.Eps > 0 {
		s.epsSteps = g.stepsTo(s.spec.Wants.Eps, 0)
		if g.planned > 0 {
			// The planned step does not depend on the start distance
			// (W2Rule); the iterations do: plan them again from the
			// certified one.
			if p, err := bound.NewPlan(bound.Spec{Setting: g.setting, Metric: bound.W2, Eps: s.spec.Wants.Eps, Chains: s.spec.Chains}); err == nil {
				g.planned = g.k0 + p.Iterations
			}
		}
	}
}

// declaredMetric returns the metric the client declared, nil when none
// (or the identity).
func (s *Session) declaredMetric() *kernels.Metric {
	if s.tune == nil || s.tune.declare == nil || s.tune.declare.Kind() == kernels.IdentityMetric {
		return nil
	}
	return s.tune.declare
}

// roundDown2 rounds x > 0 down to two significant digits, so that a step
// "below" it is below x.
func roundDown2(x float64) float64 {
	if !(x > 0) || math.IsInf(x, 0) {
		return x
	}
	p := math.Pow(10, math.Floor(math.Log10(x))-1)
	return math.Floor(x/p) * p
}
