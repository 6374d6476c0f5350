package session

import (
	"fmt"
	"math"
	"slices"

	"sluice/kernels"
	"sluice/kernels/bound"
	"sluice/kernels/diag"
)

// ParameterDiagnostics is the measured accuracy of one parameter.
type ParameterDiagnostics struct {
	Name                                   string
	Mean, SD, Rhat, BulkESS, TailESS, MCSE float64
}

// CurvatureEstimate holds one-sided certificates from gradient pairs, in
// the units of the declared metric when there is one (the units the
// declared m and M are read in), else in the coordinates' own.
type CurvatureEstimate struct {
	Pairs int64
	// SmoothnessAtLeast is a lower bound on M; StrongConvexityAtMost an
	// upper bound on m.
	SmoothnessAtLeast, StrongConvexityAtMost float64
	NotConvex                                bool
	// The opt-in probe's estimates of M and m (0 when none ran) and the
	// evaluations it cost.
	ProbedSmoothness, ProbedConvexity float64
	ProbeEvaluations                  int64
}

// TargetStatus reports one accuracy target.
type TargetStatus struct {
	Name          string
	Want, Current float64
	Met           bool
	// ProjectedEvaluations still needed at the current rate; −1 when it
	// cannot be projected.
	ProjectedEvaluations int64
}

// guarantee computes the running theoretical bound of a session whose kernel
// the bounds cover (kernelEntry.guaranteed) and whose
// client declared the curvature (package bound: Dalalyan (2017) in TV,
// Dalalyan and Karagulyan (2019) in W2).
type guarantee struct {
	setting bound.Setting
	metric  bound.Metric
	h       float64
	planned int // steps the plan asked for; 0 when the step was given
	// penalty λ > 0 when the chains sample π_λ ∝ π·exp(−λ‖θ − centre‖²/2)
	// (m = 0; derived here: TV(π, π_λ) ≤ λμ₂/2); the engine adds it to
	// every answer.
	penalty float64
	centre  []float64
	// replan is set when the step was planned and the gradient noise is
	// to be measured: the step is planned again, once, with the measured
	// noise, during burn-in. k0 is the step count at which the current
	// step took effect: the bound counts only the steps since, from the
	// declared start distance, which can only overstate it (the chains'
	// distance to π contracts during the earlier steps too).
	replan bool
	k0     int
	eps    float64
	chains int
	// startSource says how the start distance was obtained ("" for the
	// declared or default one).
	startSource string
	// startPending is set for a W2 bound whose start distance will be
	// certified from the start gradients (m declared, no start distance):
	// the planned steps are not known until then.
	startPending bool
	// shift is, for a TV bound, the shift term TV(N(x̂, M⁻¹I),
	// N(x*, M⁻¹I)) added to the start term: the mode search's budget
	// (shiftBudget) until it completes, then the term its certified
	// radius gives (modesearch.go). modeText says what the search found
	// ("" while it runs).
	shift, shiftBudget float64
	modeText           string
}

// tvShiftNoTarget is the shift term the mode search aims at when a TV
// bound is asked for without a target (wants.metric TV, eps 0): a
// hundredth in TV, a tenth of the loosest target (0.1) a TV rule is
// commonly asked for.
const tvShiftNoTarget = 0.01

