package session

import (
	"bytes"
	"math"
	"slices"
	"strings"
	"testing"

	"sluice/kernels"
	"sluice/kernels/bound"
)

// exactGaussian answers every quantity for π = N(0, I/λ) exactly:
// ∇log π = −λx, log π = −λ‖x‖²/2, ∇²log π = −λI, ∇²log π·v = −λv
// (closed forms of the Gaussian density).
func exactGaussian(lambda float64) oracle {
	return func(p *Points, ev *Evaluations) {
		d := p.Dim
		ev.Grad, ev.LogDensity, ev.Hessian, ev.HessVec = nil, nil, nil, nil
		if p.Need&kernels.NeedGradient != 0 {
			ev.Grad = make([]float64, len(p.Points))
			for i, x := range p.Points {
				ev.Grad[i] = -lambda * x
			}
		}
		if p.Need&kernels.NeedLogDensity != 0 {
			ev.LogDensity = make([]float64, p.Rows)
			for r := range p.Rows {
				var sq float64
				for _, x := range p.Points[r*d : (r+1)*d] {
					sq += x * x
				}
				ev.LogDensity[r] = -lambda * sq / 2
			}
		}
		if p.Need&kernels.NeedHessian != 0 {
			ev.Hessian = make([]float64, p.Rows*d*d)
			for r := range p.Rows {
				for i := range d {
					ev.Hessian[r*d*d+i*d+i] = -lambda
				}
			}
		}
		if p.Need&kernels.NeedHessianVector != 0 {
			ev.HessVec = make([]float64, len(p.Vectors))
			for i, v := range p.Vectors {
				ev.HessVec[i] = -lambda * v
			}
		}
	}
}

// checkpointSpec is a short session of kernel name on a 2-D Gaussian.
func checkpointSpec(name string) Spec {
	s := Spec{Dim: 2, Chains: 3, Kernel: name, Start: []float64{0.5, -0.5}, StartRows: 1, Step: 0.2, Seed: 99,
		BurnIn: 5, DrawsPerChain: 40, CheckpointEverySteps: 7}
	switch name {
	case "hit-and-run":
		s.Step = 0
	case "rejection":
		// Scale² ≥ 1/λ_min keeps π/q largest at the mean, where
		// log π̃ − log q = (p/2)·log(2π·scale²) for π̃ unnormalised with
		// λ = 1 (derived here from the two Gaussian densities); slack added.
		s.Step = 0
		s.Envelope = &Envelope{Mean: []float64{0, 0}, Scale: 1.5, LogBound: math.Log(2*math.Pi*2.25) + 0.01}
	}
	return s
}

// runCollecting drives s to its end, collecting every checkpoint.
func runCollecting(t *testing.T, s *Session, o oracle) (*transcript, []Checkpoint) {
	t.Helper()
	var cps []Checkpoint
	s.SetCheckpoints(Checkpoints{Save: func(c Checkpoint) {
		if c.State == nil {
			t.Fatalf("checkpoint at step %d could not be encoded", c.Steps)
		}
		cps = append(cps, c)
	}})
	tr, _, err := drive(t, s, o)
	if err != nil {
		t.Fatalf("run: %v", err)
	}
	return tr, cps
}

// flatten lays the draws of a transcript out by sequence number, failing
// on a gap or a duplicate.
func flatten(t *testing.T, from uint64, ds []Draws) (vals []float64, next uint64) {
	t.Helper()
	next = from
	for _, d := range ds {
		if d.Seq != next {
			t.Fatalf("draws at seq %d, want %d (gap or duplicate)", d.Seq, next)
		}
		vals = append(vals, d.Values...)
		next += uint64(d.Rows)
	}
	return vals, next
}

