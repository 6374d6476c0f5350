package session

import (
	"fmt"
	"math"

	"sluice/kernels"
)

// Metric adaptation during burn-in: the schedule and its reasons are in
// the package doc (doc.go).

// minAdaptBurnIn is the shortest burn-in the engine adapts a metric in:
// with fewer steps the windows would be too short to estimate anything.
const minAdaptBurnIn = 150

// tuneProbeSteps is the Lanczos steps of each automatic curvature probe
// (at most the dimension).
const tuneProbeSteps = 30

// MetricForm says what the engine does about the metric.
type MetricForm int

const (
	// MetricDefault: the declared Spec.Metric when there is one (Dim
	// values: a diagonal; Dim×Dim: dense); else, when the engine chooses
	// the step (Step 0) and burn-in is long enough, a metric adapted
	// during burn-in (dense up to kernels.MaxDenseMetricDim, diagonal
	// above); else none.
	MetricDefault MetricForm = iota
	// MetricIdentity: no metric, no adaptation.
	MetricIdentity
	// MetricDiagonal: the declared diagonal (Dim values), else one adapted
	// during burn-in.
	MetricDiagonal
	// MetricDense: the declared dense metric (Dim×Dim values), else one
	// adapted during burn-in; Dim must be at most kernels.MaxDenseMetricDim.
	MetricDense
)

// MetricReport says which metric the kernel uses.
type MetricReport struct {
	// Kind is "identity", "diagonal" or "dense".
	Kind string
	// Source is "none", "declared" or "adapted".
	Source string
	// Adapting is set while adaptation windows remain.
	Adapting bool
	// Condition is the condition number of C (1 for the identity).
	Condition float64
	// UpdatedAtStep is the step at which the metric last changed; −1
	// when it never did.
	UpdatedAtStep int64
	// Updates counts the metric updates so far.
	Updates int
	// Shrinkage is the Ledoit–Wolf intensity λ of the last update (0 for
	// a diagonal).
	Shrinkage float64
	// WindowEnds lists the steps at which the adaptation windows end
	// (the schedule); empty without adaptation.
	WindowEnds []int64
}

// adaptSchedule returns the steps at which the windows end for a burn-in
// of b steps, and the step at which the first window starts collecting;
// nil when b is too short.
func adaptSchedule(b int64) (start int64, ends []int64) {
	if b < minAdaptBurnIn {
		return 0, nil
	}
	start = max(10, b/10)
	w := max(10, b/20)
	last := b - max(20, b/10)
	end := start + w
	ends = append(ends, end)
	for n := 2 * w; end+n <= last; n *= 2 {
		end += n
		ends = append(ends, end)
	}
	ends[len(ends)-1] = max(ends[len(ends)-1], last)
	if len(ends) > 1 && ends[len(ends)-1]-ends[len(ends)-2] < w {
		ends = append(ends[:len(ends)-2], ends[len(ends)-1])
	}
	return start, ends
}

// tuner holds a session's metric and automatic settings: which metric,
// the adaptation windows, the probes and the choices made.
type tuner struct {
	rule    tuneRule
	auto    bool // the engine chooses the step
	adapt   bool // a metric is adapted during burn-in
	dense   bool // the adapted metric is dense (after the first window)
	declare *kernels.Metric
	source  string

	start  int64   // first step whose draws are collected
	ends   []int64 // window ends
	window int     // index of the current window
	cov    *kernels.Covariance
	y      []float64 // scratch: one position in the metric's units

	metric    *kernels.Metric // the metric in use (nil: identity)
	updatedAt int64
	updates   int
	lambda    float64

	// Automatic settings: the last curvature seen (in the metric's units)
	// and the choices.
	m, bigM    float64
	choices    []Choice
	probeEvals int64
	seed       uint64
	probes     int
	// The metric before the last update, restored when the probe finds
	// the update made the curvature worse; reverted counts such updates.
	prevMetric    *kernels.Metric
	prevUpdatedAt int64
	prevLambda    float64
	reverted      int
}

// better reports whether curvatures m, bigM seen in a new metric give a
// condition number at most 1.5 times the one last seen (a non-positive
// m̂ counts as the cap maxCondition).
func (t *tuner) better(m, bigM float64) bool {
	cond := func(m, bigM float64) float64 {
		if !(m > 0) || !(bigM > 0) || math.IsInf(bigM, 0) {
			return maxCondition
		}
		return math.Min(bigM/m, maxCondition)
	}
	return cond(m, bigM) <= 1.5*cond(t.m, t.bigM)
}

