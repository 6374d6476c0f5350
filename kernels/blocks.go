package kernels

import (
	"fmt"
	"math/rand/v2"
)

// Chain blocks: a batch of chains run as one kernel per chain, each
// drawing its noise from a stream of its own (ChainSource), so that the
// draws a chain gets depend on the seed, the chain's index and the answers
// to its own points only, never on how the chains are batched into
// requests. A driver may then step any set of consecutive chains on its
// own (Blocks.Group) while the others wait for their answers, and get
// bit for bit the draws of stepping them all together.

// ChainSource returns the random stream of chain c of a session seeded
// with seed. The two words of the generator's state are the SplitMix64
// finaliser (Steele, Lea & Flood, OOPSLA 2014) of the seed offset by the
// chain's index times two different odd constants, so that neighbouring
// chains and neighbouring seeds start far apart in the stream.
func ChainSource(seed uint64, c int) *rand.PCG {
	i := uint64(c) + 1
	return rand.NewPCG(splitmix(seed+i*0x9e3779b97f4a7c15), splitmix(seed^(i*0xd1b54a32d192ed03)))
}

func splitmix(z uint64) uint64 {
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
	z = (z ^ (z >> 27)) * 0x94d049bb133111eb
	return z ^ (z >> 31)
}

// Blocks runs a batch of chains as one kernel per chain. Its own
// requests ask for every chain's point in chain order, its Tell splits
// the answer among the chains' kernels, and its other methods read or set
// the chains' kernels alike. Group returns a view over a range of chains
// that steps them alone. The chains' kernels must be of one type, hold one
// chain each and ask one kind of request at a time with one row per chain
// (NewBlocks checks the first two; a request of another shape panics).
type Blocks struct {
	dim      int
	lo       int      // the first chain's index (0 for the whole batch)
	chain    []Kernel // one kernel per chain, shared with the groups
	parent   *Blocks  // the whole batch of a group; nil for the whole batch
	req      Request
	pts      []float64 // the points of a request that are not the positions
	pos      []float64 // the positions, gathered
	gen      *uint64   // counts Tells of the batch and its groups
	posGen   uint64    // pos holds the positions as of Tell number posGen−1
	stepsGen uint64    // steps is the completed steps as of stepsGen−1
	steps    int
	sub      []Answer // one per chain: its rows of the answer being told
	prepared []Preparer
}

// NewBlocks returns the batch of the given kernels, chain c of the batch
// being chains[c]. It panics when a kernel holds other than one chain or
// the dimensions differ. The result implements Checkpointer, StepSetter
// and MetricUser, and Massive or Damped when the chains' kernels do
// (SetStep and SetMetric panic when they do not).
func NewBlocks(chains []Kernel) Kernel {
	b := newBlocks(chains, 0, nil)
	switch chains[0].(type) {
	case Damped:
		return &dampedBlocks{massiveBlocks{b}}
	case Massive:
		return &massiveBlocks{b}
	}
	return b
}

func newBlocks(chains []Kernel, lo int, parent *Blocks) *Blocks {
	if len(chains) == 0 {
		panic("kernels: Blocks with no chains")
	}
	dim := chains[0].Dim()
	b := &Blocks{dim: dim, lo: lo, chain: chains, parent: parent, sub: make([]Answer, len(chains)), gen: new(uint64)}
	if parent != nil {
		b.gen = parent.gen
	}
	for _, k := range chains {
		if k.Chains() != 1 || k.Dim() != dim {
			panic(fmt.Sprintf("kernels: Blocks of a kernel with %d chains in dimension %d, want 1 chain in dimension %d", k.Chains(), k.Dim(), dim))
		}
		if p, ok := k.(Preparer); ok {
			b.prepared = append(b.prepared, p)
		}
	}
	b.req.Chain = make([]int, len(chains))
	for i := range b.req.Chain {
		b.req.Chain[i] = lo + i
	}
	b.pos = make([]float64, len(chains)*dim)
	return b
}