// A session restored from any of its checkpoints continues with draws
// bit-identical to the run that never stopped, for every kernel in the
// registry, whether the resuming client has fewer draws than the
// checkpoint (they are replayed), exactly as many, or more (they are not
// sent twice); its summary is the same too.
func TestCheckpointRestoreContinuesBitForBit(t *testing.T) {
	lim := Limits{FollowBuffer: 1 << 12}
	for _, name := range KernelNames() {
		t.Run(name, func(t *testing.T) {
			o := exactGaussian(1)
			full, cps := runCollecting(t, mustNew(t, checkpointSpec(name), lim), o)
			want, end := flatten(t, 0, full.draws)
			if len(cps) < 4 || !cps[len(cps)-1].Final {
				t.Fatalf("%d checkpoints, last final %v", len(cps), len(cps) > 0 && cps[len(cps)-1].Final)
			}
			t.Logf("%d checkpoints, %d draws", len(cps), end)
			for _, k := range []int{0, 2, len(cps) - 2, len(cps) - 1} {
				for _, shift := range []int64{-4, 0, 5} {
					s, err := Restore(cps[k].State, lim)
					if err != nil {
						t.Fatalf("restore %d: %v", k, err)
					}
					if s.kernel.Steps() != cps[k].Steps {
						t.Fatalf("restored at step %d, checkpoint at %d", s.kernel.Steps(), cps[k].Steps)
					}
					next := uint64(max(0, int64(s.seq)+shift))
					next = min(next, end)
					if err := s.ResumeAt(next); err != nil {
						t.Fatalf("ResumeAt(%d): %v", next, err)
					}
					tr, _, err := drive(t, s, o)
					if err != nil {
						t.Fatalf("resumed run from checkpoint %d: %v", k, err)
					}
					if !tr.registered.Resumed {
						t.Error("Registered.Resumed not set")
					}
					got, gotEnd := flatten(t, next, tr.draws)
					if gotEnd != end && !(len(tr.draws) == 0 && next == end) {
						t.Fatalf("checkpoint %d, next %d: draws end at %d, want %d", k, next, gotEnd, end)
					}
					if !sameBits(got, want[int(next)*2:]) {
						t.Fatalf("checkpoint %d (step %d), next %d: draws differ from the uninterrupted run", k, cps[k].Steps, next)
					}
					if tr.finished == nil || tr.finished.Reason != full.finished.Reason {
						t.Fatalf("finished %+v, want reason %v", tr.finished, full.finished.Reason)
					}
					for i, p := range tr.finished.Parameters {
						q := full.finished.Parameters[i]
						if p.Count != q.Count || math.Float64bits(p.Mean) != math.Float64bits(q.Mean) || math.Float64bits(p.SD) != math.Float64bits(q.SD) {
							t.Fatalf("summary %+v, want %+v", p, q)
						}
					}
					fp, wp := tr.finished.Progress, full.finished.Progress
					if fp.Steps != wp.Steps || fp.EvaluationsUsed != wp.EvaluationsUsed || fp.DrawsSent != wp.DrawsSent {
						t.Fatalf("final progress steps %d evaluations %d draws %d, want %d %d %d",
							fp.Steps, fp.EvaluationsUsed, fp.DrawsSent, wp.Steps, wp.EvaluationsUsed, wp.DrawsSent)
					}
					// The measured diagnostics continue too: the final
					// report's figures over the restored history, Stein
					// discrepancy and certificates are the same.
					if !sameBits([]float64{fp.KSD, fp.Curvature.SmoothnessAtLeast, fp.Curvature.StrongConvexityAtMost},
						[]float64{wp.KSD, wp.Curvature.SmoothnessAtLeast, wp.Curvature.StrongConvexityAtMost}) ||
						fp.Curvature.Pairs != wp.Curvature.Pairs || len(fp.Parameters) != len(wp.Parameters) {
						t.Fatalf("final diagnostics KSD %v curvature %+v, want %v %+v", fp.KSD, fp.Curvature, wp.KSD, wp.Curvature)
					}
					for i, p := range fp.Parameters {
						q := wp.Parameters[i]
						if !sameBits([]float64{p.Mean, p.SD, p.Rhat, p.BulkESS, p.TailESS, p.MCSE}, []float64{q.Mean, q.SD, q.Rhat, q.BulkESS, q.TailESS, q.MCSE}) {
							t.Fatalf("final diagnostics %+v, want %+v", p, q)
						}
					}
				}
			}
		})
	}
}

// With the curvature probe, a checkpoint taken before the probe completed
// (the first one, before any request) re-runs it from the start, and one
// taken after keeps its estimates: both continue bit for bit and report
// the same probed curvature as the run that never stopped.
func TestCheckpointWithCurvatureProbe(t *testing.T) {
	lim := Limits{FollowBuffer: 1 << 12}
	spec := checkpointSpec("lmc")
	spec.CurvatureProbe = 4
	o := exactGaussian(2)
	full, cps := runCollecting(t, mustNew(t, spec, lim), o)
	want, _ := flatten(t, 0, full.draws)
	wc := full.finished.Progress.Curvature
	if !(wc.ProbedSmoothness > 0) || wc.ProbeEvaluations == 0 {
		t.Fatalf("the probe did not run: %+v", wc)
	}
	for _, k := range []int{0, 1, len(cps) - 2} {
		s, err := Restore(cps[k].State, lim)
		if err != nil {
			t.Fatal(err)
		}
		if k == 0 && s.persist.restored.Phase != 0 || k > 0 && s.persist.restored.Phase != 1 {
			t.Fatalf("checkpoint %d at phase %d", k, s.persist.restored.Phase)
		}
		next := s.seq
		tr, _, err := drive(t, s, o)
		if err != nil {
			t.Fatal(err)
		}
		got, _ := flatten(t, next, tr.draws)
		if !sameBits(got, want[int(next)*2:]) {
			t.Fatalf("checkpoint %d: draws differ", k)
		}
		c := tr.finished.Progress.Curvature
		if c.ProbedSmoothness != wc.ProbedSmoothness || c.ProbedConvexity != wc.ProbedConvexity || c.ProbeEvaluations != wc.ProbeEvaluations {
			t.Fatalf("checkpoint %d: probe %+v, want %+v", k, c, wc)
		}
	}
}