// newTuner validates the metric fields of spec for kernel k and returns
// the session's tuner (never nil). It runs after the common validation.
func newTuner(spec *Spec, k *kernelEntry) (*tuner, error) {
	t := &tuner{rule: k.tuning, source: "none", updatedAt: -1, seed: spec.Seed}
	p := spec.Dim
	takes := k.tuning != ruleNone
	if !takes && (spec.MetricForm > MetricIdentity || len(spec.Metric) > 0) {
		return nil, BadField("register.metric_form", "kernel %q takes no metric", spec.Kernel)
	}
	if spec.MetricForm < MetricDefault || spec.MetricForm > MetricDense {
		return nil, BadField("register.metric_form", "unknown metric form %d", spec.MetricForm)
	}
	if len(spec.Metric) > 0 {
		var m *kernels.Metric
		var err error
		switch {
		case spec.MetricForm == MetricIdentity:
			return nil, BadField("register.metric", "must be empty with metric_form identity")
		case len(spec.Metric) == p && spec.MetricForm != MetricDense:
			m, err = kernels.NewDiagonalMetric(spec.Metric)
		case len(spec.Metric) == p*p && spec.MetricForm != MetricDiagonal:
			if p > kernels.MaxDenseMetricDim {
				return nil, BadField("register.metric", "a dense metric is for dim <= %d, got %d", kernels.MaxDenseMetricDim, p)
			}
			m, err = kernels.NewDenseMetric(p, spec.Metric)
		default:
			return nil, BadField("register.metric", "has %d values, want dim = %d (a diagonal) or dim × dim = %d (dense) as metric_form allows", len(spec.Metric), p, p*p)
		}
		if err != nil {
			return nil, BadField("register.metric", "%v", err)
		}
		t.declare, t.metric, t.source = m, m, "declared"
	}
	if spec.MetricForm == MetricDense && p > kernels.MaxDenseMetricDim {
		return nil, BadField("register.metric_form", "a dense metric is for dim <= %d, got %d", kernels.MaxDenseMetricDim, p)
	}
	t.auto = takes && spec.Step == 0 && spec.Schedule == nil && !(spec.Wants.Eps > 0 && k.guaranteed)
	if t.auto && spec.Noise.Stochastic {
		return nil, BadField("register.step", "step 0 (automatic) needs exact gradients for its curvature probe; give a step")
	}
	wantAdapt := t.declare == nil && (spec.MetricForm == MetricDiagonal || spec.MetricForm == MetricDense ||
		(spec.MetricForm == MetricDefault && t.auto))
	if wantAdapt {
		start, ends := adaptSchedule(spec.BurnIn)
		switch {
		case ends != nil:
			t.adapt, t.start, t.ends = true, start, ends
			t.dense = spec.MetricForm != MetricDiagonal && p <= kernels.MaxDenseMetricDim
			t.source = "adapted"
		case spec.MetricForm != MetricDefault:
			return nil, BadField("register.burn_in", "adapting a metric needs a burn-in of at least %d steps, got %d", minAdaptBurnIn, spec.BurnIn)
		}
	}
	if (t.declare != nil || t.adapt) && spec.Wants.Eps > 0 {
		return nil, BadField("register.metric_form", "a guaranteed error (wants.eps) is planned for the identity metric; use metric_form identity")
	}
	return t, nil
}

// kind names the metric in use.
func (t *tuner) kind() string {
	if t.metric == nil {
		return kernels.IdentityMetric.String()
	}
	return t.metric.Kind().String()
}

// report is the metric's state.
func (t *tuner) report() MetricReport {
	r := MetricReport{Kind: t.kind(), Source: t.source, Condition: 1, UpdatedAtStep: t.updatedAt, Updates: t.updates,
		Shrinkage: t.lambda, Adapting: t.adapt && t.window < len(t.ends), WindowEnds: t.ends}
	if t.metric != nil {
		r.Condition = t.metric.Condition()
	}
	return r
}

