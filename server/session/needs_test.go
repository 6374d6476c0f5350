package session

import (
	"math"
	"strings"
	"testing"

	"sluice/kernels"
)

// askAll is a test kernel that asks for every quantity at its positions
// and records what it was told; its positions never move.
type askAll struct {
	dim, chains int
	req         kernels.Request
	told        []kernels.Answer
	steps       int
}

func newAskAll(dim, chains int) *askAll {
	k := &askAll{dim: dim, chains: chains}
	k.req = kernels.Request{Need: kernels.NeedGradient | kernels.NeedLogDensity | kernels.NeedHessian | kernels.NeedHessianVector,
		Rows: chains, Points: make([]float64, dim*chains), Chain: make([]int, chains), Vectors: make([]float64, dim*chains)}
	for i := range k.req.Chain {
		k.req.Chain[i] = i
	}
	for i := range k.req.Vectors {
		k.req.Vectors[i] = float64(i)
	}
	return k
}

func (k *askAll) Dim() int                { return k.dim }
func (k *askAll) Chains() int             { return k.chains }
func (k *askAll) Next() *kernels.Request  { return &k.req }
func (k *askAll) Steps() int              { return k.steps }
func (k *askAll) Positions() []float64    { return k.req.Points }
func (k *askAll) EvaluationsPerStep() int { return k.chains }
func (k *askAll) MarshalBinary() ([]byte, error) {
	return nil, nil
}
func (k *askAll) UnmarshalBinary([]byte) error { return nil }
func (k *askAll) Tell(a *kernels.Answer) bool {
	c := kernels.Answer{Grad: append([]float64(nil), a.Grad[:k.dim*k.chains]...),
		LogDensity: append([]float64(nil), a.LogDensity[:k.chains]...),
		Hessian:    append([]float64(nil), a.Hessian[:k.dim*k.dim*k.chains]...),
		HessVec:    append([]float64(nil), a.HessVec[:k.dim*k.chains]...)}
	k.told = append(k.told, c)
	k.steps++
	return true
}

// answerAll fills every quantity: H = −I·(chain+1) (symmetric), Hv = H·v.
func answerAll(p *Points, ev *Evaluations) {
	d := p.Dim
	ev.Grad = make([]float64, p.Rows*d)
	ev.LogDensity = make([]float64, p.Rows)
	ev.Hessian = make([]float64, p.Rows*d*d)
	ev.HessVec = make([]float64, p.Rows*d)
	for r := range p.Rows {
		c := float64(p.Chains[r] + 1)
		ev.LogDensity[r] = -c
		for i := range d {
			ev.Grad[r*d+i] = c
			ev.Hessian[r*d*d+i*d+i] = -c
			ev.HessVec[r*d+i] = -c * p.Vectors[r*d+i]
		}
	}
}

func sessionWith(t *testing.T, k kernels.Kernel, msgBytes int64) *Session {
	t.Helper()
	spec := Spec{Dim: k.Dim(), Chains: k.Chains(), Start: make([]float64, k.Dim()), StartRows: 1, Step: 0.1, Seed: 1,
		MaxEvaluations: int64(2 * k.Chains()), MaxMessageBytes: msgBytes}
	s := mustNew(t, spec, Limits{})
	s.kernel = k // the engine drives any Kernel; this one asks for everything
	return s
}

// Hessians and Hessian-vector products travel in row order through split
// requests (parts sized for dim² values per row) and reach the kernel
// intact.
func TestAllQuantitiesReachTheKernelThroughSplits(t *testing.T) {
	k := newAskAll(6, 10)
	s := sessionWith(t, k, 1024+3*(8*(6*6+6+1+6)+16)) // three rows per part
	tr, res, err := drive(t, s, answerAll)
	if err != nil || res.Finished.Reason != BudgetSpent {
		t.Fatalf("err %v reason %v", err, res.Finished.Reason)
	}
	if tr.points != 2*4 {
		t.Fatalf("%d Points frames, want 8 (4 parts × 2 steps)", tr.points)
	}
	a := k.told[1]
	for r := range 10 {
		c := float64(r + 1)
		if a.Grad[r*6] != c || a.LogDensity[r] != -c || a.Hessian[r*36+7] != -c || a.HessVec[r*6+2] != -c*float64(r*6+2) {
			t.Fatalf("row %d arrived wrong: grad %v logd %v hess %v hv %v", r, a.Grad[r*6], a.LogDensity[r], a.Hessian[r*36+7], a.HessVec[r*6+2])
		}
	}
}