// newGuarantee returns nil when no bound applies: no curvature declared,
// another kernel, m = 0, or a step outside the theorem's range.
func newGuarantee(spec *Spec, k *kernelEntry) (*guarantee, error) {
	c := spec.Curvature
	if c == nil || !k.guaranteed || (c.StrongConvexity == 0 && spec.Wants.Eps == 0) {
		return nil, nil
	}
	g := &guarantee{setting: bound.Setting{Convexity: c.StrongConvexity, Smoothness: c.Smoothness, Dim: spec.Dim,
		StartDistance: c.StartDistance, SecondMoment: c.SecondMoment, Source: bound.Declared}, metric: spec.Wants.Metric,
		eps: spec.Wants.Eps, chains: spec.Chains}
	if n := spec.Noise; n.Stochastic {
		// The kernel sees the mean of r replicates: error variance σ²/r.
		g.setting.Noise = math.Sqrt(n.Variance / float64(n.Replicates))
		g.setting.Bias = n.Bias
		g.replan = spec.Step == 0 && n.Variance == 0
	}
	if g.metric == 0 {
		g.metric = bound.W2
	}
	planEps := spec.Wants.Eps
	if g.metric == bound.TV {
		// The chains start from N(x̂, M⁻¹I) around the mode search's
		// point (modesearch.go): the shift term takes a share of the
		// target, and the rule plans for the rest.
		g.shiftBudget = tvShiftNoTarget
		if planEps > 0 {
			g.shiftBudget = bound.TVShiftShare * planEps
			planEps -= g.shiftBudget
		}
		g.shift = g.shiftBudget
	} else {
		g.startPending = c.StrongConvexity > 0 && c.StartDistance == 0
	}
	if c.StrongConvexity == 0 || spec.Step == 0 { // plan it (validate allowed this only with wants.eps)
		p, err := bound.NewPlan(bound.Spec{Setting: g.setting, Metric: g.metric, Eps: planEps, Chains: spec.Chains})
		if err != nil {
			return nil, BadField("register.wants.eps", "cannot plan a step: %v", err)
		}
		g.penalty = p.Penalty
		if spec.Step == 0 || spec.Step > p.Step {
			// The penalised target's rule fixes the largest step its bound
			// covers; a larger step given by the client is brought down.
			spec.Step = p.Step
		}
		g.planned = p.Iterations
	}
	if g.penalty > 0 {
		g.centre = c.PenaltyCentre
		if g.centre == nil {
			g.centre = make([]float64, spec.Dim)
			for r := range spec.StartRows {
				for i := range spec.Dim {
					g.centre[i] += spec.Start[r*spec.Dim+i] / float64(spec.StartRows)
				}
			}
		}
	}
	g.h = spec.Step
	if _, err := g.at(0); err != nil {
		if spec.Wants.Eps > 0 || g.metric == bound.TV {
			return nil, BadField("register.step", "no guaranteed bound holds for this step: %v", err)
		}
		return nil, nil
	}
	return g, nil
}

func (g *guarantee) at(k int) (bound.Bound, error) {
	k = max(0, k-g.k0)
	if g.metric == bound.TV {
		b, err := bound.TVBound(g.setting, g.penalty, g.h, k)
		// The chains start from N(x̂, M⁻¹I), not N(x*, M⁻¹I): by the
		// triangle inequality and TV's contraction under a Markov kernel,
		// the shift between the two start laws adds to the start term
		// (docs/methods.md, section 2.5).
		b.Start += g.shift
		b.Total += g.shift
		return b, err
	}
	return bound.W2Bound(g.setting, g.h, k)
}

// stepsTo returns the smallest step count ≥ k at which the bound is at
// most eps, or −1 when no step count reaches it (the terms that do not
// shrink with k already exceed eps).
func (g *guarantee) stepsTo(eps float64, k int) int {
	ok := func(n int) bool {
		b, err := g.at(n)
		return err == nil && b.Total <= eps
	}
	if ok(k) {
		return k
	}
	hi := max(2*k, g.k0+16)
	for !ok(hi) {
		if hi > math.MaxInt32 {
			return -1
		}
		hi *= 2
	}
	lo := k // !ok(lo)
	for hi-lo > 1 {
		mid := lo + (hi-lo)/2
		if ok(mid) {
			hi = mid
		} else {
			lo = mid
		}
	}
	return hi
}

// monitor measures accuracy from what the session already has: the kept
// draws, the gradients evaluated at them (for the Stein discrepancy) and
// consecutive evaluated points of each chain (for curvature
// certificates). Its memory is bounded independently of the run length.
type monitor struct {
	dim, chains int
	stochastic  bool    // gradients are noisy: no scores, no certificates
	share       float64 // Limits.DiagnosticsShare
	names       []string
	hist        *diag.History
	ksd         *diag.StreamKSD
	curv        diag.CurvatureBounds
	// last evaluated point and gradient per chain, for the pairs, in the
	// declared metric's units when metric is set: y = L⁻¹x and its score
	// Lᵀ∇log π (C = L·Lᵀ), so that the secant ratios are the curvature of
	// the target of y, which the declared m and M describe.
	lastX, lastG []float64
	haveLast     []bool
	metric       *kernels.Metric
	ty, tg       []float64 // scratch for the change of units
	// keptX holds the positions of the last kept step until their scores
	// arrive; pendingScores says it is waiting. keptRef is the kernel's
	// own positions slice they were copied from (nil after a restore).
	keptX, keptRef []float64
	pendingScores  bool
	// keptS gathers the scores at keptX chain by chain when the chains are
	// stepped in groups; scored marks the chains it holds, nScored counts
	// them.
	keptS    []float64
	scored   []bool
	nScored  int
	requests int // requests seen, for the pair cadence
	lastKSD  float64
	stein    *SteinReport
	// The last measured figures, for the targets and the verdict.
	params   []ParameterDiagnostics
	measured bool
	// The chains the windows follow (nil: all).
	ksdIdx, histIdx []int
	// ksdEvaluations counts the Stein kernel evaluations of every
	// discrepancy computed, the work the windows bound.
	ksdEvaluations int64
	ksdSeen        int // draws offered at the last count
	// The judgements (judge.go): now is one on the live windows, bg one
	// on snapshots in a goroutine, which closes done when it has finished
	// (nil: none pending).
	now, bg *judgement
	done    chan struct{}
	// Per-chain sums of the kept draws (chains×dim) over chainN kept
	// steps, and the largest spread of the chains' means in pooled
	// standard errors (spreadName: of which parameter).
	chainSum   []float64
	chainN     int64
	spread     float64
	spreadName string
	// Gradient pairs taken for certificates, and how many of them showed
	// −log π curving downward (⟨Δ∇log π, Δx⟩ > 0).
	pairs, uphill int
}

