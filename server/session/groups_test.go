package session

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"
)

// groupClient is an in-process client that answers the Points frames it
// holds in a shuffled order (seeded): it takes every frame the engine has
// sent so far, then answers what it holds, last-come first when shuffle
// is 0 and in a random order otherwise; it rebuilds the draws sent by
// reference from the points of the requests it holds, as the Go and
// Python clients do.
type groupRun struct {
	draws       []Draws // values rebuilt
	finished    *Finished
	points      int // Points frames
	carried     int // Draws carried in Points frames (Spec.DrawsInPoints)
	mostPending int // the most requests outstanding at once
	err         error
}

func runGroups(t *testing.T, spec Spec, lim Limits, shuffle uint64, setup func(*Session)) *groupRun {
	t.Helper()
	s, err := New("groups", spec, lim)
	if err != nil {
		t.Fatal(err)
	}
	if setup != nil {
		setup(s)
	}
	frames := make(chan Frame, 1<<16)
	in := make(chan Message, 1<<16)
	copyDraws := func(f *Draws) *Draws {
		c := *f
		c.Values = append([]float64(nil), f.Values...)
		c.Chains = append([]int(nil), f.Chains...)
		c.Iterations = append([]int64(nil), f.Iterations...)
		c.PointRows = append([]int(nil), f.PointRows...)
		return &c
	}
	var carried int
	send := func(f Frame) error {
		switch f := f.(type) {
		case *Points:
			c := *f
			c.Points = append([]float64(nil), f.Points...)
			c.Chains = append([]int(nil), f.Chains...)
			c.Draws = nil
			frames <- &c
			if f.Draws != nil {
				// As the protocol says: the same as a Draws frame right
				// after this one.
				carried++
				frames <- copyDraws(f.Draws)
			}
		case *Draws:
			frames <- copyDraws(f)
		case *Finished:
			c := *f
			frames <- &c
		}
		return nil
	}
	out := &groupRun{}
	done := make(chan struct{})
	go func() { // the client
		defer close(done)
		rng := rand.New(rand.NewPCG(shuffle, 1))
		held := map[uint64][]float64{} // request id → its points, rows × dim
		var pending []*Points
		dim := spec.Dim
		take := func(f Frame) bool {
			switch f := f.(type) {
			case *Points:
				out.points++
				if held[f.RequestID] == nil {
					held[f.RequestID] = make([]float64, f.TotalRows*dim)
				}
				copy(held[f.RequestID][f.FirstRow*dim:], f.Points)
				pending = append(pending, f)
				out.mostPending = max(out.mostPending, len(pending))
			case *Draws:
				if len(f.PointRows) > 0 {
					pts := held[f.FromRequestID]
					if pts == nil {
						out.err = fmt.Errorf("draws at seq %d refer to request %d, never sent", f.Seq, f.FromRequestID)
						return false
					}
					vals := make([]float64, 0, f.Rows*dim)
					k := 0
					for _, r := range f.PointRows {
						if r < 0 {
							vals = append(vals, f.Values[k*dim:(k+1)*dim]...)
							k++
							continue
						}
						vals = append(vals, pts[r*dim:(r+1)*dim]...)
					}
					f.Values, f.PointRows = vals, nil
				}
				out.draws = append(out.draws, *f)
			case *Finished:
				out.finished = f
				return false
			}
			return true
		}
		for {
			f, ok := <-frames
			if !ok || !take(f) {
				return
			}
			for more := true; more; {
				select {
				case f := <-frames:
					if !take(f) {
						return
					}
				default:
					more = false
				}
			}
			for len(pending) > 0 {
				i := len(pending) - 1
				if shuffle != 0 {
					i = rng.IntN(len(pending))
				}
				p := pending[i]
				pending = append(pending[:i], pending[i+1:]...)
				ev := &Evaluations{RequestID: p.RequestID, FirstRow: p.FirstRow, Rows: p.Rows, Dim: p.Dim}
				exactGaussian(1.5)(p, ev)
				in <- Message{Evaluations: ev}
			}
		}
	}()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	_, out.err = s.Run(ctx, in, send)
	close(frames)
	<-done
	out.carried = carried
	return out
}