// BlocksOf returns the batch under k when k is one NewBlocks returned.
func BlocksOf(k Kernel) (*Blocks, bool) {
	switch b := k.(type) {
	case *Blocks:
		return b, true
	case *massiveBlocks:
		return b.Blocks, true
	case *dampedBlocks:
		return b.Blocks, true
	}
	return nil, false
}

// Group returns a kernel stepping chains [lo, hi) of the batch alone; its
// requests name the chains by their index in the batch. Stepping every
// chain through groups, in any order and interleaving, gives the same
// draws as stepping the batch itself: each chain's kernel sees the same
// answers in the same order. The group shares the chains' kernels with
// the batch, whose Positions and Steps stay valid once every chain has
// completed the same number of steps.
func (b *Blocks) Group(lo, hi int) *Blocks {
	if lo < 0 || hi > len(b.chain) || lo >= hi {
		panic(fmt.Sprintf("kernels: group [%d, %d) of %d chains", lo, hi, len(b.chain)))
	}
	return newBlocks(b.chain[lo:hi], b.lo+lo, b)
}

// Dim implements Kernel.
func (b *Blocks) Dim() int { return b.dim }

// Chains implements Kernel.
func (b *Blocks) Chains() int { return len(b.chain) }

// Steps implements Kernel: the fewest steps any chain has completed.
func (b *Blocks) Steps() int {
	if b.stepsGen != *b.gen+1 {
		b.steps = b.chain[0].Steps()
		for _, k := range b.chain[1:] {
			b.steps = min(b.steps, k.Steps())
		}
		b.stepsGen = *b.gen + 1
	}
	return b.steps
}

// EvaluationsPerStep implements Kernel.
func (b *Blocks) EvaluationsPerStep() int { return len(b.chain) * b.chain[0].EvaluationsPerStep() }

// Positions implements Kernel: every chain's position, gathered into one
// slice that stays valid until the next Tell.
func (b *Blocks) Positions() []float64 {
	if b.posGen != *b.gen+1 {
		for c, k := range b.chain {
			copy(b.pos[c*b.dim:(c+1)*b.dim], k.Positions())
		}
		b.posGen = *b.gen + 1
	}
	return b.pos
}

// Next implements Kernel: every chain's request, one row each, in chain
// order. When each chain asks at its position, the request's points are
// the slice Positions returns.
func (b *Blocks) Next() *Request {
	first := b.chain[0].Next()
	atPos := true
	for _, k := range b.chain {
		r := k.Next()
		if r.Rows != 1 || r.Need != first.Need || r.Vectors != nil || r.Group != nil {
			panic(fmt.Sprintf("kernels: Blocks of a kernel asking %d rows (need %d, want %d, one row, no vectors or groups)", r.Rows, r.Need, first.Need))
		}
		atPos = atPos && &r.Points[0] == &k.Positions()[0]
	}
	b.req.Need, b.req.Rows = first.Need, len(b.chain)
	if atPos {
		b.req.Points = b.Positions()
		return &b.req
	}
	if b.pts == nil {
		b.pts = make([]float64, len(b.chain)*b.dim)
	}
	for c, k := range b.chain {
		copy(b.pts[c*b.dim:(c+1)*b.dim], k.Next().Points)
	}
	b.req.Points = b.pts
	return &b.req
}

// Tell implements Kernel: each chain's kernel is told its row of a.
func (b *Blocks) Tell(a *Answer) bool {
	d := b.dim
	done := true
	for c, k := range b.chain {
		s := &b.sub[c]
		*s = Answer{}
		if len(a.Grad) > 0 {
			s.Grad = a.Grad[c*d : (c+1)*d]
		}
		if len(a.LogDensity) > 0 {
			s.LogDensity = a.LogDensity[c : c+1]
		}
		if len(a.Hessian) > 0 {
			s.Hessian = a.Hessian[c*d*d : (c+1)*d*d]
		}
		if len(a.HessVec) > 0 {
			s.HessVec = a.HessVec[c*d : (c+1)*d]
		}
		if !k.Tell(s) {
			done = false
		}
	}
	b.changed()
	return done
}

// changed forgets what the batch and its groups gathered.
func (b *Blocks) changed() { *b.gen++ }