// registered lists the settings at registration: the client's and, for
// the automatic ones, what will choose them.
func (t *tuner) registered(s *Spec) []Choice {
	if !t.auto {
		return nil
	}
	when := "chosen from a curvature probe before the first step"
	if s.Curvature != nil && t.declare == nil {
		when = "chosen from the declared curvature"
	}
	if t.adapt {
		when += fmt.Sprintf(", again after each of the %d metric updates", len(t.ends))
	}
	out := []Choice{{"step", 0, "automatic: " + when}}
	if (t.rule == ruleKinetic || t.rule == ruleSplitting) && s.Friction == 0 {
		out = append(out, Choice{"friction", 0, "automatic: critical damping of the slowest direction"})
	}
	if (t.rule == ruleKinetic || t.rule == ruleSplitting || t.rule == ruleMidpoint) && s.InverseMass == 0 {
		out = append(out, Choice{"inverse_mass", 0, "automatic"})
	}
	return out
}

// apply sets the automatic settings for curvatures m, bigM in the
// metric's units on kernel k, keeping what the client gave.
func (t *tuner) apply(k kernels.Kernel, s *Spec, m, bigM float64, source string) {
	if !(bigM > 0) || math.IsInf(bigM, 0) {
		t.choices = append(t.choices[:0], Choice{"step", stepOf(k),
			fmt.Sprintf("kept: the %s saw no positive largest curvature (M̂ = %.4g)", source, bigM)})
		return
	}
	prev, prevM := 0.0, 0.0
	if t.rule == ruleMALA && t.bigM > 0 {
		prev, prevM = stepOf(k), probeSafety*t.bigM
	}
	t.m, t.bigM = m, bigM
	_, why := choose(t.rule, m, bigM, prev, prevM, t.tolerance(), settings{friction: s.Friction, inverseMass: s.InverseMass})
	t.choices = t.choices[:0]
	for _, c := range why {
		if c.Reason != "given by the client" {
			c.Reason += " (" + source + fmt.Sprintf(": M̂ = %.4g, m̂ = %.4g)", bigM, m)
		}
		t.choices = append(t.choices, c)
	}
	for _, c := range t.choices {
		switch c.Setting {
		case "step":
			if st, ok := k.(kernels.StepSetter); ok && c.Value > 0 && !math.IsInf(c.Value, 0) {
				st.SetStep(c.Value)
			}
		case "friction":
			if f, ok := k.(interface{ SetFriction(float64) }); ok {
				f.SetFriction(c.Value)
			}
		case "inverse_mass":
			if f, ok := k.(interface{ SetInverseMass(float64) }); ok {
				f.SetInverseMass(c.Value)
			}
		}
	}
}

// tolerance is the variance tolerance of the next choice: looser while
// adaptation windows remain (travelTolerance), else varianceTolerance.
func (t *tuner) tolerance() float64 {
	if t.adapt && t.window < len(t.ends) {
		return travelTolerance
	}
	return varianceTolerance
}

// stepOf is k's step size, 0 when it has none.
func stepOf(k kernels.Kernel) float64 {
	if s, ok := k.(kernels.Stepper); ok {
		return s.Step()
	}
	return 0
}

// probe returns a curvature probe in the current metric at x0 whose
// result sets the automatic settings of k.
func (t *tuner) probe(k kernels.Kernel, s *Spec, x0 []float64) Phase {
	p := len(x0)
	v0 := make([]float64, p)
	src := kernels.NewSource(t.seed ^ 0x5bd1e995 ^ uint64(t.probes))
	for i := range v0 {
		// Uniform in [−1, 1): a start with a part along every direction
		// almost surely, fixed by the seed.
		v0[i] = 2*float64(src.Uint64()>>11)/(1<<53) - 1
	}
	t.probes++
	name := "curvature probe"
	if t.updates > 0 {
		name = fmt.Sprintf("curvature probe in the metric of update %d", t.updates)
	}
	return newLanczosProbe(x0, t.metric, tuneProbeSteps, v0, func(m, bigM float64, evals int) {
		t.probeEvals += int64(evals)
		if t.updates > 0 && t.prevMetric != nil && t.bigM > 0 && !t.better(m, bigM) {
			// The update made the curvature worse than the metric it
			// replaced (a window whose chains had not spread yet): keep the
			// old metric and its settings (derived here: the condition
			// number in the metric's units is what every rule's cost grows
			// with, so an update that raises it by more than half is
			// undone).
			t.metric, t.updatedAt, t.lambda = t.prevMetric, t.prevUpdatedAt, t.prevLambda
			t.reverted++
			k.(kernels.MetricUser).SetMetric(t.metric)
			t.apply(k, s, t.m, t.bigM, fmt.Sprintf("update %d undone: in its metric the probe saw M̂ = %.4g, m̂ = %.4g, a worse condition; kept", t.updates, bigM, m))
			return
		}
		t.apply(k, s, m, bigM, name)
	})
}

