package session

import (
	"math"
	"math/rand/v2"
	"sync/atomic"
	"time"

	"sluice/kernels/diag"
)

// The judgement: the figures the targets and the verdict rest on (the
// summaries of the kept window, the chains' agreement, the Stein
// assessment), measured on a step-count cadence (Session.stepped) and at
// the end, never on wall time; the bootstrap's generator is seeded from
// the session's seed and the step. A judgement costs far more than a step
// (a rank-normalised summary of up to 10⁶ values, a Stein matrix over up
// to 2048 draws), so on the cadence it is pipelined: at a cadence point
// the windows are copied into reused snapshots and judged in a goroutine,
// and the figures are applied at the next cadence point, waiting for the
// goroutine if it has not finished. With a target, what is applied, and
// when, depends only on the step count, so the figures and every decision
// taken on them are the same however fast the client answers; with none,
// no decision rests on the mid-run figures, and a client slow enough to
// pay for judgements by wall time gets them sooner (paidFor). The cost
// hides behind the client's evaluations when they are slow, the case the
// service is for.

// Bootstrap sizes of the Stein test (diag.AssessStein): 199 replicates on
// the cadence (p-values in steps of 1/200, enough for a test at 5 %), 499
// at the end; the test runs on an evenly thinned subsample of at most
// about steinTestDraws of the window's draws (diag.SteinOptions
// .BootstrapDraws: the same test on a sample of the same law, so the same
// level; Chwialkowski, Strathmann and Gretton 2016, Leucht and Neumann
// 2013), which cuts the bootstrap's N²·B multiply-adds by up to 16 and
// its matrix from 32 MiB to 2 MiB; the estimate and its upper bound, on
// which a max_ksd target is judged, still use every draw of the window.
const (
	steinReplicates      = 199
	steinFinalReplicates = 499
	steinTestDraws       = 512
)

// judgement is one measurement, of the windows it points at.
type judgement struct {
	seed        uint64
	step, reps  int
	stein       bool
	hist        *diag.History
	ksd         *diag.StreamKSD
	chainSum    []float64
	chainN      int64
	names       []string
	chains, dim int
	assessed    bool // the Stein assessment ran
	steinRep    SteinReport
	lastKSD     float64
	measured    bool // the summaries ran
	params      []ParameterDiagnostics
	spread      float64
	spreadName  string
	// dropped is set when the judgement's figures will never be applied
	// (judge replaced them): it gives up at its next coordinate or row.
	dropped atomic.Bool
}

// judgeScratch is the memory, in float64 values, a judgement needs beyond
// the monitor's windows: the snapshots of the windows (the same sizes
// again) with the summaries' scratch (diag.History.Reserve), and the
// Stein assessment's standardised draws and scores, its tested matrix and
// the bootstrap's multipliers and products.
func judgeScratch(dim, chains int) float64 {
	ksdCap, _, histChains, histCap := monitorSizes(dim, chains)
	m := float64(min(ksdCap, 2*steinTestDraws))
	return 2*float64(ksdCap*dim) + float64(histChains*histCap*dim) + 11*float64(histChains*histCap) + // snapshots
		2*float64(ksdCap*dim) + m*m + 2*m*steinFinalReplicates // assessment
}

// compute measures the figures of the judgement's windows.
func (j *judgement) compute() {
	j.assessed, j.measured = false, false
	if j.stein && j.ksd.Kept() >= 2 {
		r := j.ksd.AssessUntil(j.reps, steinTestDraws, rand.New(rand.NewPCG(j.seed, uint64(j.step))), j.dropped.Load)
		j.steinRep = SteinReport{KSD: r.KSD, U2: r.U2, SE: r.SE, Upper95: r.Upper95, PValue: r.PValue, Draws: r.N, State: r.State}
		j.lastKSD = -1
		if r.State != diag.SteinUndefined {
			j.lastKSD = r.KSD
		}
		j.assessed = true
	}
	sum := j.hist.SummarizeUntil(j.dropped.Load)
	if sum == nil {
		return
	}
	j.params = j.params[:0]
	j.spread, j.spreadName = 0, ""
	for k, d := range sum {
		j.params = append(j.params, ParameterDiagnostics{Name: j.names[k], Mean: d.Mean, SD: d.SD,
			Rhat: d.Rhat.Reported, BulkESS: d.BulkESS, TailESS: d.TailESS, MCSE: d.MeanMCSE})
		if j.chains > 1 && j.chainN > 0 && d.MeanMCSE > 0 {
			lo, hi := math.Inf(1), math.Inf(-1)
			for c := range j.chains {
				v := j.chainSum[c*j.dim+k] / float64(j.chainN)
				lo, hi = math.Min(lo, v), math.Max(hi, v)
			}
			// A chain's mean has about √chains times the MCSE of the
			// pooled mean.
			if z := (hi - lo) / (d.MeanMCSE * math.Sqrt(float64(j.chains))); z > j.spread {
				j.spread, j.spreadName = z, j.names[k]
			}
		}
	}
	j.measured = true
}

