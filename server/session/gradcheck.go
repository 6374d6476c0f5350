package session

import (
	"fmt"
	"math"
	"math/rand/v2"

	"sluice/kernels"
)

// gradientCheckPhase compares the client's gradient with directional
// finite differences of its log density before sampling, at up to
// `points` start points (the start rows, one chain each), in
// gradCheckDirections random unit directions v per point. Along v, with
// L(t) = log π(x + t·v), the central differences
//
//	D(t) = (L(t) − L(−t))/(2t),   D(2t),   R = (4·D(t) − D(2t))/3
//
// have errors O(t²), O(t²) and O(t⁴) (Richardson extrapolation; standard
// numerical analysis), so |D(t) − D(2t)| ≈ 3× the truncation error of
// D(t) estimates the error of the comparison; rounding adds about
// ε·|L|/t. The step is t = 1e-3·max(1, rms(x)), a fraction of the
// point's scale. The directional derivative ⟨∇log π(x), v⟩ must agree
// with R within 10 times that error plus 1e-6 relative: otherwise the
// session fails on evaluations.gradients, saying whether the gradient
// points downhill (⟨g, v⟩ ≈ −R everywhere: the gradient of −log π), is
// off by a factor (a constant ratio), or just disagrees.
//
// Each point costs one request of 1 + 4·gradCheckDirections rows, all
// asking gradient and log density (counted against the budget like any
// evaluation).
type gradientCheckPhase struct {
	dim, points int
	starts      []float64 // points×dim
	chains      []int
	i           int // point being checked
	dirs        []float64
	t           float64
	req         kernels.Request
	// Results.
	done      bool
	worst     float64 // largest |⟨g,v⟩ − R| / tolerance
	ratios    []float64
	fault     *Error
	evaluated int
}

const gradCheckDirections = 2

// defaultGradCheckPoints is how many points the check uses for kernels
// that ask for log densities anyway.
const defaultGradCheckPoints = 3

// gradCheckShape is the request the check sends.
var gradCheckShape = requestShape{kernels.NeedGradient | kernels.NeedLogDensity, 1 + 4*gradCheckDirections}

// gradientCheckPoints is how many points the check of spec uses for
// kernel k: Spec.GradientCheckPoints when set (−1: none), else
// defaultGradCheckPoints for gradient kernels that ask for log densities
// anyway; never with stochastic gradients (their noise would swamp the
// differences) or without gradients.
func gradientCheckPoints(spec *Spec, k *kernelEntry) int {
	need := k.need()
	if !need.Has(kernels.NeedGradient) || spec.Noise.Stochastic || spec.GradientCheckPoints < 0 {
		return 0
	}
	n := spec.GradientCheckPoints
	if n == 0 && need.Has(kernels.NeedLogDensity) {
		n = defaultGradCheckPoints
	}
	return n
}

func newGradientCheck(spec *Spec, points int) *gradientCheckPhase {
	d := spec.Dim
	g := &gradientCheckPhase{dim: d, points: points}
	rng := rand.New(rand.NewPCG(spec.Seed, 0x6772616463686b)) // a stream of its own
	for i := range points {
		row := i % spec.StartRows
		x := append([]float64(nil), spec.Start[row*d:(row+1)*d]...)
		if i >= spec.StartRows {
			// A shared start: further points are jittered copies at the
			// point's scale, so that the check sees more than one point.
			sc := rmsScale(x)
			for j := range x {
				x[j] += 0.1 * sc * rng.NormFloat64()
			}
		}
		g.starts = append(g.starts, x...)
		g.chains = append(g.chains, i%spec.Chains)
		for range gradCheckDirections {
			v := make([]float64, d)
			var n2 float64
			for j := range v {
				v[j] = rng.NormFloat64()
				n2 += v[j] * v[j]
			}
			for j := range v {
				v[j] /= math.Sqrt(n2)
			}
			g.dirs = append(g.dirs, v...)
		}
	}
	rows := gradCheckShape.rowsPerChain
	g.req = kernels.Request{Need: gradCheckShape.need, Rows: rows, Points: make([]float64, rows*d), Chain: make([]int, rows)}
	g.fill()
	return g
}

func rmsScale(x []float64) float64 {
	var s float64
	for _, v := range x {
		s += v * v
	}
	return math.Max(1, math.Sqrt(s/float64(len(x))))
}

// fill lays out the request of point i: x, then x ± t·v, x ± 2t·v per
// direction.
func (g *gradientCheckPhase) fill() {
	d := g.dim
	x := g.starts[g.i*d : (g.i+1)*d]
	g.t = 1e-3 * rmsScale(x)
	copy(g.req.Points, x)
	r := 1
	for k := range gradCheckDirections {
		v := g.dirs[(g.i*gradCheckDirections+k)*d : (g.i*gradCheckDirections+k+1)*d]
		for _, f := range []float64{1, -1, 2, -2} {
			row := g.req.Points[r*d : (r+1)*d]
			for j := range row {
				row[j] = x[j] + f*g.t*v[j]
			}
			r++
		}
	}
	for r := range g.req.Chain {
		g.req.Chain[r] = g.chains[g.i]
	}
}

