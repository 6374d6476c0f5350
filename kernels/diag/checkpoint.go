package diag

import (
	"bytes"
	"encoding/gob"
	"errors"
	"fmt"
)

// Checkpoints of the bounded accumulators a long session keeps (History,
// StreamKSD, CurvatureBounds, CurvatureProbe), so that a session restored
// from its checkpoint reports the same figures as one that never stopped.
// Each state is a version byte followed by a gob encoding of a plain
// struct; UnmarshalBinary rejects another version, a malformed encoding
// or inconsistent sizes with an error, never a panic.

const diagStateVersion = 1

func encodeState(v any) ([]byte, error) {
	var b bytes.Buffer
	b.WriteByte(diagStateVersion)
	if err := gob.NewEncoder(&b).Encode(v); err != nil {
		return nil, err
	}
	return b.Bytes(), nil
}

func decodeState(data []byte, v any) (err error) {
	if len(data) == 0 || data[0] != diagStateVersion {
		return errors.New("diag: state of an unknown version")
	}
	defer func() {
		if r := recover(); r != nil { // gob reports most damage as errors; be safe
			err = fmt.Errorf("diag: malformed state: %v", r)
		}
	}()
	if err := gob.NewDecoder(bytes.NewReader(data[1:])).Decode(v); err != nil {
		return fmt.Errorf("diag: malformed state: %w", err)
	}
	return nil
}

type historyState struct {
	Chains, Dim, Capacity                 int
	Steps, Interval, Kept, Batch, Batches int
	CurN                                  int
	Buf, Sums, Cur, Mu, M2                []float64
	// DrawsOnly marks the state of a History made by NewDrawHistory: its
	// Cur, Mu and M2 are zeros and it has no batches, so that a decoder
	// that predates the field reads a consistent state (whose running
	// moments mean nothing), and a History that keeps them refuses it.
	DrawsOnly bool
}

// MarshalBinary saves the History's kept draws, batch sums and running
// moments (the kept draws only, for one made by NewDrawHistory).
func (h *History) MarshalBinary() ([]byte, error) {
	st := historyState{Chains: h.chains, Dim: h.dim, Capacity: h.capacity, Steps: h.steps,
		Interval: h.interval, Kept: h.kept, Batch: h.batch, Batches: h.batches, CurN: h.curN,
		Buf: h.buf[:h.kept*h.row], Sums: h.sums[:h.batches*h.row], Cur: h.cur, Mu: h.mu, M2: h.m2}
	if h.drawsOnly {
		zero := make([]float64, h.row)
		st.Batch, st.Batches, st.CurN, st.Sums, st.Cur, st.Mu, st.M2, st.DrawsOnly = 1, 0, 0, nil, zero, zero, zero, true
	}
	return encodeState(st)
}

// UnmarshalBinary restores a state saved by MarshalBinary into a History
// of the same chains, dimension and capacity. A History made by
// NewDrawHistory takes the kept draws of either kind of state; one made
// by NewHistory refuses the state of a NewDrawHistory one, which has no
// running moments.
func (h *History) UnmarshalBinary(data []byte) error {
	var st historyState
	if err := decodeState(data, &st); err != nil {
		return err
	}
	r := h.row
	switch {
	case st.Chains != h.chains || st.Dim != h.dim || st.Capacity != h.capacity:
		return fmt.Errorf("diag: History state for %d chains × %d of capacity %d, this one is %d × %d of %d",
			st.Chains, st.Dim, st.Capacity, h.chains, h.dim, h.capacity)
	case st.DrawsOnly && !h.drawsOnly:
		return errors.New("diag: History state holds no running moments (NewDrawHistory), this History keeps them")
	case st.Kept < 0 || st.Kept > h.capacity || st.Batches < 0 || st.Batches > h.capacity ||
		len(st.Buf) != st.Kept*r || len(st.Sums) != st.Batches*r ||
		len(st.Cur) != r || len(st.Mu) != r || len(st.M2) != r ||
		st.Interval < 1 || st.Batch < 1 || st.Steps < 0 || st.CurN < 0:
		return errors.New("diag: History state is inconsistent")
	}
	h.steps, h.interval, h.kept = st.Steps, st.Interval, st.Kept
	copy(h.buf, st.Buf)
	if h.drawsOnly {
		return nil
	}
	h.batch, h.batches, h.curN = st.Batch, st.Batches, st.CurN
	copy(h.sums, st.Sums)
	copy(h.cur, st.Cur)
	copy(h.mu, st.Mu)
	copy(h.m2, st.M2)
	return nil
}