// prepare points j at the step and counts the Stein kernel evaluations
// the assessment will make (each unordered pair and diagonal once, when
// draws were offered since the last count: the work the windows bound).
func (m *monitor) prepare(j *judgement, seed uint64, step int, stein bool, reps int) {
	j.seed, j.step, j.stein, j.reps = seed, step, stein, reps
	j.names, j.chains, j.dim = m.names, m.chains, m.dim
	if n := int64(m.ksd.Kept()); stein && n >= 2 {
		if seen := m.ksd.Seen(); seen != m.ksdSeen {
			m.ksdEvaluations += n * (n + 1) / 2
			m.ksdSeen = seen
		}
	}
}

// apply makes the judgement's figures the monitor's.
func (m *monitor) apply(j *judgement) {
	if j.assessed {
		r := j.steinRep
		m.stein, m.lastKSD = &r, j.lastKSD
	}
	if j.measured {
		m.params = append(m.params[:0], j.params...)
		m.spread, m.spreadName, m.measured = j.spread, j.spreadName, true
	}
}

// judge measures the figures on the live windows now, with reps
// bootstrap replicates, the Stein assessment only when stein is set. A
// pending judgement is applied first, as at a cadence point, unless this
// one replaces every figure it would set: then it is dropped without
// waiting for it (it stops at its next coordinate or row of the Stein
// matrix, with its own snapshots and results; the next start makes new
// ones), so the end does not pay for both.
func (m *monitor) judge(seed uint64, step int, stein bool, reps int) {
	if m.now == nil {
		m.now = &judgement{}
	}
	j := m.now
	m.prepare(j, seed, step, stein, reps)
	j.hist, j.ksd, j.chainSum, j.chainN = m.hist, m.ksd, m.chainSum, m.chainN
	j.compute()
	if m.done != nil && j.assessed && j.measured {
		m.bg.dropped.Store(true) // its goroutine stops at its next coordinate or row
		m.done, m.bg = nil, nil
	}
	m.collect()
	m.apply(j)
}

// start snapshots the windows at step and judges them in a goroutine;
// collect applies the figures. A pending judgement is applied first.
func (m *monitor) start(seed uint64, step int, stein bool) {
	m.collect()
	if m.bg == nil {
		m.bg = &judgement{}
	}
	if m.bg.hist == nil { // the snapshots, made once
		ksdCap, ksdChains, histChains, histCap := monitorSizes(m.dim, m.chains)
		m.bg.hist, m.bg.ksd = diag.NewDrawHistory(histChains, m.dim, histCap), diag.NewStreamKSD(diag.IMQ{}, m.dim, ksdChains, ksdCap)
		m.bg.hist.Reserve() // the summaries' scratch at once, not as the judged windows grow
		m.bg.chainSum = make([]float64, len(m.chainSum))
	}
	j := m.bg
	m.prepare(j, seed, step, stein, steinReplicates)
	j.hist.CopyFrom(m.hist)
	j.ksd.CopyFrom(m.ksd)
	copy(j.chainSum, m.chainSum)
	j.chainN = m.chainN
	done := make(chan struct{})
	m.done = done
	go func() {
		defer close(done)
		j.compute()
	}()
}

// settle waits for a pending judgement to finish, without applying it.
func (m *monitor) settle() {
	if m.done != nil {
		<-m.done
	}
}

// collect waits for a pending judgement and applies its figures.
func (m *monitor) collect() {
	if m.done == nil {
		return
	}
	<-m.done
	m.done = nil
	m.apply(m.bg)
}

// pendingState is a finished judgement not yet applied, as a checkpoint
// keeps it, so that a restored session applies it at the same step.
type pendingState struct {
	Assessed   bool
	Stein      SteinReport
	LastKSD    float64
	Measured   bool
	Params     []ParameterDiagnostics
	Spread     float64
	SpreadName string
}

// pending waits for a pending judgement and returns its figures, or nil.
func (m *monitor) pending() *pendingState {
	if m.done == nil {
		return nil
	}
	<-m.done
	j := m.bg
	return &pendingState{Assessed: j.assessed, Stein: j.steinRep, LastKSD: j.lastKSD, Measured: j.measured,
		Params: append([]ParameterDiagnostics(nil), j.params...), Spread: j.spread, SpreadName: j.spreadName}
}

// restorePending makes p the pending judgement, applied at the next
// cadence point as it would have been.
func (m *monitor) restorePending(p *pendingState) {
	if p == nil {
		return
	}
	if m.bg == nil {
		m.bg = &judgement{}
	}
	j := m.bg
	j.assessed, j.steinRep, j.lastKSD, j.measured = p.Assessed, p.Stein, p.LastKSD, p.Measured
	j.params, j.spread, j.spreadName = append(j.params[:0], p.Params...), p.Spread, p.SpreadName
	done := make(chan struct{})
	close(done)
	m.done = done
}

