package kernels

import (
	"fmt"
	"math"
	"math/rand/v2"
)

// HitAndRun is a density-only reference sampler for log-concave targets in
// low dimension, over a batch of chains. It never asks for a gradient, so
// it cross-checks the gradient kernels on targets with no closed-form
// moments. Each step moves every chain along a random line:
//
//	d = z/‖z‖,  z ~ N(0, I_p)              (a uniform direction)
//	g(t) = log π(x + t·d)                   (log density along the line)
//	x' = x + t'·d,  t' drawn by one slice-sampling update of g from t = 0
//
// The slice update is stepping-out and shrinkage (Neal 2003, "Slice
// sampling", Annals of Statistics 31(3), Figs. 3 and 5; figure and section
// numbers from memory), with initial width w and at most m − 1
// expansions, m = MaxExpansions + 1:
//
//	y = g(0) − e,  e ~ Exp(1)                       (the slice's level)
//	L = −w·U,  R = L + w,  U ~ U[0, 1)
//	J = ⌊m·V⌋,  K = m − 1 − J,  V ~ U[0, 1)
//	while J > 0 and y < g(L):  L ← L − w,  J ← J − 1
//	while K > 0 and y < g(R):  R ← R + w,  K ← K − 1
//	repeat:  t' = L + U'·(R − L),  U' ~ U[0, 1)
//	         accept t' if y < g(t'); else L ← t' if t' < 0, R ← t' if not
//
// Exactness. The update leaves the restriction of π to the line invariant
// (it is reversible with respect to exp g: Neal 2003, Section 4.1 for stepping-out
// with a capped, randomly split expansion budget, Section 4.2 for shrinkage), and
// the direction is drawn independently of x with d and −d equally likely,
// so every step is an exact π-invariant transition (hit-and-run with an
// exact-invariance line move; no discretisation bias). The "exact 1-D
// draw" of hit-and-run is thus exact in the invariance sense: t' is not an
// independent draw from the line's conditional, but a draw from a kernel
// that leaves it invariant. The level y is kept strictly below g(0) (when
// e is lost to rounding, y is the next float below), so points that round
// to x itself are in the slice and shrinkage ends.
//
// Requests. Every request asks for log densities only (NeedLogDensity),
// up to an additive constant. The first asks for them at every chain's
// start (Rows = Chains) and completes no step; the value at the current
// point is kept from then on, never asked for again. Each later request
// batches, for every chain whose step is not finished, the points its
// slice update needs next, in chain order: while stepping out, its left
// end L (if that side is still expanding) and its right end R (likewise),
// the two sides being independent; while shrinking, its proposal t'.
// Chains at different stages share a request. So Rows ≤ 2·Chains, a chain
// may appear in two rows, and chains that have finished their step wait
// (they have no row). Tell reports a completed step once every chain has
// accepted its proposal; Positions changes only then.
//
// Evaluations. A chain's step costs at most m − 1 points stepping out
// (one per expansion test), and then one per shrinkage proposal (a
// geometric-like number: the interval shrinks towards the accepted point).
// The count is random; MeanEvaluationsPerStep reports the running average
// over completed steps and all chains, EvaluationsPerStep its ceiling (2
// per chain, the least possible, before the first step completes). A run
// of n steps evaluates Chains + (the sum of its steps' counts) points.
//
// Randomness. At the start of each step, chain by chain: p normals for the
// direction, then e, U and V; then, during the step, one uniform U' per
// shrinkage proposal, drawn when the chain's stepping-out ends or its
// previous proposal is rejected, in request-row (chain) order. The draws
// depend only on the seed and the answers.
type HitAndRun struct {
	dim, chains int
	w           float64
	m           int // Neal's m: at most m − 1 expansions
	steps       int
	ready       bool      // the start has been evaluated
	x, lpx      []float64 // current positions (chains×dim) and log π there
	xn, lpn     []float64 // accepted points of the step in progress
	d           []float64 // directions, chains×dim
	level       []float64 // y per chain
	lo, hi, t   []float64 // L, R and the pending proposal t', per chain
	left, right []int     // J, K: expansions left per side
	stage       []uint8   // hitrunLeft|hitrunRight, hitrunShrink or hitrunDone
	done        int       // chains whose step is finished
	evals       int       // points evaluated, start included
	stepEvals   int       // points evaluated in completed steps
	curEvals    int       // points evaluated in the step in progress
	pts         []float64 // request points, up to 2·chains rows
	rowChain    []int
	rowKind     []uint8
	req         Request
	src         *rand.PCG
	rng         *rand.Rand
}

