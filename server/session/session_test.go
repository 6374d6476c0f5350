package session

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"strings"
	"testing"
	"time"

	"sluice/kernels"
)

// oracle answers a Points frame; it may mutate the answer to inject faults.
type oracle func(p *Points, ev *Evaluations)

// gaussian answers ∇log π for π = N(0, I/λ): −λx.
func gaussian(lambda float64) oracle {
	return func(p *Points, ev *Evaluations) {
		ev.Grad = make([]float64, len(p.Points))
		for i, x := range p.Points {
			ev.Grad[i] = -lambda * x
		}
	}
}

// transcript records what a session sent.
type transcript struct {
	registered *Registered
	points     int // Points frames
	rows       int // rows asked for
	draws      []Draws
	progress   []Progress
	finished   *Finished
}

// drive runs s against an in-process client that answers with o and
// returns what was sent and Run's result. The client answers inside send,
// so the engine's channel must hold a whole request's parts.
func drive(t *testing.T, s *Session, o oracle) (*transcript, Result, error) {
	t.Helper()
	in := make(chan Message, 4096)
	tr := &transcript{}
	send := func(f Frame) error {
		switch f := f.(type) {
		case *Registered:
			c := *f
			tr.registered = &c
		case *Points:
			tr.points++
			tr.rows += f.Rows
			ev := &Evaluations{RequestID: f.RequestID, FirstRow: f.FirstRow, Rows: f.Rows, Dim: f.Dim}
			o(f, ev)
			if ev.RequestID != 0 || ev.Rows != 0 {
				in <- Message{Evaluations: ev}
			}
		case *Draws:
			c := *f
			c.Values = append([]float64(nil), f.Values...)
			c.Chains = append([]int(nil), f.Chains...)
			c.Iterations = append([]int64(nil), f.Iterations...)
			tr.draws = append(tr.draws, c)
		case *Progress:
			tr.progress = append(tr.progress, *f)
		case *Finished:
			c := *f
			tr.finished = &c
		}
		return nil
	}
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	res, err := s.Run(ctx, in, send)
	return tr, res, err
}

func baseSpec() Spec {
	return Spec{Dim: 2, Chains: 4, Start: []float64{0.5, -0.5}, StartRows: 1, Step: 0.1, Seed: 7}
}

func mustNew(t *testing.T, spec Spec, lim Limits) *Session {
	t.Helper()
	s, err := New("test", spec, lim)
	if err != nil {
		t.Fatalf("New: %v", err)
	}
	return s
}

// LMC evaluates one gradient per chain per step (the project's own cost
// accounting), so a
// budget of E evaluations allows ⌊E/chains⌋ steps, and the session must
// stop before a request would overshoot.
func TestEvaluationsCountedExactlyAndBudgetNeverOvershoots(t *testing.T) {
	for _, max := range []int64{400, 401, 403, 4} {
		spec := baseSpec()
		spec.MaxEvaluations = max
		tr, res, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
		if err != nil {
			t.Fatal(err)
		}
		steps := max / 4
		f := res.Finished
		if f.Reason != BudgetSpent || tr.finished == nil || tr.finished.Reason != BudgetSpent {
			t.Fatalf("max %d: reason %v, want budget spent", max, f.Reason)
		}
		if f.Progress.EvaluationsUsed != 4*steps || int64(tr.rows) != 4*steps || f.Progress.Steps != steps {
			t.Fatalf("max %d: used %d, rows asked %d, steps %d; want %d evaluations in %d steps",
				max, f.Progress.EvaluationsUsed, tr.rows, f.Progress.Steps, 4*steps, steps)
		}
		if f.Progress.EvaluationsUsed > max {
			t.Fatalf("overshot: %d > %d", f.Progress.EvaluationsUsed, max)
		}
	}
}

