package kernels

import (
	"math/rand/v2"
	"testing"
)

// blockKinds builds each chainwise kernel for one chain.
var blockKinds = map[string]func(dim int, start []float64, src *rand.PCG) Kernel{
	"lmc": func(d int, x []float64, src *rand.PCG) Kernel { return NewLMC(d, 1, 0.05, x, src) },
	"kinetic": func(d int, x []float64, src *rand.PCG) Kernel {
		return NewKinetic(d, 1, 0.1, 2, 1, x, nil, src)
	},
	"midpoint": func(d int, x []float64, src *rand.PCG) Kernel {
		return NewMidpoint(d, 1, 0.1, 1, x, nil, src)
	},
	"midpoint-overdamped": func(d int, x []float64, src *rand.PCG) Kernel {
		return NewOverdampedMidpoint(d, 1, 0.05, x, src)
	},
	"baoab": func(d int, x []float64, src *rand.PCG) Kernel {
		return NewBAOAB(d, 1, 0.2, 0.5, 1, x, nil, src)
	},
}

// batchOf builds a batch of chains chains, chain c started at (c, −c, …)
// and drawing from ChainSource(seed, c).
func batchOf(kind string, dim, chains int, seed uint64) Kernel {
	ks := make([]Kernel, chains)
	for c := range ks {
		x := make([]float64, dim)
		for i := range x {
			x[i] = float64(c) * float64(1-2*(i%2))
		}
		ks[c] = blockKinds[kind](dim, x, ChainSource(seed, c))
	}
	return NewBlocks(ks)
}

// answerGauss answers req for the Gaussian with precision tridiagonal
// (2, −0.5): ∇log π(x) = −Q·x, row by row.
func answerGauss(req *Request, a *Answer, dim int) {
	a.Reserve(req.Need, req.Rows, dim)
	for r := range req.Rows {
		x := req.Points[r*dim : (r+1)*dim]
		for i := range dim {
			g := -2 * x[i]
			if i > 0 {
				g += 0.5 * x[i-1]
			}
			if i+1 < dim {
				g += 0.5 * x[i+1]
			}
			a.Grad[r*dim+i] = g
		}
	}
}

// Stepping the chains through groups, in any interleaving, gives bit for
// bit the draws of stepping the batch whole (the chains' kernels see the
// same answers in the same order); and chain c of a batch draws exactly
// what a lone one-chain kernel on ChainSource(seed, c) draws.
func TestBlocksGroupsGiveTheBatchsDraws(t *testing.T) {
	const dim, chains, steps = 3, 6, 40
	for kind := range blockKinds {
		whole := batchOf(kind, dim, chains, 11)
		a := NewAnswer(chains, dim)
		for whole.Steps() < steps {
			answerGauss(whole.Next(), a, dim)
			whole.Tell(a)
		}
		want := append([]float64(nil), whole.Positions()...)
		for _, cuts := range [][]int{{0, 3, 6}, {0, 1, 6}, {0, 2, 4, 6}, {0, 1, 2, 3, 4, 5, 6}} {
			k := batchOf(kind, dim, chains, 11)
			b, ok := BlocksOf(k)
			if !ok {
				t.Fatalf("%s: BlocksOf(NewBlocks(...)) not a batch", kind)
			}
			var groups []*Blocks
			for i := 1; i < len(cuts); i++ {
				groups = append(groups, b.Group(cuts[i-1], cuts[i]))
			}
			// Staggered: the last group runs steps ahead of the others,
			// the others in reverse order, a request at a time.
			ga := NewAnswer(chains, dim)
			for g := len(groups) - 1; g >= 0; g-- {
				for groups[g].Steps() < steps {
					req := groups[g].Next()
					for r, c := range req.Chain {
						if c != cuts[g]+r {
							t.Fatalf("%s: group %d row %d names chain %d, want %d", kind, g, r, c, cuts[g]+r)
						}
					}
					answerGauss(req, ga, dim)
					groups[g].Tell(ga)
				}
			}
			if k.Steps() != steps {
				t.Fatalf("%s %v: batch at step %d, want %d", kind, cuts, k.Steps(), steps)
			}
			for i, v := range k.Positions() {
				if v != want[i] {
					t.Fatalf("%s %v: value %d is %v grouped, %v whole", kind, cuts, i, v, want[i])
				}
			}
		}
		// Chain 4 alone.
		x := []float64{4, -4, 4}
		one := blockKinds[kind](dim, x, ChainSource(11, 4))
		a1 := NewAnswer(1, dim)
		for one.Steps() < steps {
			answerGauss(one.Next(), a1, dim)
			one.Tell(a1)
		}
		for i, v := range one.Positions() {
			if v != want[4*dim+i] {
				t.Fatalf("%s: chain 4 value %d is %v alone, %v in the batch", kind, i, v, want[4*dim+i])
			}
		}
	}
}