// A damaged state is an error, never a panic: every truncation and a
// flipped byte at every position of a real state.
func TestRestoreRejectsDamagedState(t *testing.T) {
	lim := Limits{FollowBuffer: 64}
	spec := checkpointSpec("mala")
	spec.DrawsPerChain = 10
	_, cps := runCollecting(t, mustNew(t, spec, lim), exactGaussian(1))
	st := cps[1].State
	if _, err := Restore(st, lim); err != nil {
		t.Fatal(err)
	}
	for n := 0; n < len(st); n += 1 + n/50 {
		if _, err := Restore(st[:n], lim); err == nil {
			t.Fatalf("truncated at %d: no error", n)
		}
	}
	for i := 0; i < len(st); i += 1 + i/100 {
		b := bytes.Clone(st)
		b[i] ^= 0x5a
		_, _ = Restore(b, lim) // must not panic; a flip inside a float may still decode
	}
	if _, err := Restore(append([]byte("sluice-state\x02"), st[13:]...), lim); err == nil {
		t.Fatal("another version accepted")
	}
}

// With a TV guarantee, the mode search runs before sampling: a session
// restored from its first checkpoint (before any request) runs the search
// again and draws the same starts; one restored after it keeps what the
// search found. Both continue bit for bit and report the same bound, the
// shift term included, as the run that never stopped.
func TestCheckpointWithModeSearch(t *testing.T) {
	lim := Limits{FollowBuffer: 1 << 12}
	spec := Spec{Dim: 2, Chains: 3, Start: []float64{30, 30}, StartRows: 1, Seed: 99, DrawsPerChain: 40, CheckpointEverySteps: 7,
		Curvature: &Curvature{StrongConvexity: 0.5, Smoothness: 1}, Wants: Wants{Eps: 0.1, Metric: bound.TV}}
	o := exactGaussian(1)
	full, cps := runCollecting(t, mustNew(t, spec, lim), o)
	want, _ := flatten(t, 0, full.draws)
	wb := full.finished.Progress.Bound
	if wb == nil || len(cps) < 3 {
		t.Fatalf("bound %+v, %d checkpoints", wb, len(cps))
	}
	for _, k := range []int{0, 1, len(cps) - 2} {
		s, err := Restore(cps[k].State, lim)
		if err != nil {
			t.Fatal(err)
		}
		next := s.seq
		tr, _, err := drive(t, s, o)
		if err != nil {
			t.Fatal(err)
		}
		got, _ := flatten(t, next, tr.draws)
		if !sameBits(got, want[int(next)*2:]) {
			t.Fatalf("checkpoint %d: draws differ", k)
		}
		b := tr.finished.Progress.Bound
		if b == nil || b.Total != wb.Total || b.Start != wb.Start || tr.finished.Progress.EvaluationsUsed != full.finished.Progress.EvaluationsUsed {
			t.Fatalf("checkpoint %d: bound %+v, want %+v", k, b, wb)
		}
		c, _ := checkNamed(tr.finished.Checks, "guarantee")
		if !strings.Contains(c.Message, "8 gradient steps of the mode search") {
			t.Fatalf("checkpoint %d: guarantee check %+v", k, c)
		}
	}
}

// diagonalGaussian answers gradients of π = N(0, diag(1/λ)) exactly:
// ∇log π = −λ ⊙ x (closed form), and log π when asked.
func diagonalGaussian(lam []float64) oracle {
	return func(p *Points, ev *Evaluations) {
		d := p.Dim
		ev.Grad, ev.LogDensity, ev.Hessian, ev.HessVec = nil, nil, nil, nil
		ev.Grad = make([]float64, len(p.Points))
		for i, x := range p.Points {
			ev.Grad[i] = -lam[i%d] * x
		}
		if p.Need&kernels.NeedLogDensity != 0 {
			ev.LogDensity = make([]float64, p.Rows)
			for r := range p.Rows {
				for i, x := range p.Points[r*d : (r+1)*d] {
					ev.LogDensity[r] -= lam[i] * x * x / 2
				}
			}
		}
	}
}

