package session

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"slices"
	"sync"
	"testing"
	"time"
)

// simWorker is an attached evaluator in the test's own goroutine: it
// answers ∇log π for N(0, I/λ) after sleeping perRow per row (its
// simulated speed). After leaveAfter answers (0: never) it takes one more
// frame, leaves without answering it, and its supervisor attaches a
// fresh worker in its place. A hung worker takes frames and never
// answers.
type simWorker struct {
	name       string
	perRow     time.Duration
	leaveAfter int
	hung       bool
}

// pointsCopy is the part of a Points frame a worker keeps.
type pointsCopy struct {
	req        uint64
	first, dim int
	points     []float64
}

// runWorker attaches w to s and serves it until the session ends; when w
// leaves, it attaches a replacement (bounded by replacements). It returns
// when the session is over.
func runWorker(t *testing.T, s *Session, w simWorker, replacements int, wg *sync.WaitGroup) {
	t.Helper()
	ch := make(chan pointsCopy, 4096)
	wk, err := s.Attach(w.name, func(p *Points) error {
		ch <- pointsCopy{req: p.RequestID, first: p.FirstRow, dim: p.Dim, points: slices.Clone(p.Points)}
		return nil
	})
	if err != nil {
		if !errors.Is(err, ErrSessionOver) {
			t.Errorf("Attach: %v", err)
		}
		return
	}
	wg.Add(1)
	go func() {
		defer wg.Done()
		answered := 0
		for {
			var p pointsCopy
			select {
			case p = <-ch:
			case <-wk.Done():
				return
			}
			if w.hung {
				continue
			}
			if w.leaveAfter > 0 && answered == w.leaveAfter {
				wk.Leave(io.EOF)
				if replacements > 0 {
					runWorker(t, s, w, replacements-1, wg)
				}
				return
			}
			rows := len(p.points) / p.dim
			time.Sleep(time.Duration(rows) * w.perRow)
			g := make([]float64, len(p.points))
			for i, x := range p.points {
				g[i] = -x
			}
			if !wk.Answer(&Evaluations{RequestID: p.req, FirstRow: p.first, Rows: rows, Dim: p.dim, Grad: g}) {
				return
			}
			answered++
		}
	}()
}

// poolRun runs spec with the given workers attached before Run; the
// owner evaluates unless spec.WorkersOnly. It returns the owner's
// transcript and the final progress.
func poolRun(t *testing.T, spec Spec, lim Limits, workers []simWorker, replacements int) (*transcript, Result) {
	t.Helper()
	s := mustNew(t, spec, lim)
	var wg sync.WaitGroup
	for _, w := range workers {
		runWorker(t, s, w, replacements, &wg)
	}
	tr, res, err := drive(t, s, gaussian(1))
	wg.Wait()
	if err != nil {
		t.Fatalf("Run: %v", err)
	}
	return tr, res
}

func poolSpec() Spec {
	spec := baseSpec()
	spec.Chains, spec.Dim, spec.Start = 24, 3, []float64{1, -1, 0.5}
	spec.BurnIn, spec.DrawsPerChain = 5, 30
	return spec
}

// drawValues concatenates the transcript's draws, checking that their
// sequence numbers run without gap or duplicate.
func drawValues(t *testing.T, tr *transcript, want int) []float64 {
	t.Helper()
	var v []float64
	var seq uint64
	for _, d := range tr.draws {
		if d.Seq != seq {
			t.Fatalf("draws frame seq %d, want %d: a gap or a duplicate", d.Seq, seq)
		}
		seq += uint64(d.Rows)
		v = append(v, d.Values...)
	}
	if int(seq) != want {
		t.Fatalf("%d draws, want %d", seq, want)
	}
	return v
}

// mustSameBits fails the test unless a and b hold the same float64 bits.
func mustSameBits(t *testing.T, what string, a, b []float64) {
	t.Helper()
	if len(a) != len(b) {
		t.Fatalf("%s: %d values vs %d", what, len(a), len(b))
	}
	for i := range a {
		if math.Float64bits(a[i]) != math.Float64bits(b[i]) {
			t.Fatalf("%s: value %d differs: %v vs %v", what, i, a[i], b[i])
		}
	}
}