func TestBadHessiansNameTheField(t *testing.T) {
	cases := []struct {
		name, field, words string
		edit               func(*Evaluations)
	}{
		{"asymmetric", "evaluations.hessians", "not symmetric", func(e *Evaluations) { e.Hessian[1] = 0.5 }},
		{"NaN", "evaluations.hessians", "not finite", func(e *Evaluations) { e.Hessian[3*3*1+4] = math.NaN() }},
		{"short", "evaluations.hessians", "want rows × dim × dim", func(e *Evaluations) { e.Hessian = e.Hessian[:8] }},
		{"missing log density", "evaluations.log_densities", "want rows", func(e *Evaluations) { e.LogDensity = nil }},
		{"HVP Inf", "evaluations.hessian_vectors", "not finite", func(e *Evaluations) { e.HessVec[0] = math.Inf(1) }},
	}
	for _, tc := range cases {
		s := sessionWith(t, newAskAll(3, 2), 0)
		_, _, err := drive(t, s, func(p *Points, ev *Evaluations) { answerAll(p, ev); tc.edit(ev) })
		e, ok := AsError(err)
		if !ok || e.Field != tc.field || !strings.Contains(e.Reason, tc.words) {
			t.Errorf("%s: got %v, want %s error mentioning %q", tc.name, err, tc.field, tc.words)
		}
	}
	// Answers for quantities not asked for are refused too.
	s := mustNew(t, baseSpec(), Limits{})
	_, _, err := drive(t, s, func(p *Points, ev *Evaluations) { gaussian(1)(p, ev); ev.Hessian = []float64{1} })
	if e, ok := AsError(err); !ok || e.Field != "evaluations.hessians" {
		t.Errorf("unasked Hessian: %v", err)
	}
}

// A row's size counts its dense Hessian: 8·(dim + 1 + dim²) bytes back
// plus framing.
func TestRowBytesCountsTheHessian(t *testing.T) {
	if got := rowBytes(kernels.NeedGradient|kernels.NeedHessian, 1000, 1); got != 8*(1000+1+1000*1000)+16 {
		t.Fatalf("rowBytes %d", got)
	}
}

// kernelsLMC builds LMC as the engine does: one kernel per chain, chain c
// drawing from kernels.ChainSource(seed, c), batched by kernels.NewBlocks.
func kernelsLMC(dim, chains int, h float64, start []float64, seed uint64) kernels.Kernel {
	ks := make([]kernels.Kernel, chains)
	for c := range ks {
		row := start
		if len(start) == chains*dim {
			row = start[c*dim : (c+1)*dim]
		}
		ks[c] = kernels.NewLMC(dim, 1, h, row, kernels.ChainSource(seed, c))
	}
	return kernels.NewBlocks(ks)
}

// A kernel whose one row cannot fit the message limit (ozaki's dense
// Hessian at dim 1000 is 8 MB against 4 MiB) is refused at registration,
// naming the dimension; ozaki-krylov, which needs no dense Hessian, fits.
func TestOzakiDenseTooLargeForMessage(t *testing.T) {
	spec := Spec{Dim: 1000, Chains: 2, Kernel: "ozaki", Start: make([]float64, 1000), StartRows: 1, Step: 0.1}
	_, err := New("x", spec, Limits{})
	if e, ok := AsError(err); !ok || e.Kind != TooLarge || e.Field != "register.dim" || !strings.Contains(e.Reason, "ozaki") {
		t.Fatalf("got %v, want a too-large error on register.dim naming the kernel", err)
	}
	spec.Kernel = "ozaki-krylov"
	if _, err := New("x", spec, Limits{}); err != nil {
		t.Fatalf("ozaki-krylov at dim 1000: %v", err)
	}
}

// The rejection kernel refuses dim > 4 and a missing envelope at
// registration, and fails the session naming envelope.log_bound when an
// observed ratio shows the declared bound is wrong.
func TestRejectionEnvelopeChecks(t *testing.T) {
	spec := Spec{Dim: 5, Chains: 2, Kernel: "rejection", Start: make([]float64, 5), StartRows: 1,
		Envelope: &Envelope{Mean: make([]float64, 5), Scale: 1, LogBound: 0}}
	if _, err := New("x", spec, Limits{}); err == nil || !strings.Contains(err.Error(), "register.dim") {
		t.Fatalf("dim 5: %v", err)
	}
	spec = Spec{Dim: 1, Chains: 2, Kernel: "rejection", Start: []float64{0}, StartRows: 1}
	if _, err := New("x", spec, Limits{}); err == nil || !strings.Contains(err.Error(), "register.envelope") {
		t.Fatalf("no envelope: %v", err)
	}
	// N(0, 1) under the envelope N(0, 1.5²): the tight log bound is
	// log 1.5 (derived: the ratio peaks at 0); declaring 0 is too small.
	spec.Envelope = &Envelope{Mean: []float64{0}, Scale: 1.5, LogBound: 0}
	spec.DrawsPerChain = 200
	stdNormal := func(p *Points, ev *Evaluations) {
		ev.LogDensity = make([]float64, p.Rows)
		for i, x := range p.Points {
			ev.LogDensity[i] = -x*x/2 - 0.5*math.Log(2*math.Pi)
		}
	}
	_, res, err := drive(t, mustNew(t, spec, Limits{}), stdNormal)
	if e, ok := AsError(err); !ok || e.Field != "register.envelope.log_bound" || res.Finished.Reason != Failed {
		t.Fatalf("too small a bound: %v (%v)", err, res.Finished.Reason)
	}
	spec.Envelope.LogBound = math.Log(1.5)
	_, res, err = drive(t, mustNew(t, spec, Limits{}), stdNormal)
	if err != nil || res.Finished.Reason != DrawsCollected {
		t.Fatalf("tight bound: %v (%v)", err, res.Finished.Reason)
	}
	if a := res.Finished.Progress.Kernel.AcceptanceRate; math.Abs(a-1/1.5) > 4*math.Sqrt((1/1.5)*(1-1/1.5)/float64(res.Finished.Progress.EvaluationsUsed)) {
		t.Fatalf("acceptance %v, exact 1/1.5 (1/M for a normalised target)", a)
	}
}