// A session with automatic tuning (step 0) and a metric adapted during
// burn-in, checkpointed in the middle of an adaptation window after at
// least one metric update, restores and continues with draws, metric and
// tuning choices bit-identical to the run that never stopped, for every
// kernel that takes a metric: the window's pooled covariance, the metric
// in use and the one an update would fall back to, and the finished
// probes are in the checkpoint.
func TestCheckpointInMetricAdaptation(t *testing.T) {
	lim := Limits{FollowBuffer: 1 << 12}
	lam := []float64{1, 9, 100}
	o := diagonalGaussian(lam)
	for _, e := range registry {
		if e.tuning == ruleNone {
			continue
		}
		t.Run(e.name, func(t *testing.T) {
			spec := Spec{Dim: 3, Chains: 4, Kernel: e.name, Start: []float64{1, -0.3, 0.1}, StartRows: 1, Seed: 7,
				BurnIn: 300, DrawsPerChain: 30, CheckpointEverySteps: 13}
			full, cps := runCollecting(t, mustNew(t, spec, lim), o)
			want, _ := flatten(t, 0, full.draws)
			fm := full.finished.Progress.Metric
			if fm.Source != "adapted" || fm.Updates < 2 {
				t.Fatalf("metric %+v: not adapted", fm)
			}
			// The checkpoints strictly inside a window after the first
			// update: those a restore without the tuner's state would get
			// wrong.
			_, ends := adaptSchedule(spec.BurnIn)
			tested := 0
			for k, cp := range cps {
				if int64(cp.Steps) <= ends[0] || int64(cp.Steps) >= ends[len(ends)-1] || slices.Contains(ends, int64(cp.Steps)) {
					continue
				}
				s, err := Restore(cp.State, lim)
				if err != nil {
					t.Fatalf("restore %d (step %d): %v", k, cp.Steps, err)
				}
				tested++
				window, pooled := s.tune.window, 0
				if s.tune.cov != nil {
					pooled = s.tune.cov.Count()
				}
				next := s.seq
				tr, _, err := drive(t, s, o)
				if err != nil {
					t.Fatalf("resumed from step %d: %v", cp.Steps, err)
				}
				got, _ := flatten(t, next, tr.draws)
				if len(got) == 0 || !sameBits(got, want[int(next)*spec.Dim:]) {
					t.Fatalf("checkpoint at step %d (restored in window %d with %d draws pooled): draws differ from the uninterrupted run", cp.Steps, window, pooled)
				}
				if window == 0 || pooled == 0 {
					t.Fatalf("checkpoint at step %d: restored in window %d with %d draws pooled", cp.Steps, window, pooled)
				}
				gm := tr.finished.Progress.Metric
				if gm.Updates != fm.Updates || gm.UpdatedAtStep != fm.UpdatedAtStep || math.Float64bits(gm.Condition) != math.Float64bits(fm.Condition) ||
					math.Float64bits(gm.Shrinkage) != math.Float64bits(fm.Shrinkage) {
					t.Fatalf("checkpoint at step %d: metric %+v, want %+v", cp.Steps, gm, fm)
				}
				gt, wt := tr.finished.Progress.Tuning, full.finished.Progress.Tuning
				if len(gt) != len(wt) {
					t.Fatalf("checkpoint at step %d: tuning %+v, want %+v", cp.Steps, gt, wt)
				}
				for i := range gt {
					if gt[i].Setting != wt[i].Setting || math.Float64bits(gt[i].Value) != math.Float64bits(wt[i].Value) {
						t.Fatalf("checkpoint at step %d: tuning %+v, want %+v", cp.Steps, gt, wt)
					}
				}
				if tr.finished.Progress.TuningEvaluations != full.finished.Progress.TuningEvaluations ||
					tr.finished.Progress.EvaluationsUsed != full.finished.Progress.EvaluationsUsed {
					t.Fatalf("checkpoint at step %d: evaluations %d (tuning %d), want %d (%d)", cp.Steps,
						tr.finished.Progress.EvaluationsUsed, tr.finished.Progress.TuningEvaluations,
						full.finished.Progress.EvaluationsUsed, full.finished.Progress.TuningEvaluations)
				}
			}
			if tested < 3 {
				t.Fatalf("%d checkpoints inside an adaptation window after an update, want at least 3", tested)
			}
		})
	}
}