// The judgement's cost model, in nanoseconds of one core, measured on
// the 2-core development machine (December 2026) with the windows of the
// three shapes of `sluice bench` (8 × 10, 64 × 100, 64 × 1000; AR(0.9)
// draws; BenchmarkJudgeCostModel prints the model beside the measured
// time, within a factor of 0.7 to 1.6 there) and the bare gRPC echo of
// the same bytes (`sluice bench`: about 20–45 µs at 8 × 10, 170–300 µs at
// 64 × 100, 750–1200 µs at 64 × 1000 per round trip): the summaries cost
// about judgeValueNS per value of the kept window; the Stein assessment
// about steinPairNS + steinPairDimNS·dim per pair of the window's draws
// and steinBootNS per tested pair and bootstrap replicate; a step, with a
// gradient that costs nothing, at least stepNS plus stepValueNS per value
// sent each way. The model is a function of the windows' sizes only, so
// the cadence it sets (paidFor) depends on the step count alone.
const (
	judgeValueNS   = 150
	steinPairNS    = 10
	steinPairDimNS = 1.5
	steinBootNS    = 0.5
	stepNS         = 20000
	stepValueNS    = 10
)

// judgeWork is the model's cost of a judgement of the live windows, with
// the Stein assessment when stein, with reps replicates.
func (m *monitor) judgeWork(stein bool, reps int) float64 {
	_, ksdChains, histChains, _ := monitorSizes(m.dim, m.chains)
	var w float64
	if m.hist.Kept() >= 8 { // with fewer, Summarize returns at once
		w = judgeValueNS * float64(m.hist.Kept()) * float64(histChains*m.dim)
	}
	// The assessment needs 8 draws and 4 rounds of the chains
	// (diag.AssessStein); with fewer it returns at once.
	if n := float64(m.ksd.Kept()); stein && n >= 8 && m.ksd.Kept()/ksdChains >= 4 {
		t := min(n, steinTestDraws)
		w += (steinPairNS+steinPairDimNS*float64(m.dim))*n*(n-1)/2 + steinBootNS*t*t*float64(reps)
	}
	return w
}

// stepWork is the model's least cost of one step of the session.
func (s *Session) stepWork() float64 {
	return stepNS + stepValueNS*float64(s.spec.Chains*s.spec.Dim)
}

// judgeNow is the wall time the judgement cadence counts.
func (s *Session) judgeNow() time.Time {
	if s.judgeClock != nil {
		return s.judgeClock()
	}
	return time.Now()
}

// paidFor reports whether a judgement may start at step k of a session
// that judges in the background, and whether it takes in the Stein
// assessment (due when stein). With a target, always, as due: the
// session's stopping rests on the figures. With no target the figures
// only inform the reports and the verdict until the final judgement,
// which measures them afresh, and a judgement starts only once it is paid
// for: its modelled cost (judgeWork) is at most Limits.DiagnosticsShare
// of the steps since the latest one, counted as the larger of their least
// work by the model (stepWork) and the wall time they took. The first
// measure depends on the step count alone and bounds the judgements'
// share of a server whose client answers at once (a short session of many
// chains × dim values is then judged only at its end); the second lets a
// session whose gradients cost seconds, the case the service is for, see
// its figures at the growth cadence from its first steps, since its steps
// pay for any judgement many times over. So with no target which steps
// a mid-run judgement falls on may depend on the client's speed; the
// draws, the ending and the final figures never do. The Stein assessment
// waits when only the summaries are paid for.
func (s *Session) paidFor(k int, stein bool) (withStein, ok bool) {
	if s.spec.Wants.any() {
		return stein, true
	}
	work := float64(k-s.judgedAt) * s.stepWork()
	if !s.judgedTime.IsZero() {
		work = math.Max(work, float64(s.judgeNow().Sub(s.judgedTime).Nanoseconds()))
	}
	paid := s.lim.DiagnosticsShare * work
	if stein && s.mon.judgeWork(true, steinReplicates) <= paid {
		return true, true
	}
	return false, s.mon.judgeWork(false, 0) <= paid
}

// judgeCadence returns the steps of the next judgement and of the next
// Stein assessment after a judgement at step k (with one when stein).
// With a negative Limits.DiagnosticsShare (tests), every step (every
// ProgressEverySteps), the Stein assessment every quarter of growth.
// Else after 20 steps, then whenever the steps have grown by a tenth
// when a target rests on the figures (every target does, through the
// verdict), so that a session stops within about a tenth of the step
// where its targets first hold; by a half with no target, and then once
// the steps have paid for the judgement (paidFor). The Stein assessment
// decides a target only with max_ksd (the bias check fails only then):
// it is due once the steps have grown by a quarter with it, by a doubling
// without. A run of K steps therefore pays for O(log K) judgements, each
// bounded by the windows' sizes.
func (s *Session) judgeCadence(k int, stein bool) (judgeNext, steinNext int) {
	w := s.spec.Wants
	steinNext = s.steinNext
	if stein {
		sg := 1
		if w.MaxKSD > 0 || s.lim.DiagnosticsShare < 0 {
			sg = 4
		}
		steinNext = k + max(20, k/sg)
	}
	if s.lim.DiagnosticsShare < 0 {
		return k + max(1, int(s.spec.ProgressEverySteps)), steinNext
	}
	if w.any() {
		return k + max(20, k/10), steinNext // a tenth
	}
	return k + max(20, k/2), steinNext // a half
}