// Burn-in discards the first B steps; after it every K-th step is kept,
// and rows carry consecutive sequence numbers (common practice).
func TestBurnInThinningAndSequence(t *testing.T) {
	spec := baseSpec()
	spec.BurnIn, spec.KeepEvery, spec.DrawsPerChain = 10, 3, 5
	tr, res, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	if res.Finished.Reason != DrawsCollected {
		t.Fatalf("reason %v, want draws collected", res.Finished.Reason)
	}
	var seq uint64
	var iters []int64
	for _, d := range tr.draws {
		if d.Seq != seq {
			t.Fatalf("seq %d, want %d", d.Seq, seq)
		}
		seq += uint64(d.Rows)
		for r := range d.Rows {
			if d.Chains[r] != r {
				t.Fatalf("row %d from chain %d", r, d.Chains[r])
			}
		}
		iters = append(iters, d.Iterations[0])
	}
	want := []int64{13, 16, 19, 22, 25}
	if len(iters) != len(want) || seq != 20 {
		t.Fatalf("kept iterations %v (%d rows), want %v (20 rows)", iters, seq, want)
	}
	for i := range want {
		if iters[i] != want[i] {
			t.Fatalf("kept iterations %v, want %v", iters, want)
		}
	}
	if res.Finished.Progress.Steps != 25 || res.Finished.Progress.DrawsSent != 20 {
		t.Fatalf("progress %+v", res.Finished.Progress)
	}
}

// The session's draws are exactly the kernel's draws driven in-process
// with the same seed (the engine adds nothing and loses nothing).
func TestSessionDrawsEqualInProcessKernel(t *testing.T) {
	spec := baseSpec()
	spec.DrawsPerChain = 50
	tr, _, err := drive(t, mustNew(t, spec, Limits{}), gaussian(2))
	if err != nil {
		t.Fatal(err)
	}
	k := kernelsLMC(2, 4, 0.1, []float64{0.5, -0.5}, 7)
	a := kernels.NewAnswer(4, 2)
	for _, d := range tr.draws {
		req := k.Next()
		for i, x := range req.Points {
			a.Grad[i] = -2 * x
		}
		k.Tell(a)
		for i, v := range k.Positions() {
			if d.Values[i] != v {
				t.Fatalf("draw seq %d value %d: %v vs in-process %v", d.Seq, i, d.Values[i], v)
			}
		}
	}
}

// A message limit smaller than one request splits it into parts; the
// draws are the same as without splitting.
func TestSplitRequestsGiveSameDraws(t *testing.T) {
	spec := baseSpec()
	spec.Chains, spec.Dim, spec.Start = 64, 20, make([]float64, 20)
	spec.DrawsPerChain = 3
	spec.ChainGroups = 1 // one request per step: the frames counted below
	whole, _, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	spec.MaxMessageBytes = 1024 + 5*(8*21+16) // five rows per part
	split, _, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	if whole.points != 3 || split.points != 3*13 {
		t.Fatalf("Points frames: whole %d (want 3), split %d (want 39)", whole.points, split.points)
	}
	var a, b []float64
	for _, d := range whole.draws {
		a = append(a, d.Values...)
	}
	for _, d := range split.draws {
		if d.Rows > 5 {
			t.Fatalf("draws frame of %d rows exceeds the limit", d.Rows)
		}
		b = append(b, d.Values...)
	}
	if len(a) != len(b) || len(a) != 3*64*20 {
		t.Fatalf("draw counts %d vs %d", len(a), len(b))
	}
	for i := range a {
		if a[i] != b[i] {
			t.Fatalf("value %d differs: %v vs %v", i, a[i], b[i])
		}
	}
}