// The kernel draws the noise and sees one complete answer per request,
// so the draws of a pool of 1, 3 or 8 workers of different speeds (with
// and without the owner evaluating) equal, bit for bit, those of one
// client answering everything.
func TestPoolDrawsEqualOneClientBitForBit(t *testing.T) {
	spec := poolSpec()
	want := spec.Chains * int(spec.DrawsPerChain)
	one, _, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	ref := drawValues(t, one, want)
	speeds := []time.Duration{0, 200 * time.Microsecond, 50 * time.Microsecond, time.Millisecond}
	for _, n := range []int{1, 3, 8} {
		for _, ownerToo := range []bool{false, true} {
			var ws []simWorker
			for i := range n {
				ws = append(ws, simWorker{name: "w", perRow: speeds[i%len(speeds)]})
			}
			sp := spec
			sp.WorkersOnly = !ownerToo
			tr, res := poolRun(t, sp, Limits{}, ws, 0)
			mustSameBits(t, "pool", ref, drawValues(t, tr, want))
			p := res.Finished.Progress.Pool
			wantLive := n
			if ownerToo {
				wantLive++
			}
			if len(p.Workers) != wantLive {
				t.Fatalf("%d workers, owner %v: the report lists %d evaluators, want %d", n, ownerToo, len(p.Workers), wantLive)
			}
			var rows int64
			for _, w := range p.Workers {
				rows += w.Rows
			}
			if used := res.Finished.Progress.EvaluationsUsed; rows != used {
				t.Fatalf("%d workers: rows answered first %d, evaluations used %d: every row is kept exactly once", n, rows, used)
			}
		}
	}
}

// Workers that leave in the middle of a request, every few answers, and
// are replaced by new ones: their rows are reissued, nothing is lost or
// duplicated, and the draws are those of one client.
func TestPoolWorkersLeavingMidRunLoseNothing(t *testing.T) {
	spec := poolSpec()
	want := spec.Chains * int(spec.DrawsPerChain)
	one, _, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	spec.WorkersOnly = true
	ws := []simWorker{{name: "a", leaveAfter: 7}, {name: "b", perRow: 100 * time.Microsecond}, {name: "c", leaveAfter: 11}}
	tr, res := poolRun(t, spec, Limits{}, ws, 1000)
	mustSameBits(t, "leaving workers", drawValues(t, one, want), drawValues(t, tr, want))
	if res.Finished.Progress.Pool.RowsReissued == 0 {
		t.Fatal("no row was reissued, though workers left holding rows")
	}
}

// A worker that takes rows and never answers falls past its deadline
// (speed measured from the others, floor kept short here): its rows go
// to the others, and the draws are those of one client.
func TestPoolHungWorkerRowsReissued(t *testing.T) {
	spec := poolSpec()
	spec.DrawsPerChain = 10
	want := spec.Chains * int(spec.DrawsPerChain)
	one, _, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	spec.WorkersOnly = true
	lim := Limits{Pool: PoolOptions{Floor: time.Millisecond}}
	ws := []simWorker{{name: "fast"}, {name: "stuck", hung: true}, {name: "steady", perRow: 50 * time.Microsecond}}
	tr, res := poolRun(t, spec, lim, ws, 0)
	mustSameBits(t, "hung worker", drawValues(t, one, want), drawValues(t, tr, want))
	p := res.Finished.Progress.Pool
	if p.RowsReissued == 0 {
		t.Fatal("no row was reissued, though one worker never answered")
	}
	for _, w := range p.Workers {
		if w.Name == "stuck" && w.Rows != 0 {
			t.Fatalf("the hung worker is credited with %d rows", w.Rows)
		}
	}
}

// Late answers (a part another evaluator answered first) are dropped and
// counted; an answer to a part never sent to a worker ends that worker
// with an error naming the field, and the session goes on.
func TestPoolForeignAnswerEndsOnlyThatWorker(t *testing.T) {
	spec := poolSpec()
	spec.DrawsPerChain = 5
	s := mustNew(t, spec, Limits{})
	wk, err := s.Attach("rogue", func(*Points) error { return nil })
	if err != nil {
		t.Fatal(err)
	}
	go wk.Answer(&Evaluations{RequestID: 99, FirstRow: 0, Rows: 1, Dim: spec.Dim, Grad: make([]float64, spec.Dim)})
	tr, res, err := drive(t, s, gaussian(1))
	if err != nil {
		t.Fatalf("Run: %v", err)
	}
	drawValues(t, tr, spec.Chains*int(spec.DrawsPerChain))
	<-wk.Done()
	e, ok := AsError(wk.Err())
	if !ok || e.Field != "evaluations.request_id" {
		t.Fatalf("rogue worker ended with %v, want an error naming evaluations.request_id", wk.Err())
	}
	if res.Finished.Reason != DrawsCollected {
		t.Fatalf("reason %v", res.Finished.Reason)
	}
	if _, err := s.Attach("late", func(*Points) error { return nil }); !errors.Is(err, ErrSessionOver) {
		t.Fatalf("Attach after the end: %v, want ErrSessionOver", err)
	}
}