type streamKSDState struct {
	Dim, Rows, MaxRounds int
	Kept, Stride, Rounds int
	X, S                 []float64
	Kernel               IMQ
}

// MarshalBinary saves the kept draws and scores and the thinning.
func (st *StreamKSD) MarshalBinary() ([]byte, error) {
	w := st.rows * st.dim
	return encodeState(streamKSDState{Dim: st.dim, Rows: st.rows, MaxRounds: st.maxRounds, Kept: st.kept,
		Stride: st.stride, Rounds: st.rounds, X: st.x[:st.kept*w], S: st.s[:st.kept*w], Kernel: st.kern})
}

// UnmarshalBinary restores a state saved by MarshalBinary into a stream
// of the same sizes and kernel.
func (st *StreamKSD) UnmarshalBinary(data []byte) error {
	var v streamKSDState
	if err := decodeState(data, &v); err != nil {
		return err
	}
	w := st.rows * st.dim
	switch {
	case v.Dim != st.dim || v.Rows != st.rows || v.MaxRounds != st.maxRounds || v.Kernel != st.kern:
		return errors.New("diag: StreamKSD state of other sizes or kernel")
	case v.Kept < 0 || v.Kept > st.maxRounds || len(v.X) != v.Kept*w || len(v.S) != v.Kept*w ||
		v.Stride < 1 || v.Rounds < v.Kept:
		return errors.New("diag: StreamKSD state is inconsistent")
	}
	st.kept, st.stride, st.rounds, st.cacheRounds = v.Kept, v.Stride, v.Rounds, -1
	copy(st.x, v.X)
	copy(st.s, v.S)
	return nil
}

type curvatureBoundsState struct {
	Pairs, Skipped, CocPairs int
	MaxCoc, MinIn            float64
	NonConvex                bool
}

// MarshalBinary saves the certificates.
func (c *CurvatureBounds) MarshalBinary() ([]byte, error) {
	return encodeState(curvatureBoundsState{Pairs: c.pairs, Skipped: c.skipped, CocPairs: c.cocPairs,
		MaxCoc: c.maxCoc, MinIn: c.minIn, NonConvex: c.nonConvex})
}

// UnmarshalBinary restores certificates saved by MarshalBinary.
func (c *CurvatureBounds) UnmarshalBinary(data []byte) error {
	var v curvatureBoundsState
	if err := decodeState(data, &v); err != nil {
		return err
	}
	if v.Pairs < 0 || v.Skipped < 0 || v.CocPairs < 0 {
		return errors.New("diag: CurvatureBounds state is inconsistent")
	}
	*c = CurvatureBounds{pairs: v.Pairs, skipped: v.Skipped, cocPairs: v.CocPairs, maxCoc: v.MaxCoc, minIn: v.MinIn, nonConvex: v.NonConvex}
	return nil
}

type curvatureProbeState struct {
	Theta, GradF, V, Point, HV []float64
	HaveBase, Smallest         bool
	Eps, Shift, Estimate       float64
	Iters, Evals               int
}

// MarshalBinary saves the probe's iteration.
func (pr *CurvatureProbe) MarshalBinary() ([]byte, error) {
	return encodeState(curvatureProbeState{Theta: pr.theta, GradF: pr.gradF, V: pr.v, Point: pr.point, HV: pr.hv,
		HaveBase: pr.haveBase, Smallest: pr.smallest, Eps: pr.eps, Shift: pr.shift, Estimate: pr.estimate,
		Iters: pr.iters, Evals: pr.evals})
}

// UnmarshalBinary restores a probe saved by MarshalBinary into a probe of
// the same dimension.
func (pr *CurvatureProbe) UnmarshalBinary(data []byte) error {
	var v curvatureProbeState
	if err := decodeState(data, &v); err != nil {
		return err
	}
	p := len(pr.theta)
	if len(v.Theta) != p || len(v.GradF) != p || len(v.V) != p || len(v.Point) != p || len(v.HV) != p || v.Iters < 0 || v.Evals < 0 {
		return errors.New("diag: CurvatureProbe state of another dimension or inconsistent")
	}
	copy(pr.theta, v.Theta)
	copy(pr.gradF, v.GradF)
	copy(pr.v, v.V)
	copy(pr.point, v.Point)
	copy(pr.hv, v.HV)
	pr.haveBase, pr.smallest, pr.eps, pr.shift, pr.estimate, pr.iters, pr.evals =
		v.HaveBase, v.Smallest, v.Eps, v.Shift, v.Estimate, v.Iters, v.Evals
	return nil
}