// maxKSDPoints caps the kernel Stein discrepancy's window: the final
// report's U-statistic costs at most maxKSDPoints(maxKSDPoints+1)/2
// kernel evaluations, however many chains the session runs.
const maxKSDPoints = 2048

// monitorSizes returns the monitor's window sizes for dim and chains:
// the Stein discrepancy keeps rounds of ksdChains evenly spaced chains,
// ksdCap draws in all; the history keeps histCap draws of histChains
// evenly spaced chains.
func monitorSizes(dim, chains int) (ksdCap, ksdChains, histChains, histCap int) {
	// The U-statistic costs O(K²·dim) on K kept draws: keep K near
	// √(5·10⁷/dim), at most maxKSDPoints, and room for at least eight
	// rounds of the chains it follows: the window halves its rounds when
	// full (diag.StreamKSD), so it then still holds four, the fewest
	// diag.AssessStein assesses (its dependence correction needs them).
	// So it follows at most an eighth of K chains (evenly spread), and at
	// least two.
	base := min(int(math.Sqrt(5e7/float64(dim))), maxKSDPoints)
	ksdChains = min(chains, max(2, base/8))
	ksdCap = max(8*ksdChains, base)
	// The rank-normalised figures of Vehtari et al. (2021) sort every
	// coordinate's kept draws: keep about 10⁶ values in all (about 0.3 s
	// to summarise), between 16 and 4096 draws per chain, from at most
	// 2¹⁶/dim chains (at least 4) so that the 16 draws per chain stay
	// within that too.
	histChains = min(chains, max(4, (1<<16)/dim))
	histCap = max(16, min(4096, (1<<20)/(histChains*dim)))
	return ksdCap, ksdChains, histChains, histCap
}

// spread returns n indices evenly spread over 0..chains−1, or nil when n
// is every chain.
func spread(n, chains int) []int {
	if n >= chains {
		return nil
	}
	idx := make([]int, n)
	for i := range idx {
		idx[i] = i * chains / n
	}
	return idx
}

func newMonitor(dim, chains int, names []string) *monitor {
	ksdCap, ksdChains, histChains, histCap := monitorSizes(dim, chains)
	return &monitor{dim: dim, chains: chains, names: names, hist: diag.NewDrawHistory(histChains, dim, histCap),
		ksd:     diag.NewStreamKSD(diag.IMQ{}, dim, ksdChains, ksdCap),
		ksdIdx:  spread(ksdChains, chains),
		histIdx: spread(histChains, chains),
		lastX:   make([]float64, dim*chains), lastG: make([]float64, dim*chains), haveLast: make([]bool, chains),
		keptX: make([]float64, dim*chains), lastKSD: -1, chainSum: make([]float64, dim*chains)}
}

// addKSD offers the kept positions x and their scores sc (every chain) to
// the Stein discrepancy's window, thinned to its chains.
func (m *monitor) addKSD(x, sc []float64) {
	m.ksd.AddRows(x, sc, m.ksdIdx)
}

// answered records the gradients of one completed request (before Tell).
// Pairs of independently noisy gradients make meaningless curvature
// ratios (derived here: independent noise of variance s² per coordinate
// on each gradient inflates E‖y_g‖² by 2p·s²), so a
// stochastic session takes no certificates.
func (m *monitor) answered(req *kernels.Request, a *kernels.Answer) {
	if !req.Need.Has(kernels.NeedGradient) {
		return
	}
	m.requests++
	m.answeredAt(req, a, m.requests)
}