// With owner_evaluates false and no worker the rows wait; a worker
// attaching later takes them.
func TestPoolRowsWaitForAWorker(t *testing.T) {
	spec := poolSpec()
	spec.WorkersOnly = true
	spec.DrawsPerChain = 5
	s := mustNew(t, spec, Limits{})
	var wg sync.WaitGroup
	in := make(chan Message, 16)
	done := make(chan struct{})
	var tr transcript
	send := func(f Frame) error {
		switch f := f.(type) {
		case *Points:
			t.Errorf("the owner got a Points frame though it only consumes")
		case *Registered:
			go func() { runWorker(t, s, simWorker{name: "late"}, 0, &wg); close(done) }()
		case *Draws:
			c := *f
			c.Values = slices.Clone(f.Values)
			tr.draws = append(tr.draws, c)
		}
		return nil
	}
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	if _, err := s.Run(ctx, in, send); err != nil {
		t.Fatal(err)
	}
	<-done
	wg.Wait()
	drawValues(t, &tr, spec.Chains*int(spec.DrawsPerChain))
}

// The split follows the speeds by largest remainder (arithmetic checked
// by hand).
func TestSplitProportional(t *testing.T) {
	cases := []struct {
		rows   int
		speeds []float64
		want   []int
	}{
		{64, []float64{1}, []int{64}},
		{64, []float64{1, 1, 1, 1, 1, 1, 1, 1}, []int{8, 8, 8, 8, 8, 8, 8, 8}},
		{10, []float64{1, 1, 1}, []int{4, 3, 3}},
		{64, []float64{10, 10, 10, 10, 10, 10, 10, 1}, []int{9, 9, 9, 9, 9, 9, 9, 1}},
		{3, []float64{1, 100}, []int{0, 3}},
	}
	for _, c := range cases {
		got := split(c.rows, c.speeds)
		if !slices.Equal(got, c.want) {
			t.Errorf("split(%d, %v) = %v, want %v", c.rows, c.speeds, got, c.want)
		}
	}
}

// A worker whose stream closes while the engine is handing it a
// request's parts (its send fails on the second part of a request): the
// parts already sent and the ones not yet sent all go to the others, so
// the session neither loses rows nor waits for its answer timeout. The
// worker's parts of each later request it would have got are dealt the
// same way; the draws are those of one client.
func TestPoolSendFailsInTheMiddleOfAssign(t *testing.T) {
	spec := poolSpec()
	spec.DrawsPerChain = 5
	want := spec.Chains * int(spec.DrawsPerChain)
	one, _, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	spec.WorkersOnly = true
	// An answer timeout a healthy pool never needs: if a part were
	// orphaned, the run would end FAILED naming it instead of hanging.
	s := mustNew(t, spec, Limits{AnswerTimeout: time.Minute})
	var wg sync.WaitGroup
	runWorker(t, s, simWorker{name: "steady", perRow: 50 * time.Microsecond}, 0, &wg)
	for i := range 3 {
		var mu sync.Mutex
		sends := 0
		// This worker takes one frame of its first request and then its
		// stream is gone: every later send fails.
		_, err := s.Attach(fmt.Sprintf("flaky-%d", i), func(*Points) error {
			mu.Lock()
			defer mu.Unlock()
			sends++
			if sends > 1 {
				return errors.New("stream closed")
			}
			return nil
		})
		if err != nil {
			t.Fatal(err)
		}
	}
	tr, res, err := drive(t, s, gaussian(1))
	wg.Wait()
	if err != nil {
		t.Fatalf("Run: %v", err)
	}
	if res.Finished.Reason != DrawsCollected {
		t.Fatalf("reason %v (%s)", res.Finished.Reason, res.Finished.Message)
	}
	mustSameBits(t, "send failing mid-assign", drawValues(t, one, want), drawValues(t, tr, want))
}