// Each chain has a stream of its own: different chains, and the same
// chain under different seeds, start with different outputs.
func TestChainSourcesDiffer(t *testing.T) {
	seen := map[uint64]string{}
	for _, seed := range []uint64{0, 1, 2, 7, 1 << 40} {
		for c := range 64 {
			v := ChainSource(seed, c).Uint64()
			if w, dup := seen[v]; dup {
				t.Fatalf("seed %d chain %d starts like %s", seed, c, w)
			}
			seen[v] = "another"
		}
	}
}

// A batch's state restores every chain's kernel: the restored batch
// continues bit for bit, also after Prepare drew noise ahead; states of
// another shape or truncated are errors.
func TestBlocksCheckpoint(t *testing.T) {
	const dim, chains = 2, 5
	for kind := range blockKinds {
		k := batchOf(kind, dim, chains, 3)
		a := NewAnswer(chains, dim)
		for k.Steps() < 7 {
			answerGauss(k.Next(), a, dim)
			k.Tell(a)
		}
		k.(Preparer).Prepare()
		state, err := k.(Checkpointer).MarshalBinary()
		if err != nil {
			t.Fatal(err)
		}
		r := batchOf(kind, dim, chains, 99)
		if err := r.(Checkpointer).UnmarshalBinary(state); err != nil {
			t.Fatalf("%s: %v", kind, err)
		}
		for k.Steps() < 20 {
			answerGauss(k.Next(), a, dim)
			k.Tell(a)
			answerGauss(r.Next(), a, dim)
			r.Tell(a)
		}
		for i, v := range r.Positions() {
			if v != k.Positions()[i] {
				t.Fatalf("%s: restored value %d is %v, original %v", kind, i, v, k.Positions()[i])
			}
		}
		if err := batchOf(kind, dim, chains+1, 3).(Checkpointer).UnmarshalBinary(state); err == nil {
			t.Fatalf("%s: a state of %d chains restored into %d", kind, chains, chains+1)
		}
		for _, n := range []int{0, 10, len(state) / 2, len(state) - 1} {
			if err := batchOf(kind, dim, chains, 3).(Checkpointer).UnmarshalBinary(state[:n]); err == nil {
				t.Fatalf("%s: a state cut to %d bytes restored", kind, n)
			}
		}
	}
	// Another kernel's chain states are refused.
	lmc, _ := batchOf("lmc", dim, chains, 3).(Checkpointer).MarshalBinary()
	if err := batchOf("kinetic", dim, chains, 3).(Checkpointer).UnmarshalBinary(lmc); err == nil {
		t.Fatal("kinetic batch restored from an LMC batch's state")
	}
}

// A batch has the optional capabilities of its chains' kernels, and only
// those: setting the step, friction or inverse mass reaches every chain.
func TestBlocksCapabilities(t *testing.T) {
	_, lmcMassive := batchOf("lmc", 2, 3, 1).(Massive)
	_, midDamped := batchOf("midpoint", 2, 3, 1).(Damped)
	_, midMassive := batchOf("midpoint", 2, 3, 1).(Massive)
	if lmcMassive || midDamped || !midMassive {
		t.Fatalf("lmc Massive %v, midpoint Damped %v, Massive %v", lmcMassive, midDamped, midMassive)
	}
	k := batchOf("kinetic", 2, 3, 1)
	k.(StepSetter).SetStep(0.2)
	k.(interface{ SetFriction(float64) }).SetFriction(3)
	k.(interface{ SetInverseMass(float64) }).SetInverseMass(0.5)
	b, _ := BlocksOf(k)
	for c, ch := range b.chain {
		kk := ch.(*Kinetic)
		if kk.Step() != 0.2 || kk.Friction() != 3 || kk.InverseMass() != 0.5 {
			t.Fatalf("chain %d: step %v friction %v inverse mass %v", c, kk.Step(), kk.Friction(), kk.InverseMass())
		}
	}
}
