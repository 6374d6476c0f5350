package session

import (
	"context"
	"testing"
	"time"

	"sluice/kernels"
)

// TestStepAllocatesNothing drives a sampling session's steps through the
// engine's own loop (shouldStop, next, overBudget, request, await,
// complete, and the previous step's draws sent by reference or in full)
// with an in-process client that answers inside send into reused buffers,
// and counts heap allocations per step once warm. Progress reports are
// kept out of the measured steps (an interval of an hour): they compute
// diagnostics, a per-report cost. A regression that allocates per step
// (a frame, a slice, a boxed value) fails here.
func TestStepAllocatesNothing(t *testing.T) {
	if raceEnabled {
		t.Skip("allocation counts are taken without the race detector, whose instrumentation allocates (scripts/go-tests runs this test in a plain run)")
	}
	for _, c := range []struct {
		kernel            string
		dim               int
		references, carry bool
	}{{"lmc", 10, true, false}, {"lmc", 10, false, false}, {"lmc", 10, true, true}, {"kinetic", 100, true, true}, {"mala", 10, true, true}} {
		spec := Spec{Dim: c.dim, Chains: 8, Kernel: c.kernel, Start: make([]float64, c.dim), StartRows: 1, Step: 0.05, Seed: 7,
			ProgressInterval: time.Hour, DrawReferences: c.references, DrawsInPoints: c.carry}
		s, err := New("alloc", spec, Limits{})
		if err != nil {
			t.Fatal(err)
		}
		in := make(chan Message, 16)
		ev := &Evaluations{}
		var grad, logd []float64
		send := func(f Frame) error {
			p, ok := f.(*Points)
			if !ok {
				return nil
			}
			// N(0, I): ∇log π(x) = −x, log π(x) = −|x|²/2.
			grad, logd = grad[:0], logd[:0]
			for r := range p.Rows {
				var sq float64
				for _, x := range p.Points[r*p.Dim : (r+1)*p.Dim] {
					grad = append(grad, -x)
					sq += x * x
				}
				logd = append(logd, -sq/2)
			}
			*ev = Evaluations{RequestID: p.RequestID, FirstRow: p.FirstRow, Rows: p.Rows, Dim: p.Dim, Grad: grad}
			if p.Need.Has(kernels.NeedLogDensity) {
				ev.LogDensity = logd
			}
			in <- Message{Evaluations: ev}
			return nil
		}
		// The cadence of judgements with no target counts wall time too
		// (paidFor): frozen here, so that a slow machine cannot start a
		// judgement inside a measured step.
		frozen := time.Now()
		s.judgeClock = func() time.Time { return frozen }
		r := s.begin(context.Background(), in, send)
		step := func() {
			if _, stop := s.shouldStop(r); stop {
				t.Fatal("session stopped")
			}
			req := s.next()
			if _, stop := s.overBudget(req); stop {
				t.Fatal("over budget")
			}
			if err := s.request(r, req); err != nil {
				t.Fatal(err)
			}
			if o, stop := s.await(r, req); stop {
				t.Fatalf("await: %v", o.msg)
			}
			if err := s.complete(r, req); err != nil {
				t.Fatal(err)
			}
		}
		for range 500 { // warm: buffers reach their sizes
			step()
		}
		// The figures the verdict rests on are judged on a cadence that
		// thins out (judgeCadence): that work allocates, and is not a
		// step's. Measure the steps in between.
		var measured, grown, lastGrown int
		var lastGot float64
		for range 500 {
			k := s.kernel.Steps()
			if judgeDue(s, k) { // AllocsPerRun(1) runs two steps; a Stein assessment comes only with a judgement (stepped)
				step()
				// A judgement started here runs in the background
				// (judge.go); AllocsPerRun counts every goroutine's
				// allocations, so let it finish first.
				s.mon.settle()
				continue
			}
			ring := ringBytes(s)
			got := testing.AllocsPerRun(1, step)
			if ringBytes(s) != ring {
				continue // the follow ring doubled: amortised, not a step's
			}
			if got != 0 {
				// A reused buffer may still grow once to a size this run
				// had not needed before (amortised), and the runtime
				// itself allocates now and then (a garbage collector's
				// worker goroutine started during a step, on a loaded
				// machine); a step that allocates does so at every step,
				// or at a fixed fraction of them.
				grown++
				lastGrown, lastGot = k, got
				continue
			}
			measured++
		}
		if grown > maxAllocatingSteps {
			t.Errorf("%s, dim %d, references %v, carried %v: %d of %d steps allocated (the last, step %d, %v times); want at most %d",
				c.kernel, c.dim, c.references, c.carry, grown, grown+measured, lastGrown, lastGot, maxAllocatingSteps)
		}
		s.mon.settle()
		r.stop()
		if measured < 80 {
			t.Errorf("%s: only %d steps measured between judgements", c.kernel, measured)
		}
	}
}