// Next implements Phase.
func (g *gradientCheckPhase) Next() *kernels.Request { return &g.req }

// Tell implements Phase.
func (g *gradientCheckPhase) Tell(a *kernels.Answer) bool {
	d := g.dim
	g.evaluated += g.req.Rows
	grad := a.Grad[:d]
	L := a.LogDensity
	eps := 2.220446049250313e-16
	for k := range gradCheckDirections {
		v := g.dirs[(g.i*gradCheckDirections+k)*d : (g.i*gradCheckDirections+k+1)*d]
		var gv float64
		for j := range v {
			gv += grad[j] * v[j]
		}
		b := 1 + 4*k
		d1 := (L[b] - L[b+1]) / (2 * g.t)
		d2 := (L[b+2] - L[b+3]) / (4 * g.t)
		r := (4*d1 - d2) / 3
		big := math.Max(math.Abs(L[0]), math.Max(math.Abs(L[b+2]), math.Abs(L[b+3])))
		tol := 10*(math.Abs(d1-d2)+4*eps*big/g.t) + 1e-6*(math.Abs(gv)+math.Abs(r))
		g.worst = math.Max(g.worst, math.Abs(gv-r)/tol)
		if math.Abs(gv-r) > tol {
			g.ratios = append(g.ratios, gv/r)
			if g.fault == nil {
				g.fault = g.diagnose(gv, r, tol)
			}
		}
	}
	g.i++
	if g.i < g.points && g.fault == nil {
		g.fill()
		return false
	}
	g.done = true
	return true
}

// diagnose names what is wrong with a gradient whose directional
// derivative gv disagrees with the finite difference r.
func (g *gradientCheckPhase) diagnose(gv, r, tol float64) *Error {
	x := g.starts[g.i*g.dim : (g.i+1)*g.dim]
	where := fmt.Sprintf("at the start point of chain %d (%s)", g.chains[g.i], shortVec(x))
	var msg string
	switch {
	case math.Abs(gv+r) <= tol:
		msg = fmt.Sprintf("the gradient points downhill: its directional derivative is %.6g where finite differences of log π give %.6g %s; is it the gradient of −log π instead of log π?", gv, r, where)
	case r != 0 && gv/r > 0 && math.Abs(r) > tol:
		msg = fmt.Sprintf("the gradient is off by a factor of about %.4g: its directional derivative is %.6g where finite differences of log π give %.6g %s", gv/r, gv, r, where)
	default:
		msg = fmt.Sprintf("the gradient disagrees with finite differences of log π: directional derivative %.6g, finite differences %.6g ± %.2g %s", gv, r, tol/10, where)
	}
	return &Error{Kind: Invalid, Field: "evaluations.gradients", Chain: g.chains[g.i], Coord: -1, Reason: msg}
}

func shortVec(x []float64) string {
	if len(x) <= 4 {
		return fmt.Sprintf("%.4g", x)
	}
	return fmt.Sprintf("%.4g …", x[:4])
}

// Fault reports the check's failure; nil when the gradient agreed.
func (g *gradientCheckPhase) Fault() *Error { return g.fault }

// Report implements Phase: nothing beyond the verdict's check.
func (g *gradientCheckPhase) Report(*Progress) {}

// check is the verdict's entry for a completed check.
func (g *gradientCheckPhase) check() Check {
	if g.fault != nil {
		return Check{Name: "gradient", Status: CheckFail, Figure: g.worst, Message: g.fault.Reason}
	}
	return Check{Name: "gradient", Status: CheckPass, Figure: g.worst,
		Message: fmt.Sprintf("the gradient agrees with finite differences of log π at %d points in %d directions each (largest disagreement %.2g of the tolerance)", g.points, gradCheckDirections, g.worst)}
}

// gradCheckState is what a checkpoint keeps of the gradient check: its
// results. Checkpoints are taken before the first request or after the
// phases are over, never while it runs, so its progress need not be kept.
type gradCheckState struct {
	Done      bool
	Worst     float64
	Ratios    []float64
	Evaluated int
}

func (p *gradientCheckPhase) marshal() ([]byte, error) {
	return gobBytes(gradCheckState{Done: p.done, Worst: p.worst, Ratios: p.ratios, Evaluated: p.evaluated})
}

func (p *gradientCheckPhase) unmarshal(b []byte) error {
	var st gradCheckState
	if err := gobRead(b, &st); err != nil {
		return fmt.Errorf("session: state's gradient check: %w", err)
	}
	p.done, p.worst, p.ratios, p.evaluated = st.Done, st.Worst, st.Ratios, st.Evaluated
	return nil
}