// sameRun fails unless b's draws (sequence numbers, chains, iterations
// and values, bit for bit) and final figures are a's.
func sameRun(t *testing.T, what string, a, b *groupRun) {
	t.Helper()
	if a.err != nil || b.err != nil {
		t.Fatalf("%s: errors %v, %v", what, a.err, b.err)
	}
	var av, bv []float64
	var ai, bi []int64
	var ac, bc []int
	next := uint64(0)
	for _, d := range b.draws {
		if d.Seq != next {
			t.Fatalf("%s: draws at seq %d, want %d", what, d.Seq, next)
		}
		next += uint64(d.Rows)
		bv, bi, bc = append(bv, d.Values...), append(bi, d.Iterations...), append(bc, d.Chains...)
	}
	for _, d := range a.draws {
		av, ai, ac = append(av, d.Values...), append(ai, d.Iterations...), append(ac, d.Chains...)
	}
	if len(av) != len(bv) || len(av) == 0 {
		t.Fatalf("%s: %d draw values, want %d", what, len(bv), len(av))
	}
	if !sameBits(av, bv) {
		t.Fatalf("%s: draw values differ", what)
	}
	for i := range ai {
		if ai[i] != bi[i] || ac[i] != bc[i] {
			t.Fatalf("%s: row %d is chain %d iteration %d, want chain %d iteration %d", what, i, bc[i], bi[i], ac[i], ai[i])
		}
	}
	fa, fb := a.finished, b.finished
	if fa == nil || fb == nil || fa.Reason != fb.Reason {
		t.Fatalf("%s: finished %+v, want %+v", what, fb, fa)
	}
	pa, pb := fa.Progress, fb.Progress
	if pa.Steps != pb.Steps || pa.EvaluationsUsed != pb.EvaluationsUsed || pa.DrawsSent != pb.DrawsSent {
		t.Fatalf("%s: steps %d evaluations %d draws %d, want %d %d %d", what, pb.Steps, pb.EvaluationsUsed, pb.DrawsSent,
			pa.Steps, pa.EvaluationsUsed, pa.DrawsSent)
	}
	for i, p := range fb.Parameters {
		q := fa.Parameters[i]
		if p.Count != q.Count || math.Float64bits(p.Mean) != math.Float64bits(q.Mean) || math.Float64bits(p.SD) != math.Float64bits(q.SD) {
			t.Fatalf("%s: summary %+v, want %+v", what, p, q)
		}
	}
	// The diagnostics rest on the same draws and gradients: the Stein
	// discrepancy, the curvature certificates and the chains' agreement.
	if !sameBits([]float64{pa.KSD, pa.Curvature.SmoothnessAtLeast, pa.Curvature.StrongConvexityAtMost},
		[]float64{pb.KSD, pb.Curvature.SmoothnessAtLeast, pb.Curvature.StrongConvexityAtMost}) || pa.Curvature.Pairs != pb.Curvature.Pairs {
		t.Fatalf("%s: KSD %v curvature %+v, want %v %+v", what, pb.KSD, pb.Curvature, pa.KSD, pa.Curvature)
	}
	for i, p := range pb.Parameters {
		q := pa.Parameters[i]
		if !sameBits([]float64{p.Mean, p.SD, p.Rhat, p.BulkESS, p.TailESS}, []float64{q.Mean, q.SD, q.Rhat, q.BulkESS, q.TailESS}) {
			t.Fatalf("%s: diagnostics %+v, want %+v", what, p, q)
		}
	}
}

// The same seed and the same answers give the same draws, bit for bit,
// with the chains stepped in 1, 2, 3 or 7 groups, answered in order, last
// first or shuffled, sent whole or split into parts, with draws sent by
// reference or in full; the budget ends the session at the same step, and
// the groups do pipeline (several requests are out at once).
func TestChainGroupsGiveTheSameDraws(t *testing.T) {
	for _, kernel := range []string{"lmc", "kinetic"} {
		for _, c := range []struct {
			name   string
			modify func(*Spec)
		}{
			{"draws", func(s *Spec) {}},
			{"budget", func(s *Spec) { s.DrawsPerChain, s.MaxEvaluations = 0, 7*37+4 }},
			{"split", func(s *Spec) { s.MaxMessageBytes = 1024 + 2*(8*4+16) }},
			{"full draws", func(s *Spec) { s.DrawReferences = false }},
			{"carried", func(s *Spec) { s.DrawsInPoints = true }},
			{"carried in full", func(s *Spec) { s.DrawsInPoints, s.DrawReferences = true, false }},
			{"carried, split", func(s *Spec) { s.DrawsInPoints, s.MaxMessageBytes = true, 1024+2*(8*4+16) }},
		} {
			spec := Spec{Dim: 3, Chains: 7, Kernel: kernel, Start: []float64{1, -1, 0.5}, StartRows: 1, Step: 0.1, Seed: 21,
				BurnIn: 6, KeepEvery: 2, DrawsPerChain: 25, DrawReferences: true, ProgressEverySteps: 5, ChainGroups: 1}
			c.modify(&spec)
			lim := Limits{DiagnosticsShare: -1}
			want := runGroups(t, spec, lim, 0, nil)
			if want.mostPending != 1 && !strings.Contains(c.name, "split") {
				t.Fatalf("%s %s: one group had %d requests out at once", kernel, c.name, want.mostPending)
			}
			// Kept draws every other step after 6 of burn-in: 25 kept
			// steps, all but the last carried in lock step (the last go
			// out with Finished); none where the draws do not fit beside
			// the points.
			if wantCarried := map[string]int{"carried": 24, "carried in full": 24}[c.name]; want.carried != wantCarried {
				t.Fatalf("%s %s: %d Draws frames carried in Points frames, want %d", kernel, c.name, want.carried, wantCarried)
			}
			for _, g := range []int{2, 3, 7} {
				for _, shuffle := range []uint64{0, 5} {
					spec.ChainGroups = g
					got := runGroups(t, spec, lim, shuffle, nil)
					what := fmt.Sprintf("%s %s, %d groups, shuffle %d", kernel, c.name, g, shuffle)
					sameRun(t, what, want, got)
					if got.mostPending < 2 {
						t.Fatalf("%s: at most %d request out at once: the groups did not pipeline", what, got.mostPending)
					}
				}
			}
			if c.name == "budget" && want.finished.Reason != BudgetSpent {
				t.Fatalf("budget run finished %v", want.finished.Reason)
			}
		}
	}
}