// Prepare implements Preparer for the chains' kernels that do.
func (b *Blocks) Prepare() {
	for _, p := range b.prepared {
		p.Prepare()
	}
}

// Step implements Stepper: the first chain's step (every chain has the
// same one unless they were set apart).
func (b *Blocks) Step() float64 { return b.chain[0].(Stepper).Step() }

// SetStep implements StepSetter: every chain's step.
func (b *Blocks) SetStep(h float64) {
	for _, k := range b.chain {
		k.(StepSetter).SetStep(h)
	}
}

// SetMetric implements MetricUser: every chain's metric.
func (b *Blocks) SetMetric(m *Metric) {
	for _, k := range b.chain {
		k.(MetricUser).SetMetric(m)
	}
}

// Metric implements MetricUser: the first chain's.
func (b *Blocks) Metric() *Metric { return b.chain[0].(MetricUser).Metric() }

// MarshalBinary implements encoding.BinaryMarshaler: the number of chains
// and each chain's kernel state.
func (b *Blocks) MarshalBinary() ([]byte, error) {
	w := newStateWriter("Blocks")
	w.ints("dim", b.dim)
	w.ints("chains", len(b.chain))
	for c, k := range b.chain {
		ck, ok := k.(Checkpointer)
		if !ok {
			return nil, fmt.Errorf("kernels: chain %d's kernel has no state codec", c)
		}
		s, err := ck.MarshalBinary()
		if err != nil {
			return nil, err
		}
		w.raw(chainField(c), s)
	}
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores
// every chain's kernel in place: the state must hold as many chains of
// the same dimension and kind.
func (b *Blocks) UnmarshalBinary(data []byte) error {
	r, err := readState(data, "Blocks")
	if err != nil {
		return err
	}
	dim, chains := r.shape()
	if err := r.check(dim == b.dim && chains == len(b.chain), fmt.Sprintf("%d chains in dimension %d, want %d in dimension %d", chains, dim, len(b.chain), b.dim)); err != nil {
		return err
	}
	for c, k := range b.chain {
		s := r.raw(chainField(c))
		if r.err != nil {
			return r.err
		}
		ck, ok := k.(Checkpointer)
		if !ok {
			return fmt.Errorf("kernels: chain %d's kernel has no state codec", c)
		}
		if err := ck.UnmarshalBinary(s); err != nil {
			return fmt.Errorf("kernels: chain %d: %w", c, err)
		}
		if k.Chains() != 1 || k.Dim() != b.dim {
			return fmt.Errorf("kernels: chain %d's state holds %d chains in dimension %d", c, k.Chains(), k.Dim())
		}
	}
	b.changed()
	return nil
}

func chainField(c int) string { return fmt.Sprintf("chain%d", c) }

// massiveBlocks is a batch of kernels with a velocity.
type massiveBlocks struct{ *Blocks }

// InverseMass implements Massive: the first chain's.
func (b *massiveBlocks) InverseMass() float64 { return b.chain[0].(Massive).InverseMass() }

// SetInverseMass sets every chain's inverse mass (a tuning hook of the
// kernels with a velocity).
func (b *massiveBlocks) SetInverseMass(u float64) {
	for _, k := range b.chain {
		k.(interface{ SetInverseMass(float64) }).SetInverseMass(u)
	}
}

// dampedBlocks is a batch of kernels with a friction as well.
type dampedBlocks struct{ massiveBlocks }

// Friction implements Damped: the first chain's.
func (b *dampedBlocks) Friction() float64 { return b.chain[0].(Damped).Friction() }

// SetFriction sets every chain's friction.
func (b *dampedBlocks) SetFriction(gamma float64) {
	for _, k := range b.chain {
		k.(interface{ SetFriction(float64) }).SetFriction(gamma)
	}
}

var (
	_ Kernel       = (*Blocks)(nil)
	_ Checkpointer = (*Blocks)(nil)
	_ StepSetter   = (*Blocks)(nil)
	_ MetricUser   = (*Blocks)(nil)
	_ Preparer     = (*Blocks)(nil)
	_ Damped       = (*dampedBlocks)(nil)
)
