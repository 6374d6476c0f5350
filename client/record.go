package client

import (
	"math"

	"sluice/client/history"
)

// WriteHistory makes Run (and Follow) write the session's progress
// history to w, in the format of package history (docs/report.md): one
// record per progress report, with the verdict so far, and, when the
// server's final frame arrives, a finish record with the reason, the
// message, the final report and the session's verdict. With the draws
// written beside it (WriteDraws), `sluice report` reads the run:
//
//	h, err := history.Create("draws.csv.history.jsonl")
//	d, err := history.CreateDraws("draws.csv", spec.Names)
//	sum, err := client.Run(ctx, cc, spec, eval, client.WriteHistory(h), client.WriteDraws(d))
//	// then close both and check their errors: a write error is kept
//	// by the writer and returned by its Close.
//
// The caller creates and closes w; Run only writes to it.
func WriteHistory(w *history.Writer) Option { return func(c *config) { c.history = w } }

// WriteDraws makes Run (and Follow) write every draw received to w, in
// sequence order, as OnDraws sees them. w's names must be as many as the
// session's dimension. The caller creates and closes w.
func WriteDraws(w *history.DrawsWriter) Option { return func(c *config) { c.drawsOut = w } }

// HistoryRecord turns a progress report into a record of the progress
// history (kind history.KindProgress), as WriteHistory writes it.
func HistoryRecord(p *Progress) *history.Record {
	return historyRecord(history.KindProgress, p, p.Checks)
}

// FinishRecord turns a summary into the last record of the progress
// history (kind history.KindFinish): its final report, reason, message and
// verdict, as WriteHistory writes it.
func FinishRecord(s *Summary) *history.Record {
	r := historyRecord(history.KindFinish, &s.Progress, s.Checks)
	r.Reason, r.Message = string(s.Reason), s.Message
	return r
}

func historyRecord(kind string, p *Progress, checks []Check) *history.Record {
	r := &history.Record{Kind: kind, State: string(p.State), Steps: p.Steps,
		EvaluationsUsed: p.EvaluationsUsed, EvaluationsLeft: p.EvaluationsLeft,
		ElapsedSeconds: p.Elapsed.Seconds(), SecondsLeft: -1, DrawsSent: p.DrawsSent}
	if p.TimeLeft >= 0 {
		r.SecondsLeft = p.TimeLeft.Seconds()
	}
	for _, d := range p.Parameters {
		r.Params = append(r.Params, history.Param{Name: d.Name, Rhat: history.Num(d.Rhat),
			BulkESS: history.Num(d.BulkESS), TailESS: history.Num(d.TailESS)})
	}
	r.Summarise()
	if st := p.Stein; st != nil && st.KSD >= 0 {
		// The KSD's standard error on the scale of KSD (delta method on
		// √U: SE(U)/(2√U)), and its upper 95 % bound.
		se := math.NaN()
		if st.KSD > 0 {
			se = st.SE / (2 * st.KSD)
		}
		r.Stein = &history.Stein{Value: history.Num(st.KSD), SE: history.Num(se), Upper: history.Num(st.Upper95)}
	} else if p.KSD >= 0 {
		nan := history.Num(math.NaN())
		r.Stein = &history.Stein{Value: history.Num(p.KSD), SE: nan, Upper: nan}
	}
	if b := p.Bound; b != nil {
		r.Bound = &history.Bound{Metric: string(b.Metric), Value: history.Num(b.Value), Guaranteed: b.Guaranteed, Label: b.Label}
	}
	for _, t := range p.Targets {
		r.Targets = append(r.Targets, history.Target{Name: t.Name, Want: history.Num(t.Want), Current: history.Num(t.Current),
			Met: t.Met, ProjectedEvaluations: t.ProjectedEvaluations})
	}
	for _, c := range checks {
		r.Checks = append(r.Checks, history.Check{Name: c.Name, Status: string(c.Status), Figure: history.Num(c.Figure), Sentence: c.Message})
	}
	return r
}

// progress hands a progress report to the callback and the history.
func (r *runner) progress() {
	if r.cfg.onProgress != nil {
		p := r.sum.Progress
		r.cfg.onProgress(&p)
	}
	if r.cfg.history != nil {
		_ = r.cfg.history.Write(HistoryRecord(&r.sum.Progress))
	}
}
