package session

import (
	"context"
	"strings"
	"testing"
	"time"
)

// One Register asking for Hessians of 512×512 at 32768 chains needs at
// least 32768·512²·8 bytes = 64 GiB for the Hessians alone (the answer
// holds one dim×dim block per chain): it is refused at registration,
// before anything is built, naming the field and the figures.
func TestBudgetRefusesHessiansOfManyChains(t *testing.T) {
	const dim, chains = 512, 32768
	spec := Spec{Kernel: "ozaki", Dim: dim, Chains: chains, Start: make([]float64, dim), StartRows: 1, Step: 0.1}
	b, err := Need(spec, Limits{})
	e, ok := AsError(err)
	if !ok || e.Kind != TooLarge || e.Field != "register.chains" {
		t.Fatalf("Need: %v, want a too-large error on register.chains", err)
	}
	for _, want := range []string{"Hessians of 512×512 for 32768 chains", "the per-session limit is 1 GiB", "at worst"} {
		if !strings.Contains(e.Reason, want) {
			t.Errorf("reason %q lacks %q", e.Reason, want)
		}
	}
	if hess := int64(chains) * dim * dim * 8; b.Total < hess {
		t.Errorf("budget %d bytes is below the Hessians' %d", b.Total, hess)
	}
	if _, err := New("big", spec, Limits{}); err == nil || err.Error() != e.Error() {
		t.Fatalf("New: %v, want the same refusal as Need: %v", err, e)
	}
	// Within a larger per-session limit the same session is accepted by
	// the budget (other limits still apply).
	lim := Limits{MaxSessionBytes: 1 << 40}
	if _, err := Need(spec, lim); err != nil {
		t.Fatalf("Need within a 1 TiB limit: %v", err)
	}
}

// Replicates declared at registration are counted: each extra replicate
// adds exactly rows × dim × 8 bytes to the answers (rows = chains for
// one request of svrg's minibatch kind, two rows per chain), and a
// session whose replicates do not fit is refused naming the replicates.
func TestBudgetCountsReplicates(t *testing.T) {
	const dim, chains = 100, 16
	spec := func(reps int) Spec {
		return Spec{Kernel: "svrg", Dim: dim, Chains: chains, Start: make([]float64, dim), StartRows: 1, Step: 0.01,
			Noise: Noise{Stochastic: true, Replicates: reps}}
	}
	item := func(b Budget) int64 {
		for _, it := range b.Items {
			if strings.HasPrefix(it.What, "answers") {
				return it.Bytes
			}
		}
		t.Fatalf("no answers item in %+v", b)
		return 0
	}
	one, err := Need(spec(1), Limits{})
	if err != nil {
		t.Fatal(err)
	}
	eight, err := Need(spec(8), Limits{})
	if err != nil {
		t.Fatal(err)
	}
	// svrg's largest request has 2 rows per chain (registry).
	if d := item(eight) - item(one); d != 7*2*chains*dim*8 {
		t.Errorf("8 replicates add %d bytes to the answers, want 7 × 2·%d rows × %d × 8 = %d", d, chains, dim, 7*2*chains*dim*8)
	}
	big := spec(64)
	big.Dim, big.Chains, big.Start = 10000, 64, make([]float64, 10000)
	_, err = Need(big, Limits{MaxSessionBytes: 256 << 20})
	if e, ok := AsError(err); !ok || e.Kind != TooLarge || !strings.Contains(e.Reason, "per-session limit is 256 MiB") {
		t.Fatalf("dim 10000 × 64 replicates: %v, want a too-large refusal", err)
	}
}

// Strings a client sends have length limits, each refusal naming its
// field.
func TestStringLimits(t *testing.T) {
	s := baseSpec()
	s.Names = []string{"a", strings.Repeat("n", MaxNameBytes+1)}
	if _, err := New("x", s, Limits{}); !hasField(err, "register.names") {
		t.Errorf("long name: %v", err)
	}
	s = baseSpec()
	s.Kernel = strings.Repeat("k", MaxKernelBytes+1)
	if _, err := New("x", s, Limits{}); !hasField(err, "register.kernel") || strings.Contains(err.Error(), s.Kernel) {
		t.Errorf("long kernel name: %v (must not be echoed)", err)
	}
}

func hasField(err error, field string) bool {
	e, ok := AsError(err)
	return ok && e.Field == field
}

