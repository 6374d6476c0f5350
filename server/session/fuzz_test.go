package session

import (
	"context"
	"errors"
	"math"
	"testing"
	"time"

	"sluice/kernels"
)

// fuzzSpecs are the sessions FuzzFrameSequence drives, one per kind of
// request the registry declares: gradients, log densities, Hessians,
// Hessian-vector products, full-data requests with replicates, density
// searches.
var fuzzSpecs = []Spec{
	{Kernel: "lmc", Step: 0.1},
	{Kernel: "mala", Step: 0.3, BurnIn: 2},
	{Kernel: "ozaki", Step: 0.2},
	{Kernel: "ozaki-krylov", Step: 0.2},
	{Kernel: "svrg", Step: 0.05, Noise: Noise{Stochastic: true, Replicates: 2}},
	{Kernel: "sgld-cv", Step: 0.05, Noise: Noise{Stochastic: true}},
	{Kernel: "hit-and-run"},
	{Kernel: "lmc", Step: 0.1, CurvatureProbe: 3},
}

// bytesIn hands out fuzz bytes; zero once they run out.
type bytesIn struct{ b []byte }

func (r *bytesIn) next() byte {
	if len(r.b) == 0 {
		return 0
	}
	c := r.b[0]
	r.b = r.b[1:]
	return c
}

// answerGaussian fills ev with the exact answer to p for π = N(0, I):
// ∇log π = −x, log π = −‖x‖²/2, Hessian −I, Hessian-vector −v, with the
// replicates p asks for.
func answerGaussian(p *Points, ev *Evaluations) {
	d := p.Dim
	*ev = Evaluations{RequestID: p.RequestID, FirstRow: p.FirstRow, Rows: p.Rows, Dim: d}
	if p.Need.Has(kernels.NeedGradient) {
		for r := range p.Rows {
			for range max(p.Replicates, 1) {
				for j := range d {
					ev.Grad = append(ev.Grad, -p.Points[r*d+j])
				}
			}
		}
	}
	if p.Need.Has(kernels.NeedLogDensity) {
		for r := range p.Rows {
			var s float64
			for _, x := range p.Points[r*d : (r+1)*d] {
				s += x * x
			}
			ev.LogDensity = append(ev.LogDensity, -s/2)
		}
	}
	if p.Need.Has(kernels.NeedHessian) {
		for range p.Rows {
			for i := range d {
				for j := range d {
					ev.Hessian = append(ev.Hessian, -b2f(i == j))
				}
			}
		}
	}
	if p.Need.Has(kernels.NeedHessianVector) {
		for _, v := range p.Vectors {
			ev.HessVec = append(ev.HessVec, -v)
		}
	}
}

func b2f(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

// A random sequence of client frames, driven through Run by way of its
// frame interfaces, never makes the engine panic or hang, and every
// error it returns names a field (or says the client went away). Each
// Points frame consumes fuzz bytes that choose the client's move: a
// correct answer, a corrupted one (every field of Evaluations), a
// duplicate, a Stop, a closed or broken stream. Run with
//
//	go test -run XXX -fuzz '^FuzzFrameSequence$' -fuzztime 10s ./server/session
func FuzzFrameSequence(f *testing.F) {
	for k := range fuzzSpecs {
		f.Add(uint8(k), []byte{})                           // all correct until the draws are in
		f.Add(uint8(k), []byte{1, 1, 1, 6, 0, 1})           // a corrupted request id
		f.Add(uint8(k), []byte{2, 6, 4, 2, 6, 5, 3})        // a gradient of the wrong length, a NaN
		f.Add(uint8(k), []byte{3, 7})                       // a Stop
		f.Add(uint8(k), []byte{4, 8})                       // the stream closes
		f.Add(uint8(k), []byte{5, 9, 6, 9, 1, 6, 8, 0, 10}) // a duplicate, corrupted Hessians
	}
	f.Fuzz(func(t *testing.T, kernel uint8, moves []byte) {
		spec := fuzzSpecs[int(kernel)%len(fuzzSpecs)]
		spec.Dim, spec.Chains, spec.StartRows, spec.Seed = 2, 3, 1, 11
		spec.Start = []float64{0.3, -0.2}
		spec.DrawsPerChain = 30
		s, err := New("fuzz", spec, Limits{AnswerTimeout: time.Minute})
		if err != nil {
			t.Fatalf("the fuzzed sessions are valid: %v", err)
		}
		r := &bytesIn{b: moves}
		in := make(chan Message, 64)
		send := func(fr Frame) error {
			p, ok := fr.(*Points)
			if !ok {
				return nil
			}
			if len(r.b) == 0 && len(moves) > 0 {
				in <- Message{Stop: true} // moves spent: end
				return nil
			}
			ev := &Evaluations{}
			answerGaussian(p, ev)
			switch op := r.next() % 11; op {
			case 6:
				corrupt(ev, r)
			case 7:
				in <- Message{Stop: true, StopReason: "fuzz"}
				return nil
			case 8:
				in <- Message{Err: errors.New("stream broken")}
				return nil
			case 9:
				in <- Message{Evaluations: ev} // the same part twice
			case 10:
				in <- Message{Err: BadField("evaluations.gradients", "undecodable")}
				return nil
			}
			in <- Message{Evaluations: ev}
			return nil
		}
		ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
		defer cancel()
		_, err = s.Run(ctx, in, send)
		if err == nil || errors.Is(err, ErrClientGone) {
			return
		}
		if e, ok := AsError(err); !ok || e.Field == "" {
			t.Fatalf("error without a field: %v", err)
		}
	})
}

// corrupt changes one field of ev, chosen by the fuzz bytes.
func corrupt(ev *Evaluations, r *bytesIn) {
	delta := int(int8(r.next()))
	if delta == 0 {
		delta = 1
	}
	switch r.next() % 10 {
	case 0:
		ev.RequestID += uint64(delta)
	case 1:
		ev.FirstRow += delta
	case 2:
		ev.Rows += delta
	case 3:
		ev.Dim += delta
	case 4:
		ev.Grad = append(ev.Grad, 1)
	case 5:
		if len(ev.Grad) > 0 {
			ev.Grad[int(r.next())%len(ev.Grad)] = math.NaN()
		} else {
			ev.Grad = []float64{math.Inf(1)}
		}
	case 6:
		ev.LogDensity = append(ev.LogDensity, math.Inf(-1))
	case 7:
		if len(ev.Hessian) > 1 {
			ev.Hessian[1] += 1 // no longer symmetric
		} else {
			ev.Hessian = []float64{0}
		}
	case 8:
		ev.HessVec = append(ev.HessVec[:0:0], ev.HessVec[min(1, len(ev.HessVec)):]...)
		if len(ev.HessVec) == 0 {
			ev.HessVec = []float64{1, 2, 3}
		}
	case 9:
		ev.Grad = ev.Grad[:len(ev.Grad)/2]
	}
}