func TestRegistrationValidationNamesTheField(t *testing.T) {
	nan := math.NaN()
	cases := []struct {
		name  string
		edit  func(*Spec)
		field string
		kind  Kind
	}{
		{"zero dim", func(s *Spec) { s.Dim = 0 }, "register.dim", Invalid},
		{"zero chains", func(s *Spec) { s.Chains = 0 }, "register.chains", Invalid},
		{"too many chains", func(s *Spec) { s.Chains = 1 << 20 }, "register.chains", TooLarge},
		{"unknown kernel", func(s *Spec) { s.Kernel = "bogus" }, "register.kernel", Invalid},
		{"negative step", func(s *Spec) { s.Step = -0.1 }, "register.step", Invalid},
		{"zero step without automatic tuning", func(s *Spec) { s.Step, s.Kernel = 0, "ozaki" }, "register.step", Invalid},
		{"NaN step", func(s *Spec) { s.Step = nan }, "register.step", Invalid},
		{"start rows", func(s *Spec) { s.StartRows = 3 }, "register.start_rows", Invalid},
		{"start length", func(s *Spec) { s.Start = []float64{1} }, "register.start", Invalid},
		{"start NaN", func(s *Spec) { s.Start = []float64{0, nan} }, "register.start", Invalid},
		{"negative burn-in", func(s *Spec) { s.BurnIn = -1 }, "register.burn_in", Invalid},
		{"negative budget", func(s *Spec) { s.MaxEvaluations = -5 }, "register.max_evaluations", Invalid},
		{"negative time", func(s *Spec) { s.MaxTime = -time.Second }, "register.max_seconds", Invalid},
		{"names count", func(s *Spec) { s.Names = []string{"a"} }, "register.names", Invalid},
		{"names repeated", func(s *Spec) { s.Names = []string{"a", "a"} }, "register.names", Invalid},
		{"huge dim for message", func(s *Spec) { s.Dim, s.Start, s.MaxMessageBytes = 1000, make([]float64, 1000), 4000 }, "register.dim", TooLarge},
	}
	for _, tc := range cases {
		spec := baseSpec()
		tc.edit(&spec)
		_, err := New("x", spec, Limits{MaxChains: 1000})
		e, ok := AsError(err)
		if !ok || e.Field != tc.field || e.Kind != tc.kind {
			t.Errorf("%s: got %v, want %s error on %s", tc.name, err, tc.kind, tc.field)
		}
	}
	spec := baseSpec()
	spec.Start = []float64{0, 0, 0, 0, 0, 0, 0, math.Inf(1)}
	spec.StartRows = 4
	_, err := New("x", spec, Limits{})
	if e, _ := AsError(err); e == nil || e.Chain != 3 || e.Coord != 1 {
		t.Errorf("start Inf: got %v, want chain 3 coordinate 1", err)
	}
}

func TestBadAnswersFailTheSessionNamingTheField(t *testing.T) {
	cases := []struct {
		name         string
		o            oracle
		field        string
		chain, coord int
	}{
		{"NaN gradient", func(p *Points, ev *Evaluations) {
			gaussian(1)(p, ev)
			ev.Grad[2*2+1] = math.NaN()
		}, "evaluations.gradients", 2, 1},
		{"Inf gradient", func(p *Points, ev *Evaluations) {
			gaussian(1)(p, ev)
			ev.Grad[0] = math.Inf(-1)
		}, "evaluations.gradients", 0, 0},
		{"wrong dim", func(p *Points, ev *Evaluations) { gaussian(1)(p, ev); ev.Dim = 3 }, "evaluations.dim", -1, -1},
		{"short gradients", func(p *Points, ev *Evaluations) { gaussian(1)(p, ev); ev.Grad = ev.Grad[:5] }, "evaluations.gradients", -1, -1},
		{"stale request id", func(p *Points, ev *Evaluations) {
			gaussian(1)(p, ev)
			if p.RequestID == 3 {
				ev.RequestID = 2
			}
		}, "evaluations.request_id", -1, -1},
		{"wrong rows", func(p *Points, ev *Evaluations) { gaussian(1)(p, ev); ev.Rows = 1 }, "evaluations.rows", -1, -1},
		{"bad first row", func(p *Points, ev *Evaluations) { gaussian(1)(p, ev); ev.FirstRow = 1 }, "evaluations.first_row", -1, -1},
		{"unasked log density", func(p *Points, ev *Evaluations) { gaussian(1)(p, ev); ev.LogDensity = []float64{1, 2, 3, 4} }, "evaluations.log_densities", -1, -1},
	}
	for _, tc := range cases {
		spec := baseSpec()
		spec.DrawsPerChain = 10
		tr, res, err := drive(t, mustNew(t, spec, Limits{}), tc.o)
		e, ok := AsError(err)
		if !ok || e.Field != tc.field || e.Kind != Invalid || e.Chain != tc.chain || e.Coord != tc.coord {
			t.Errorf("%s: got %v, want invalid %s at chain %d coord %d", tc.name, err, tc.field, tc.chain, tc.coord)
			continue
		}
		if res.Finished.Reason != Failed || tr.finished == nil || !strings.Contains(tr.finished.Message, tc.field) {
			t.Errorf("%s: finished frame %+v", tc.name, tr.finished)
		}
	}
}