// A Stop at 32768 chains is answered with end work independent of the
// chains: the final Stein discrepancy runs on at most maxKSDPoints
// evenly spread draws, so it evaluates the Stein kernel at most
// maxKSDPoints·(maxKSDPoints+1)/2 times (each unordered pair and each
// diagonal once), where the whole last two rounds would take
// 65536·65537/2 ≈ 2.1·10⁹.
func TestStopAtManyChainsHasBoundedEndWork(t *testing.T) {
	const chains = 32768
	spec := Spec{Dim: 1, Chains: chains, Start: []float64{0.3}, StartRows: 1, Step: 0.1, Seed: 3}
	s := mustNew(t, spec, Limits{DiagnosticsShare: -1}) // every report measured
	in := make(chan Message, 64)
	requests, before := 0, int64(-1)
	send := func(f Frame) error {
		p, ok := f.(*Points)
		if !ok {
			return nil
		}
		requests++
		if requests > 6 {
			before = s.mon.ksdEvaluations
			in <- Message{Stop: true, StopReason: "enough"}
			return nil
		}
		ev := &Evaluations{RequestID: p.RequestID, FirstRow: p.FirstRow, Rows: p.Rows, Dim: p.Dim, Grad: make([]float64, len(p.Points))}
		for i, x := range p.Points {
			ev.Grad[i] = -x
		}
		in <- Message{Evaluations: ev}
		return nil
	}
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	res, err := s.Run(ctx, in, send)
	if err != nil || res.Finished.Reason != Stopped {
		t.Fatalf("Run: %v, reason %v", err, res.Finished.Reason)
	}
	if before < 0 {
		t.Fatal("the session never reached the stop")
	}
	end := s.mon.ksdEvaluations - before
	if bound := int64(maxKSDPoints) * (maxKSDPoints + 1) / 2; end <= 0 || end > bound {
		t.Fatalf("final report evaluated the Stein kernel %d times, want 1..%d", end, bound)
	}
	if k := s.mon.ksd.Kept(); k > maxKSDPoints {
		t.Fatalf("the window keeps %d draws, more than %d", k, maxKSDPoints)
	}
	// The final report assessed the discrepancy (with two draws per chain
	// it may honestly say "undefined" rather than give a figure).
	if res.Finished.Progress.Stein == nil {
		t.Fatal("no final Stein assessment")
	}
}

// A follow ring starts small and doubles as it fills, up to its capacity,
// losing no row on the way: every row read back equals the row appended
// with that sequence number, and once past the capacity the oldest rows
// are dropped, as in a ring allocated at full size.
func TestDrawLogGrowsAsItFills(t *testing.T) {
	const dim, capacity = 3, 1000
	l := NewDrawLog(dim, capacity)
	if got, want := l.Bytes(), int64(initialLogRows*(8*dim+16)); got != want {
		t.Fatalf("an empty log holds %d bytes, want %d (its first %d rows)", got, want, initialLogRows)
	}
	row := func(q uint64) []float64 { return []float64{float64(q), -float64(q), float64(q) / 7} }
	var seq uint64
	appendRows := func(n int) {
		d := Draws{Seq: seq, Rows: n, Dim: dim, Chains: make([]int, n), Iterations: make([]int64, n)}
		for r := range n {
			d.Values = append(d.Values, row(seq+uint64(r))...)
			d.Chains[r], d.Iterations[r] = r, int64(seq)+int64(r)
		}
		l.append(&d)
		seq += uint64(n)
	}
	check := func(from uint64) {
		t.Helper()
		for q := from; q < seq; {
			d, err := l.Read(context.Background(), q, 97)
			if err != nil {
				t.Fatalf("Read(%d): %v", q, err)
			}
			for r := range d.Rows {
				want := row(q + uint64(r))
				for j := range dim {
					if d.Values[r*dim+j] != want[j] || d.Iterations[r] != int64(q)+int64(r) {
						t.Fatalf("row %d: %v at iteration %d, want %v", q+uint64(r), d.Values[r*dim:(r+1)*dim], d.Iterations[r], want)
					}
				}
			}
			q += uint64(d.Rows)
		}
	}
	for seq < 600 {
		appendRows(7)
	}
	check(0)
	if got, want := l.Bytes(), int64(1000*(8*dim+16)); got != want { // 256 → 512 → 1000
		t.Fatalf("after %d rows the log holds %d bytes, want %d", seq, got, want)
	}
	for seq < 3000 {
		appendRows(13)
	}
	first, next := l.Span()
	if next != seq || next-first != capacity {
		t.Fatalf("span [%d, %d) after %d rows, want the last %d", first, next, seq, capacity)
	}
	check(first)
	if _, err := l.Read(context.Background(), first-1, 1); err == nil {
		t.Fatal("reading a dropped row succeeded")
	}
}

// A ring restored part-way (its first row at sequence number 1000, not at
// an index of its own) still grows without losing or moving a row: every
// row read back after growing past two sizes equals the row appended with
// that sequence number.
func TestDrawLogGrowsAfterARestore(t *testing.T) {
	const dim, capacity = 2, 1000
	row := func(q uint64) []float64 { return []float64{float64(q), float64(q) / 3} }
	fs := followState{First: 1000, Next: 1300}
	for q := fs.First; q < fs.Next; q++ {
		fs.Values = append(fs.Values, row(q)...)
		fs.Chains = append(fs.Chains, int(q%4))
		fs.Iterations = append(fs.Iterations, int64(q))
	}
	l := NewDrawLog(dim, capacity)
	if err := l.restore(&fs, fs.Next); err != nil {
		t.Fatal(err)
	}
	seq := fs.Next
	for seq < 2200 { // 512 rows held → 1000
		d := Draws{Seq: seq, Rows: 1, Dim: dim, Values: row(seq), Chains: []int{int(seq % 4)}, Iterations: []int64{int64(seq)}}
		l.append(&d)
		seq++
	}
	first, next := l.Span()
	if next != seq || next-first != capacity {
		t.Fatalf("span [%d, %d), want the last %d of %d", first, next, capacity, seq)
	}
	for q := first; q < next; q++ {
		d, err := l.Read(context.Background(), q, 1)
		if err != nil {
			t.Fatal(err)
		}
		if want := row(q); d.Values[0] != want[0] || d.Values[1] != want[1] || d.Iterations[0] != int64(q) || d.Chains[0] != int(q%4) {
			t.Fatalf("row %d: %v (iteration %d, chain %d), want %v", q, d.Values, d.Iterations[0], d.Chains[0], want)
		}
	}
}
