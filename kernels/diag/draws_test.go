package diag

import (
	"math/rand/v2"
	"slices"
	"testing"
)

// A History made by NewDrawHistory keeps exactly the draws one made by
// NewHistory keeps from the same steps (reference: the definition of the
// thinned history, which does not depend on the running moments), so its
// Summarize is the same, value for value; AddRows of chosen rows keeps
// what Add of those rows gathered keeps.
func TestDrawHistoryKeepsTheSameDraws(t *testing.T) {
	const chains, dim, capacity, all = 3, 4, 16, 5
	full, draws, rows := NewHistory(chains, dim, capacity), NewDrawHistory(chains, dim, capacity), NewDrawHistory(chains, dim, capacity)
	idx := []int{4, 0, 2} // rows of a step of all = 5 chains
	r := rand.New(rand.NewPCG(3, 5))
	step, wide := make([]float64, chains*dim), make([]float64, all*dim)
	for n := 1; n <= 777; n++ {
		for i := range wide {
			wide[i] = 0.9*wide[i] + r.NormFloat64()
		}
		for i, c := range idx {
			copy(step[i*dim:(i+1)*dim], wide[c*dim:(c+1)*dim])
		}
		full.Add(step)
		draws.Add(step)
		rows.AddRows(wide, idx)
		for _, h := range []*History{draws, rows} {
			if h.Steps() != full.Steps() || h.Kept() != full.Kept() || h.Interval() != full.Interval() ||
				!slices.Equal(h.buf[:h.kept*h.row], full.buf[:full.kept*full.row]) {
				t.Fatalf("after %d steps: steps %d, kept %d, interval %d; NewHistory: %d, %d, %d, or other draws",
					n, h.Steps(), h.Kept(), h.Interval(), full.Steps(), full.Kept(), full.Interval())
			}
		}
	}
	want := full.Summarize()
	for _, h := range []*History{draws, rows} {
		got := h.Summarize()
		for j := range want {
			if got[j] != want[j] {
				t.Errorf("coordinate %d: %+v, NewHistory's %+v", j, got[j], want[j])
			}
		}
	}
	defer func() {
		if recover() == nil {
			t.Error("RunMeans of a NewDrawHistory did not panic")
		}
	}()
	draws.RunMeans()
}

// AddRows on a History that keeps running moments is Add of the rows
// gathered (reference: Add itself).
func TestHistoryAddRowsIsAddOfTheRows(t *testing.T) {
	const chains, dim, capacity = 2, 3, 16
	a, b := NewHistory(chains, dim, capacity), NewHistory(chains, dim, capacity)
	idx := []int{1, 3}
	r := rand.New(rand.NewPCG(7, 11))
	wide, step := make([]float64, 4*dim), make([]float64, chains*dim)
	for range 300 {
		for i := range wide {
			wide[i] = r.NormFloat64()
		}
		copy(step[:dim], wide[dim:2*dim])
		copy(step[dim:], wide[3*dim:4*dim])
		a.Add(step)
		b.AddRows(wide, idx)
	}
	ra, rb := a.RunMeans(), b.RunMeans()
	for j := range ra {
		if ra[j] != rb[j] {
			t.Errorf("coordinate %d: AddRows %+v, Add %+v", j, rb[j], ra[j])
		}
	}
	if !slices.Equal(a.buf[:a.kept*a.row], b.buf[:b.kept*b.row]) {
		t.Error("AddRows kept other draws than Add")
	}
}

func TestDrawHistoryAddRowsDoesNotAllocate(t *testing.T) {
	h := NewDrawHistory(2, 3, 16)
	step := make([]float64, 4*3)
	idx := []int{3, 1}
	var s float64
	allocs := testing.AllocsPerRun(10000, func() {
		s++
		step[0] = s
		h.AddRows(step, idx)
		h.Add(step[:6])
	})
	if allocs != 0 {
		t.Errorf("NewDrawHistory's AddRows and Add allocate %v times per call, want 0", allocs)
	}
}

// Checkpoints: a NewDrawHistory's state restores into another, and one
// that keeps running moments takes the draws of NewHistory's state; a
// NewHistory refuses a NewDrawHistory's state, which has no moments.
func TestDrawHistoryCheckpoint(t *testing.T) {
	const chains, dim, capacity = 2, 3, 16
	full, draws := NewHistory(chains, dim, capacity), NewDrawHistory(chains, dim, capacity)
	r := rand.New(rand.NewPCG(1, 9))
	step := make([]float64, chains*dim)
	for range 100 {
		for i := range step {
			step[i] = r.NormFloat64()
		}
		full.Add(step)
		draws.Add(step)
	}
	for name, src := range map[string]*History{"NewDrawHistory": draws, "NewHistory": full} {
		b, err := src.MarshalBinary()
		if err != nil {
			t.Fatal(err)
		}
		h := NewDrawHistory(chains, dim, capacity)
		if err := h.UnmarshalBinary(b); err != nil {
			t.Fatalf("%s's state into a NewDrawHistory: %v", name, err)
		}
		if h.Steps() != src.Steps() || h.Kept() != src.Kept() || h.Interval() != src.Interval() ||
			!slices.Equal(h.buf[:h.kept*h.row], src.buf[:src.kept*src.row]) {
			t.Errorf("%s's state restored into a NewDrawHistory differs", name)
		}
	}
	b, err := draws.MarshalBinary()
	if err != nil {
		t.Fatal(err)
	}
	if err := NewHistory(chains, dim, capacity).UnmarshalBinary(b); err == nil {
		t.Error("a NewHistory took a NewDrawHistory's state")
	}
}

// AddRows offers the round Add of the rows gathered offers (reference:
// Add itself): the same kept rounds, the same discrepancy.
func TestStreamKSDAddRowsIsAddOfTheRows(t *testing.T) {
	const dim, rows = 2, 3
	a, b := NewStreamKSD(IMQ{}, dim, rows, 4*rows), NewStreamKSD(IMQ{}, dim, rows, 4*rows)
	idx := []int{4, 0, 2}
	r := rand.New(rand.NewPCG(5, 6))
	x, s := make([]float64, 5*dim), make([]float64, 5*dim)
	gx, gs := make([]float64, rows*dim), make([]float64, rows*dim)
	for n := range 200 {
		for i := range x {
			x[i] = r.NormFloat64()
			s[i] = -x[i]
		}
		for i, c := range idx {
			copy(gx[i*dim:(i+1)*dim], x[c*dim:(c+1)*dim])
			copy(gs[i*dim:(i+1)*dim], s[c*dim:(c+1)*dim])
		}
		a.Add(gx, gs)
		b.AddRows(x, s, idx)
		w := a.kept * rows * dim
		if a.kept != b.kept || a.stride != b.stride || a.rounds != b.rounds ||
			!slices.Equal(a.x[:w], b.x[:w]) || !slices.Equal(a.s[:w], b.s[:w]) {
			t.Fatalf("round %d: AddRows kept other rounds than Add", n)
		}
	}
	if a.Result() != b.Result() {
		t.Errorf("AddRows: %+v, Add: %+v", b.Result(), a.Result())
	}
	allocs := testing.AllocsPerRun(1000, func() { b.AddRows(x, s, idx) })
	if allocs != 0 {
		t.Errorf("AddRows allocates %v times per call, want 0", allocs)
	}
}