// answeredAt records the gradients of request number round of the chains
// in req: a chain group's requests count their own rounds, so that each
// chain's pairs are taken at the steps they would be taken at without
// groups.
func (m *monitor) answeredAt(req *kernels.Request, a *kernels.Answer, round int) {
	if !req.Need.Has(kernels.NeedGradient) {
		return
	}
	if m.stochastic {
		m.pendingScores, m.keptRef = false, nil
		return
	}
	// Pairs are taken from two consecutive requests out of every period
	// (one request when the state is small), so that certificates cost a
	// bounded share of a step however many chains × dim values it has.
	d := m.dim
	phase := round % m.pairPeriod()
	if phase <= 1 {
		for r := range req.Rows {
			c := req.Chain[r]
			x, g := req.Points[r*d:(r+1)*d], a.Grad[r*d:(r+1)*d]
			if m.metric != nil {
				if m.ty == nil {
					m.ty, m.tg = make([]float64, d), make([]float64, d)
				}
				m.metric.SolveFactor(m.ty, x)
				m.metric.ApplyFactorT(m.tg, g)
				x, g = m.ty, m.tg
			}
			if m.haveLast[c] && phase == 1%m.pairPeriod() {
				sec := m.curv.Add(m.lastX[c*d:(c+1)*d], x, m.lastG[c*d:(c+1)*d], g)
				if !math.IsNaN(sec.In) {
					m.pairs++
					if sec.In < 0 {
						m.uphill++
					}
				}
			}
			copy(m.lastX[c*d:], x)
			copy(m.lastG[c*d:], g)
			m.haveLast[c] = true
		}
	}
	// Scores of the last kept draws: the kernel asked for the gradient at
	// exactly those positions (as LMC does at the start of each step).
	if m.pendingScores && req.Rows < m.chains {
		m.groupScores(req, a)
		return
	}
	if m.pendingScores && req.Rows == m.chains && m.atKept(req.Points[:d*m.chains]) {
		m.addKSD(m.keptX, a.Grad[:d*m.chains])
	}
	m.pendingScores, m.keptRef = false, nil
}

// atKept reports whether the points of a request of every chain are the
// kept positions, value for value. A request asking at the kernel's own
// positions slice, the one the kept draws were copied from, asks there
// without a comparison: this is the first gradient request answered
// since the kept step (answers are recorded before the kernel is told),
// so no Tell has moved the positions since.
func (m *monitor) atKept(p []float64) bool {
	if len(p) > 0 && len(p) == len(m.keptRef) && &p[0] == &m.keptRef[0] {
		return true
	}
	return slices.Equal(p, m.keptX)
}

// groupScores takes the scores at the kept draws of a chain group's
// request: once every chain's has come, the Stein window gets them all,
// as it would from one request; a row asked elsewhere ends the wait.
func (m *monitor) groupScores(req *kernels.Request, a *kernels.Answer) {
	d := m.dim
	if m.keptS == nil {
		m.keptS, m.scored = make([]float64, d*m.chains), make([]bool, m.chains)
	}
	for r, c := range req.Chain[:req.Rows] {
		if !slices.Equal(req.Points[r*d:(r+1)*d], m.keptX[c*d:(c+1)*d]) {
			m.pendingScores, m.keptRef = false, nil
			return
		}
		copy(m.keptS[c*d:(c+1)*d], a.Grad[r*d:(r+1)*d])
		if !m.scored[c] {
			m.scored[c] = true
			m.nScored++
		}
	}
	if m.nScored == m.chains {
		m.addKSD(m.keptX, m.keptS)
		m.pendingScores, m.keptRef = false, nil
	}
}

// pairPeriod is how many requests apart certificate pairs are taken: 1
// up to 8192 values per request, then proportionally rarer.
func (m *monitor) pairPeriod() int { return max(1, m.chains*m.dim/8192) }

// kept records the positions of a kept step; k is the kernel, which may
// know the scores there already.
func (m *monitor) kept(k kernels.Kernel) {
	x := k.Positions()
	m.hist.AddRows(x, m.histIdx)
	m.chainN++
	sum := m.chainSum[:len(x)]
	if sc, ok := k.(kernels.Scorer); ok {
		for i, v := range x {
			sum[i] += v
		}
		m.addKSD(x, sc.Scores())
		return
	}
	// The sums and the copy waiting for the scores, in one pass.
	kx := m.keptX[:len(x)]
	for i, v := range x {
		sum[i] += v
		kx[i] = v
	}
	m.pendingScores, m.keptRef = true, x
	if m.nScored > 0 {
		clear(m.scored)
		m.nScored = 0
	}
}