func TestDuplicatePartAnswerRejected(t *testing.T) {
	spec := baseSpec()
	spec.DrawsPerChain = 2
	in := make(chan Message, 8)
	send := func(f Frame) error {
		if p, ok := f.(*Points); ok {
			ev := &Evaluations{RequestID: p.RequestID, Rows: p.Rows, Dim: p.Dim, Grad: make([]float64, len(p.Points))}
			in <- Message{Evaluations: ev}
			in <- Message{Evaluations: ev}
		}
		return nil
	}
	s := mustNew(t, spec, Limits{})
	_, err := s.Run(context.Background(), in, send)
	if e, ok := AsError(err); !ok || e.Field != "evaluations.request_id" {
		// The duplicate answers request 1 while request 2 is current.
		t.Fatalf("got %v, want a request_id error", err)
	}
}

func TestWallTimeLimitEndsWithTimeSpent(t *testing.T) {
	spec := baseSpec()
	spec.MaxTime = 150 * time.Millisecond
	slow := func(p *Points, ev *Evaluations) { time.Sleep(20 * time.Millisecond); gaussian(1)(p, ev) }
	start := time.Now()
	_, res, err := drive(t, mustNew(t, spec, Limits{}), slow)
	if err != nil || res.Finished.Reason != TimeSpent {
		t.Fatalf("reason %v, err %v; want time spent", res.Finished.Reason, err)
	}
	if el := time.Since(start); el > 2*time.Minute { // a hang, not a speed check
		t.Fatalf("took %v for a 150 ms limit", el)
	}
}

func TestSilentClientTimesOut(t *testing.T) {
	spec := baseSpec()
	silent := func(p *Points, ev *Evaluations) { *ev = Evaluations{} }
	_, res, err := drive(t, mustNew(t, spec, Limits{AnswerTimeout: 50 * time.Millisecond}), silent)
	if e, ok := AsError(err); !ok || e.Kind != Timeout || res.Finished.Reason != Failed {
		t.Fatalf("got %v (%v), want a timeout", err, res.Finished.Reason)
	}
}