// A session stepping its chains in groups checkpoints at completed steps
// of every chain; restored from any checkpoint, with or without groups,
// it continues with the draws of the run that never stopped.
func TestChainGroupsCheckpointAndResume(t *testing.T) {
	lim := Limits{FollowBuffer: 1 << 12, DiagnosticsShare: -1}
	spec := Spec{Dim: 2, Chains: 5, Kernel: "lmc", Start: []float64{0.5, -0.5}, StartRows: 1, Step: 0.2, Seed: 99,
		BurnIn: 3, DrawsPerChain: 30, CheckpointEverySteps: 4, ChainGroups: 2}
	var cps []Checkpoint
	full := runGroups(t, spec, lim, 3, func(s *Session) {
		s.SetCheckpoints(Checkpoints{Save: func(c Checkpoint) { cps = append(cps, c) }})
	})
	if full.err != nil || len(cps) < 5 {
		t.Fatalf("run: %v, %d checkpoints", full.err, len(cps))
	}
	var want []float64
	for _, d := range full.draws {
		want = append(want, d.Values...)
	}
	for _, k := range []int{1, 3, len(cps) - 2} {
		if cps[k].State == nil {
			t.Fatalf("checkpoint %d not encoded", k)
		}
		for _, groups := range []int{2, 1} {
			s, err := Restore(cps[k].State, lim)
			if err != nil {
				t.Fatalf("restore %d: %v", k, err)
			}
			s.spec.ChainGroups = groups
			from := s.seq
			if err := s.ResumeAt(from); err != nil {
				t.Fatal(err)
			}
			tr, _, err := drive(t, s, exactGaussian(1.5))
			if err != nil {
				t.Fatalf("resumed from checkpoint %d: %v", k, err)
			}
			got, end := flatten(t, from, tr.draws)
			if int(end)*2 != len(want) || !sameBits(got, want[int(from)*2:]) {
				t.Fatalf("checkpoint %d (step %d), %d groups: the resumed draws differ from the uninterrupted run", k, cps[k].Steps, groups)
			}
		}
	}
}

// The automatic choice's second look (groups.review), on synthetic
// times: after 16 lock-step steps of 1 ms (wait 0.8, work 0.2) and 16
// whole steps in groups, it goes back to lock step when a step in groups
// took 2 ms (a client whose cost per request does not shrink with its
// rows pays it once per group), and stays in groups at 0.6 ms; it looks
// once, and not before it has timed both.
func TestGroupsReviewTheirChoice(t *testing.T) {
	for _, c := range []struct {
		grouped time.Duration
		back    bool
	}{{2 * time.Millisecond, true}, {600 * time.Microsecond, false}, {1090 * time.Microsecond, false}} {
		var g groups
		g.wait, g.work, g.timed = 16*800*time.Microsecond, 16*200*time.Microsecond, 16
		t0 := time.Unix(0, 0)
		var back bool
		for i := 0; i <= groupedReviewSteps; i++ {
			if i < groupedReviewSteps && g.judged {
				t.Fatalf("reviewed after %d steps", i)
			}
			back = g.review(t0.Add(time.Duration(i) * c.grouped))
		}
		if back != c.back || !g.judged {
			t.Fatalf("grouped step %v against lock step 1 ms: back %v (judged %v), want %v", c.grouped, back, g.judged, c.back)
		}
		if g.review(t0.Add(time.Hour)) {
			t.Fatal("reviewed twice")
		}
	}
	var g groups // no lock-step timing: no review
	for i := 0; i <= 2*groupedReviewSteps; i++ {
		if g.review(time.Unix(int64(i), 0)) || g.judged {
			t.Fatal("reviewed without lock-step timing")
		}
	}
}