// HitAndRunOptions tunes the line move of HitAndRun. The zero value gives
// the defaults.
type HitAndRunOptions struct {
	// Width is the initial slice interval w, in units of θ (0: 1). Set it
	// near the target's scale along a line: too small costs expansions,
	// too large costs shrinkage proposals; any value is exact.
	Width float64
	// MaxExpansions caps the stepping-out expansions per chain per step
	// (Neal's m − 1; 0: 64), so the interval spans at most
	// (MaxExpansions + 1)·Width. Any cap is exact; a small one slows the
	// mixing of targets much wider than Width.
	MaxExpansions int
}

// Stage bits of a chain's slice update.
const (
	hitrunLeft   uint8 = 1 << iota // L needs evaluating
	hitrunRight                    // R needs evaluating
	hitrunShrink                   // proposal t' needs evaluating
	hitrunDone                     // proposal accepted, waiting for the others
)

const (
	hitrunDefaultWidth         = 1
	hitrunDefaultMaxExpansions = 64
)

// NewHitAndRun returns a hit-and-run kernel for chains chains in dimension
// dim, started at start (chains×dim values, or dim values shared by every
// chain), drawing its randomness from src. It panics on a start of the
// wrong length, a negative, NaN or infinite Width or a negative
// MaxExpansions: callers validate data from clients before building a
// kernel.
func NewHitAndRun(dim, chains int, start []float64, opt HitAndRunOptions, src *rand.PCG) *HitAndRun {
	if dim < 1 || chains < 1 {
		panic(fmt.Sprintf("kernels: hit-and-run with dim %d, chains %d", dim, chains))
	}
	w := opt.Width
	if w == 0 {
		w = hitrunDefaultWidth
	}
	if !(w > 0) || math.IsInf(w, 0) {
		panic(fmt.Sprintf("kernels: hit-and-run width %v", opt.Width))
	}
	if opt.MaxExpansions < 0 {
		panic(fmt.Sprintf("kernels: hit-and-run max expansions %d", opt.MaxExpansions))
	}
	m := opt.MaxExpansions + 1
	if opt.MaxExpansions == 0 {
		m = hitrunDefaultMaxExpansions + 1
	}
	k := &HitAndRun{dim: dim, chains: chains, w: w, m: m, src: src, rng: rand.New(src)}
	k.x = broadcastStart(start, dim, chains)
	k.alloc()
	k.buildRequest()
	return k
}

func (k *HitAndRun) alloc() {
	n, c := k.dim*k.chains, k.chains
	if k.x == nil {
		k.x = make([]float64, n)
	}
	k.lpx, k.xn, k.lpn, k.d = make([]float64, c), make([]float64, n), make([]float64, c), make([]float64, n)
	k.level, k.lo, k.hi, k.t = make([]float64, c), make([]float64, c), make([]float64, c), make([]float64, c)
	k.left, k.right, k.stage = make([]int, c), make([]int, c), make([]uint8, c)
	k.pts, k.rowChain, k.rowKind = make([]float64, 2*n), make([]int, 2*c), make([]uint8, 2*c)
}

// buildRequest lays out the rows the current stages need, in chain order.
func (k *HitAndRun) buildRequest() {
	p := k.dim
	if !k.ready {
		copy(k.pts, k.x)
		for c := range k.chains {
			k.rowChain[c] = c
		}
		k.req = Request{Need: NeedLogDensity, Rows: k.chains, Points: k.pts[:len(k.x)], Chain: k.rowChain[:k.chains]}
		return
	}
	n := 0
	row := func(c int, kind uint8, t float64) {
		x, d, dst := k.x[c*p:(c+1)*p], k.d[c*p:(c+1)*p], k.pts[n*p:(n+1)*p]
		for i := range dst {
			dst[i] = x[i] + t*d[i]
		}
		k.rowChain[n], k.rowKind[n] = c, kind
		n++
	}
	for c, s := range k.stage {
		if s&hitrunLeft != 0 {
			row(c, hitrunLeft, k.lo[c])
		}
		if s&hitrunRight != 0 {
			row(c, hitrunRight, k.hi[c])
		}
		if s&hitrunShrink != 0 {
			row(c, hitrunShrink, k.t[c])
		}
	}
	k.req = Request{Need: NeedLogDensity, Rows: n, Points: k.pts[:n*p], Chain: k.rowChain[:n]}
}

// Dim implements Kernel.
func (k *HitAndRun) Dim() int { return k.dim }

// Chains implements Kernel.
func (k *HitAndRun) Chains() int { return k.chains }

// Steps implements Kernel: completed line moves per chain.
func (k *HitAndRun) Steps() int { return k.steps }

// Width returns the initial slice interval w.
func (k *HitAndRun) Width() float64 { return k.w }

// MaxExpansions returns the cap on stepping-out expansions per chain per
// step.
func (k *HitAndRun) MaxExpansions() int { return k.m - 1 }