func TestStopAndClientGone(t *testing.T) {
	spec := baseSpec()
	in := make(chan Message, 1)
	in <- Message{Stop: true, StopReason: "enough"}
	res, err := mustNew(t, spec, Limits{}).Run(context.Background(), in, func(Frame) error { return nil })
	if err != nil || res.Finished.Reason != Stopped {
		t.Fatalf("stop: reason %v err %v", res.Finished.Reason, err)
	}
	in <- Message{Err: errors.New("connection reset")}
	if _, err := mustNew(t, spec, Limits{}).Run(context.Background(), in, func(Frame) error { return nil }); !errors.Is(err, ErrClientGone) {
		t.Fatalf("broken stream: %v, want ErrClientGone", err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := mustNew(t, spec, Limits{}).Run(ctx, make(chan Message), func(Frame) error { return nil }); !errors.Is(err, ErrClientGone) {
		t.Fatalf("cancelled: %v, want ErrClientGone", err)
	}
}

func TestProgressCadenceAndContents(t *testing.T) {
	spec := baseSpec()
	spec.ProgressEverySteps, spec.MaxEvaluations, spec.BurnIn = 10, 200, 20
	tr, _, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	if len(tr.progress) != 5 {
		t.Fatalf("%d progress frames for 50 steps every 10, want 5", len(tr.progress))
	}
	p := tr.progress[1]
	if p.Steps != 20 || p.EvaluationsUsed != 80 || p.EvaluationsLeft != 120 || p.State != Sampling || p.TimeLeft != -1 {
		t.Fatalf("progress at step 20: %+v", p)
	}
	if tr.progress[0].State != BurnIn {
		t.Fatalf("state at step 10: %v, want burn-in", tr.progress[0].State)
	}
	if tr.progress[4].DrawsSent != 30*4 {
		t.Fatalf("draws sent %d, want 120", tr.progress[4].DrawsSent)
	}
}

// The summary's mean and sd are the sample moments of the kept draws.
func TestSummaryMatchesDraws(t *testing.T) {
	spec := baseSpec()
	spec.DrawsPerChain = 200
	spec.Names = []string{"a", "b"}
	tr, res, err := drive(t, mustNew(t, spec, Limits{}), gaussian(1))
	if err != nil {
		t.Fatal(err)
	}
	var s, s2 [2]float64
	var n float64
	for _, d := range tr.draws {
		for r := range d.Rows {
			for i := range 2 {
				v := d.Values[r*2+i]
				s[i] += v
				s2[i] += v * v
			}
			n++
		}
	}
	for i, p := range res.Finished.Parameters {
		mean := s[i] / n
		sd := math.Sqrt((s2[i] - n*mean*mean) / (n - 1))
		if p.Name != spec.Names[i] || p.Count != 800 || math.Abs(p.Mean-mean) > 1e-12 || math.Abs(p.SD-sd) > 1e-9 {
			t.Fatalf("summary %+v, want mean %v sd %v count 800", p, mean, sd)
		}
	}
}

// The running per-coordinate mean and sum of squared deviations that the
// final summaries report are, bit for bit, those of the definition
// evaluated one chain at a time (reference: the step's mean, its squared
// deviations, then the pairwise update of Chan, Golub & LeVeque 1979,
// written out below), for numbers of chains on either side of a multiple
// of four.
func TestAccumulateIsTheDefinition(t *testing.T) {
	r := rand.New(rand.NewPCG(8, 9))
	for _, chains := range []int{1, 2, 3, 4, 5, 7, 8, 9, 64} {
		for _, dim := range []int{1, 3, 10} {
			s := &Session{mean: make([]float64, dim), m2: make([]float64, dim)}
			mean, m2, count := make([]float64, dim), make([]float64, dim), 0.0
			for range 20 {
				x := make([]float64, chains*dim)
				for i := range x {
					x[i] = 1e3 + r.NormFloat64()*r.Float64()
				}
				s.accumulate(x, dim, chains)
				sm, s2 := make([]float64, dim), make([]float64, dim)
				for c := range chains {
					for i := range dim {
						sm[i] += x[c*dim+i]
					}
				}
				for i := range sm {
					sm[i] *= 1 / float64(chains)
				}
				for c := range chains {
					for i := range dim {
						d := x[c*dim+i] - sm[i]
						s2[i] += d * d
					}
				}
				n := count + float64(chains)
				for i := range sm {
					d := sm[i] - mean[i]
					mean[i] += d * (float64(chains) / n)
					m2[i] += s2[i] + d*d*(count*float64(chains)/n)
				}
				count = n
			}
			for i := range dim {
				if s.mean[i] != mean[i] || s.m2[i] != m2[i] || s.count != int64(count) {
					t.Fatalf("%d chains, dim %d, coordinate %d: mean %v, m2 %v; want %v, %v", chains, dim, i, s.mean[i], s.m2[i], mean[i], m2[i])
				}
			}
		}
	}
}