// maxAllocatingSteps is how many of the measured steps may allocate: a
// buffer growing to a size not needed before, or the runtime's own
// occasional allocation (see TestStepAllocatesNothing). A step that
// allocates does so at every step, hundreds of times here.
const maxAllocatingSteps = 8

// ringBytes is what the session's follow ring holds (0 without one).
func ringBytes(s *Session) int64 {
	if s.log == nil {
		return 0
	}
	return s.log.Bytes()
}

// TestGroupStepAllocatesNothing does the same for chains stepped in two
// pipelined groups (groups.go): after one step of every chain together,
// the groups' requests, answers, Tells, completed steps and draws sent by
// reference to each group's request allocate nothing once warm.
func TestGroupStepAllocatesNothing(t *testing.T) {
	if raceEnabled {
		t.Skip("allocation counts are taken without the race detector, whose instrumentation allocates (scripts/go-tests runs this test in a plain run)")
	}
	spec := Spec{Dim: 10, Chains: 8, Kernel: "lmc", Start: make([]float64, 10), StartRows: 1, Step: 0.05, Seed: 7,
		ProgressInterval: time.Hour, DrawReferences: true, DrawsInPoints: true, ChainGroups: 2}
	s, err := New("alloc", spec, Limits{})
	if err != nil {
		t.Fatal(err)
	}
	in := make(chan Message, 16)
	// One answer buffer per request id modulo 4: two requests are out at
	// once, and each answer is read after the next one is made.
	var evs [4]Evaluations
	var grads [4][]float64
	send := func(f Frame) error {
		p, ok := f.(*Points)
		if !ok {
			return nil
		}
		i := p.RequestID % 4
		grads[i] = grads[i][:0]
		for _, x := range p.Points[:p.Rows*p.Dim] {
			grads[i] = append(grads[i], -x) // N(0, I)
		}
		evs[i] = Evaluations{RequestID: p.RequestID, FirstRow: p.FirstRow, Rows: p.Rows, Dim: p.Dim, Grad: grads[i]}
		in <- Message{Evaluations: &evs[i]}
		return nil
	}
	frozen := time.Now()
	s.judgeClock = func() time.Time { return frozen }
	r := s.begin(context.Background(), in, send)
	defer r.stop()
	req := s.next()
	if err := s.request(r, req); err != nil {
		t.Fatal(err)
	}
	if o, stop := s.await(r, req); stop {
		t.Fatalf("await: %v", o.msg)
	}
	if err := s.complete(r, req); err != nil {
		t.Fatal(err)
	}
	if s.groupsFor() != 2 {
		t.Fatalf("groupsFor %d, want 2", s.groupsFor())
	}
	if o, stop, ok := s.startGroups(r, 2); stop || !ok {
		t.Fatalf("startGroups: %v", o.msg)
	}
	step := func() {
		k := s.kernel.Steps()
		for s.kernel.Steps() == k {
			if o, stop, leave := s.groupEvent(r); stop || leave {
				t.Fatalf("group event: %v", o.msg)
			}
		}
	}
	for range 500 {
		step()
	}
	var measured, grown, lastGrown int
	var lastGot float64
	for range 500 {
		k := s.kernel.Steps()
		if judgeDue(s, k) {
			step()
			s.mon.settle() // a judgement runs in the background, and allocates
			continue
		}
		ring := ringBytes(s)
		got := testing.AllocsPerRun(1, step)
		if ringBytes(s) != ring {
			continue
		}
		if got != 0 {
			grown++
			lastGrown, lastGot = k, got
			continue
		}
		measured++
	}
	if grown > maxAllocatingSteps {
		t.Errorf("%d of %d steps allocated (the last, step %d, %v times); want at most %d", grown, grown+measured, lastGrown, lastGot, maxAllocatingSteps)
	}
	s.mon.settle()
	if measured < 80 {
		t.Errorf("only %d steps measured between judgements", measured)
	}
}

// judgeDue reports whether a judgement may start within the three steps
// after step k (stepped: the cadence, then paidFor on the windows as they
// are now, which grow by at most a step's draws meanwhile).
func judgeDue(s *Session, k int) bool {
	for j := k + 1; j <= k+3; j++ {
		if j < s.judgeNext {
			continue
		}
		if s.lim.DiagnosticsShare < 0 {
			return true
		}
		if _, ok := s.paidFor(j, j >= s.steinNext); ok {
			return true
		}
	}
	return false
}