// Positions implements Kernel. It changes only when a step completes.
func (k *HitAndRun) Positions() []float64 { return k.x }

// Evaluations returns the number of points evaluated so far, the start
// included.
func (k *HitAndRun) Evaluations() int { return k.evals }

// MeanEvaluationsPerStep returns the points evaluated per completed step
// over all chains, averaged over the completed steps (NaN before the
// first); the start is not counted.
func (k *HitAndRun) MeanEvaluationsPerStep() float64 {
	return float64(k.stepEvals) / float64(k.steps)
}

// EvaluationsPerStep implements Kernel. The count is random: this is the
// ceiling of MeanEvaluationsPerStep, or 2 per chain (one expansion test
// and one proposal, the least possible) before the first step completes.
func (k *HitAndRun) EvaluationsPerStep() int {
	if k.steps == 0 {
		return 2 * k.chains
	}
	return (k.stepEvals + k.steps - 1) / k.steps
}

// Next implements Kernel: log densities at every chain's start, then at the
// points the unfinished chains' slice updates need.
func (k *HitAndRun) Next() *Request { return &k.req }

// Tell implements Kernel. The first call takes the log densities at the
// start and completes no step; a later call completes a step when every
// chain has accepted its proposal. Callers reject non-finite values from
// clients (the engine does); should one arrive anyway, NaN and −∞ count as
// outside the slice, while +∞ anywhere, or a start's value that is not
// finite, panics, as does an answer with fewer log densities than the
// request has rows.
func (k *HitAndRun) Tell(a *Answer) bool {
	rows := k.req.Rows
	if len(a.LogDensity) < rows {
		panic(fmt.Sprintf("kernels: hit-and-run answer has %d log-density values, want %d", len(a.LogDensity), rows))
	}
	lp := a.LogDensity[:rows]
	k.evals += rows
	if !k.ready {
		for c, v := range lp {
			if math.IsNaN(v) || math.IsInf(v, 0) {
				panic(fmt.Sprintf("kernels: hit-and-run start of chain %d has log density %v", c, v))
			}
		}
		copy(k.lpx, lp)
		k.ready = true
		k.startStep()
		k.buildRequest()
		return false
	}
	k.curEvals += rows
	p := k.dim
	for r, f := range lp {
		c := k.rowChain[r]
		if math.IsInf(f, 1) {
			panic(fmt.Sprintf("kernels: hit-and-run chain %d has log density +Inf", c))
		}
		in := k.level[c] < f // false for NaN
		switch k.rowKind[r] {
		case hitrunLeft:
			if in {
				k.lo[c] -= k.w
				k.left[c]--
			}
			if !in || k.left[c] == 0 {
				k.stage[c] &^= hitrunLeft
			}
		case hitrunRight:
			if in {
				k.hi[c] += k.w
				k.right[c]--
			}
			if !in || k.right[c] == 0 {
				k.stage[c] &^= hitrunRight
			}
		case hitrunShrink:
			if in {
				copy(k.xn[c*p:(c+1)*p], k.pts[r*p:(r+1)*p])
				k.lpn[c] = f
				k.stage[c] = hitrunDone
				k.done++
			} else {
				if k.t[c] < 0 {
					k.lo[c] = k.t[c]
				} else {
					k.hi[c] = k.t[c]
				}
				k.propose(c)
			}
		}
		if r+1 == rows || k.rowChain[r+1] != c {
			k.maybeShrink(c)
		}
	}
	if k.done < k.chains {
		k.buildRequest()
		return false
	}
	copy(k.x, k.xn)
	copy(k.lpx, k.lpn)
	k.steps++
	k.stepEvals += k.curEvals
	k.curEvals = 0
	k.startStep()
	k.buildRequest()
	return true
}

// startStep draws every chain's direction, level, interval and expansion
// split, chain by chain.
func (k *HitAndRun) startStep() {
	p := k.dim
	k.done = 0
	for c := range k.chains {
		d := k.d[c*p : (c+1)*p]
		for {
			var s float64
			for i := range d {
				d[i] = k.rng.NormFloat64()
				s += d[i] * d[i]
			}
			if s > 0 {
				s = 1 / math.Sqrt(s)
				for i := range d {
					d[i] *= s
				}
				break
			}
		}
		y := k.lpx[c] - k.rng.ExpFloat64()
		if !(y < k.lpx[c]) {
			y = math.Nextafter(k.lpx[c], math.Inf(-1))
		}
		k.level[c] = y
		k.lo[c] = -k.w * k.rng.Float64()
		k.hi[c] = k.lo[c] + k.w
		j := int(float64(k.m) * k.rng.Float64())
		k.left[c], k.right[c] = j, k.m-1-j
		k.stage[c] = 0
		if j > 0 {
			k.stage[c] |= hitrunLeft
		}
		if k.m-1-j > 0 {
			k.stage[c] |= hitrunRight
		}
		k.maybeShrink(c)
	}
}