// report fills p with the figures of the last judgement.
func (m *monitor) report(p *Progress) {
	p.Curvature = CurvatureEstimate{Pairs: int64(m.curv.Pairs()), SmoothnessAtLeast: m.curv.SmoothnessFloor(),
		StrongConvexityAtMost: m.curv.ConvexityCeiling(), NotConvex: m.curv.NonConvex()}
	p.KSD = m.lastKSD
	p.Parameters = m.params
	if m.stein != nil {
		r := *m.stein
		p.Stein = &r
	}
}

// worst returns the smallest bulk-ESS, the smallest tail-ESS and the
// largest R-hat over the parameters of the last measurement (NaN counts
// as failing: it gives −Inf for the ESSs and +Inf for R-hat).
func (m *monitor) worst() (bulk, tail, rhat float64) {
	if len(m.params) == 0 { // nothing measured yet: no target can hold
		return math.NaN(), math.NaN(), math.NaN()
	}
	bulk, tail, rhat = math.Inf(1), math.Inf(1), math.Inf(-1)
	for _, p := range m.params {
		bulk = math.Min(bulk, nanTo(p.BulkESS, math.Inf(-1)))
		tail = math.Min(tail, nanTo(p.TailESS, math.Inf(-1)))
		rhat = math.Max(rhat, nanTo(p.Rhat, math.Inf(1)))
	}
	return bulk, tail, rhat
}

func nanTo(v, w float64) float64 {
	if math.IsNaN(v) {
		return w
	}
	return v
}

// kernelReport collects what a kernel says of itself.
func kernelReport(k kernels.Kernel) KernelReport {
	var r KernelReport
	if s, ok := k.(kernels.Stepper); ok {
		r.Step = s.Step()
	}
	if m, ok := k.(kernels.CostMeter); ok {
		r.EvaluationsPerStepMean = m.MeanEvaluationsPerStep()
	}
	if rep, ok := k.(kernels.Reporter); ok {
		var kr kernels.Report
		rep.Report(&kr)
		r.Adapting, r.AcceptanceRates, r.Krylov, r.AcceptanceRate = kr.Adapting, kr.AcceptanceRates, kr.Krylov, kr.AcceptanceRate
	}
	return r
}

// penalise adds the penalty of π_λ to the answers of one request:
// ∇log π_λ(θ) = ∇log π(θ) − λ(θ − centre) and log π_λ = log π −
// λ‖θ − centre‖²/2 (derived here, from the definition of π_λ).
func (g *guarantee) penalise(req *kernels.Request, a *kernels.Answer, dim int) {
	if g == nil || g.penalty == 0 {
		return
	}
	for r := range req.Rows {
		x := req.Points[r*dim : (r+1)*dim]
		var sq float64
		for i, v := range x {
			d := v - g.centre[i]
			sq += d * d
			if req.Need.Has(kernels.NeedGradient) {
				a.Grad[r*dim+i] -= g.penalty * d
			}
		}
		if req.Need.Has(kernels.NeedLogDensity) {
			a.LogDensity[r] -= g.penalty * sq / 2
		}
	}
}

// theorem names the published result the bound rests on.
func (g *guarantee) theorem() string {
	if g.metric == bound.TV {
		return "Dalalyan (2017), JRSS B 79(3), the total-variation bound for unadjusted Langevin under the declared m and M"
	}
	return "Dalalyan and Karagulyan (2019), Stochastic Processes and their Applications 129(12), Theorem 1 (W2 for unadjusted Langevin, inaccurate gradients) under the declared m and M"
}

// startText says where the bound's start term comes from.
func (g *guarantee) startText() string {
	switch {
	case g.startSource != "":
		return g.startSource
	case g.metric == bound.TV && g.modeText != "":
		return g.modeText
	case g.metric == bound.TV:
		return fmt.Sprintf("the mode search that sets the start law N(x̂, M⁻¹I) has not completed: its shift term is counted at its budget %.3g", g.shiftBudget)
	case g.setting.StartDistance > 0:
		return fmt.Sprintf("the start distance %.4g as declared", g.setting.StartDistance)
	}
	return "the default start distance √(p/m), which holds only for a start at the mode"
}