// afterStep is the burn-in hook, called after every completed kernel
// step: it collects the positions of the current window and, at a
// window's end, estimates the metric, sets it on the kernel and returns
// a probe to run before the next step when the engine chooses the step
// (nil otherwise).
func (t *tuner) afterStep(k kernels.Kernel, s *Spec) Phase {
	if !t.adapt || t.window >= len(t.ends) {
		return nil
	}
	step := int64(k.Steps())
	if step <= t.start {
		return nil
	}
	if t.cov == nil {
		t.cov = kernels.NewCovariance(s.Dim)
	}
	if t.whitened() {
		// Dense windows pool y = L⁻¹x, the positions in the units of the
		// metric in use, so that the shrinkage pulls toward that metric.
		x, p := k.Positions(), s.Dim
		if len(t.y) < p {
			t.y = make([]float64, p)
		}
		for c := 0; c+p <= len(x); c += p {
			t.metric.SolveFactor(t.y[:p], x[c:c+p])
			t.cov.Add(t.y[:p])
		}
	} else {
		t.cov.Add(k.Positions())
	}
	if step < t.ends[t.window] {
		return nil
	}
	m, lambda, err := t.estimate(s.Dim)
	t.cov.Reset()
	t.window++
	if err != nil {
		return nil // draws that do not spread: keep the metric in use
	}
	t.prevMetric, t.prevUpdatedAt, t.prevLambda = t.metric, t.updatedAt, t.lambda
	if t.prevMetric == nil {
		t.prevMetric = kernels.NewIdentityMetric(s.Dim)
	}
	t.metric, t.lambda = m, lambda
	t.updatedAt = step
	t.updates++
	k.(kernels.MetricUser).SetMetric(m)
	if !t.auto {
		return nil
	}
	x := k.Positions()[:s.Dim]
	return t.probe(k, s, x)
}

// whitened reports whether the current window pools positions in the
// units of the metric in use: the dense windows after the first.
func (t *tuner) whitened() bool {
	return t.window > 0 && t.dense && t.metric != nil
}

// estimate is the current window's metric: the pooled variances for the
// first window or a diagonal form; else the Ledoit–Wolf estimate Σ̂_y of
// the covariance of y = L⁻¹x, which shrinks toward μ·I in those units, so
// that mapped back, C' = L·Σ̂_y·Lᵀ = λμ·C + (1 − λ)·S, it shrinks the
// sample covariance S toward the metric in use, not toward a multiple of
// the identity, whose scales may be far from the target's (derived here
// from the Ledoit–Wolf estimate by that change of variables).
func (t *tuner) estimate(p int) (*kernels.Metric, float64, error) {
	if !t.dense || t.window == 0 {
		if t.cov.Count() < 2 {
			return nil, 0, fmt.Errorf("session: %d draws", t.cov.Count())
		}
		s := t.cov.Matrix()
		d := s
		if len(s) == p*p {
			d = make([]float64, p)
			for i := range p {
				d[i] = s[i*p+i]
			}
		}
		m, err := kernels.NewDiagonalMetric(d)
		return m, 0, err
	}
	sy, lambda, err := t.cov.Shrunk()
	if err != nil || t.metric == nil {
		return sy, lambda, err
	}
	// C' = L·Σ̂_y·Lᵀ: A = L·Σ̂_y column by column, then C' = L·Aᵀ (Σ̂_y
	// symmetric), 2p³ flops once per window.
	c := sy.Matrix()
	col, out := make([]float64, p), make([]float64, p*p)
	a := make([]float64, p*p)
	for j := range p {
		for i := range p {
			col[i] = c[i*p+j]
		}
		t.metric.ApplyFactor(col, col)
		for i := range p {
			a[i*p+j] = col[i]
		}
	}
	for j := range p {
		copy(col, a[j*p:(j+1)*p]) // column j of Aᵀ is row j of A
		t.metric.ApplyFactor(col, col)
		for i := range p {
			out[i*p+j] = col[i]
		}
	}
	for i := range p { // symmetrise the rounding
		for j := i + 1; j < p; j++ {
			v := (out[i*p+j] + out[j*p+i]) / 2
			out[i*p+j], out[j*p+i] = v, v
		}
	}
	m, err := kernels.NewDenseMetric(p, out)
	return m, lambda, err
}