// maybeShrink starts chain c's shrinkage once both sides have stopped.
func (k *HitAndRun) maybeShrink(c int) {
	if k.stage[c] == 0 {
		k.stage[c] = hitrunShrink
		k.propose(c)
	}
}

// propose draws chain c's next shrinkage proposal t' uniform on [L, R).
func (k *HitAndRun) propose(c int) {
	k.t[c] = k.lo[c] + k.rng.Float64()*(k.hi[c]-k.lo[c])
}

// MarshalBinary implements encoding.BinaryMarshaler: dimension, chains,
// width, expansion cap, completed steps, evaluation counts, every chain's
// stage, expansion budget, position, log density, direction, level,
// interval, pending proposal and accepted point, and the random stream's
// state. A state taken in the middle of a step resumes it exactly.
func (k *HitAndRun) MarshalBinary() ([]byte, error) {
	w := newStateWriter("HitAndRun")
	w.ints("dim", k.dim)
	w.ints("chains", k.chains)
	w.floats("width", k.w)
	w.ints("m", k.m)
	w.ints("steps", k.steps)
	w.flag("ready", k.ready)
	w.ints("evals", k.evals, k.stepEvals, k.curEvals)
	stage := make([]int, k.chains)
	for i, s := range k.stage {
		stage[i] = int(s)
	}
	w.ints("stage", stage...)
	w.ints("left", k.left...)
	w.ints("right", k.right...)
	w.floats("x", k.x...)
	w.floats("xnext", k.xn...)
	w.floats("dir", k.d...)
	w.floats("logpi", k.lpx...)
	w.floats("logpinext", k.lpn...)
	w.floats("level", k.level...)
	w.floats("lo", k.lo...)
	w.floats("hi", k.hi...)
	w.floats("t", k.t...)
	w.stream("rng", k.src)
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, including dimension and number of chains.
func (k *HitAndRun) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "HitAndRun")
	if err != nil {
		return err
	}
	n := &HitAndRun{}
	n.dim, n.chains = r.shape()
	n.w = r.float("width")
	n.m, n.steps = r.integer("m"), r.integer("steps")
	n.ready = r.flag("ready")
	if ev := r.ints("evals", 3); ev != nil {
		n.evals, n.stepEvals, n.curEvals = ev[0], ev[1], ev[2]
	}
	if err := r.check(positive(n.w) && n.m >= 1 && n.m <= len(b) && n.steps >= 0 &&
		n.evals >= 0 && n.stepEvals >= 0 && n.curEvals >= 0 && n.stepEvals <= n.evals-n.curEvals,
		"width, expansion cap or counts"); err != nil {
		return err
	}
	n.alloc()
	stage, left, right := r.ints("stage", n.chains), r.ints("left", n.chains), r.ints("right", n.chains)
	for i := 0; r.err == nil && i < n.chains; i++ {
		s, j, kk := stage[i], left[i], right[i]
		ok := j >= 0 && kk >= 0 && j <= n.m && kk <= n.m && j+kk <= n.m-1
		switch {
		case !ok:
		case !n.ready:
			ok = s == 0 // no step has begun before the start's answer
		case s == int(hitrunDone):
			n.done++
		case s != int(hitrunLeft) && s != int(hitrunRight) && s != int(hitrunLeft|hitrunRight) &&
			s != int(hitrunShrink):
			ok = false // 0 is transient: the end of stepping-out starts shrinkage
		case s&int(hitrunLeft) != 0 && j == 0, s&int(hitrunRight) != 0 && kk == 0:
			ok = false // a side expands only with budget left
		}
		if !ok {
			r.fail("chain %d stage %d with expansions %d, %d", i, s, j, kk)
			break
		}
		n.stage[i], n.left[i], n.right[i] = uint8(s), j, kk
	}
	if n.ready && n.done == n.chains {
		r.fail("every chain's step finished") // a finished step would have started the next
	}
	r.fill("x", n.x)
	r.fill("xnext", n.xn)
	r.fill("dir", n.d)
	r.fill("logpi", n.lpx)
	r.fill("logpinext", n.lpn)
	r.fill("level", n.level)
	r.fill("lo", n.lo)
	r.fill("hi", n.hi)
	r.fill("t", n.t)
	n.src = r.stream("rng")
	if r.err != nil {
		return r.err
	}
	n.rng = rand.New(n.src)
	n.buildRequest()
	*k = *n
	return nil
}
