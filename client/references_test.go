package client

import (
	"context"
	"math"
	"slices"
	"strings"
	"sync/atomic"
	"testing"

	"google.golang.org/grpc"

	"sluice/internal/wire"
	sluicev1 "sluice/proto/sluice/v1"
)

// TestDrawReferencesAreRebuilt plays a server that sends a request in two
// Points parts, then a Draws frame naming rows of it (point_rows ≥ 0) and
// carrying the other row in values (−1), as sluice.proto's Draws message
// says; the client must hand on the full block, bit for bit (−0 included),
// and must refuse a reference to a request other than the last one.
func TestDrawReferencesAreRebuilt(t *testing.T) {
	x := []float64{1, 2, 3, 4, 5, 6} // 3 rows × dim 2
	other := []float64{math.Copysign(0, -1), 7.5}
	for _, c := range []struct {
		name string
		from uint64
		want string // error text; "" for success
	}{{"same request", 9, ""}, {"older request", 8, "refers to request 8"}} {
		var accepts atomic.Bool
		f := &fakeServer{session: func(s grpc.BidiStreamingServer[sluicev1.SessionRequest, sluicev1.SessionResponse]) error {
			first, err := s.Recv()
			if err != nil {
				return err
			}
			accepts.Store(first.GetRegister().GetAcceptsDrawReferences())
			for _, part := range [][2]int{{0, 2}, {2, 3}} {
				lo, hi := part[0], part[1]
				p := &sluicev1.Points{RequestId: 9, FirstRow: int32(lo), Rows: int32(hi - lo), Dim: 2, TotalRows: 3,
					Points: wire.AppendFloats(nil, x[2*lo:2*hi]), Chains: []int32{int32(lo), int32(lo + 1)}[:hi-lo],
					Quantities: []sluicev1.Quantity{sluicev1.Quantity_QUANTITY_GRADIENT}}
				if err := s.Send(&sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Points{Points: p}}); err != nil {
					return err
				}
				if _, err := s.Recv(); err != nil {
					return err
				}
			}
			d := &sluicev1.Draws{Seq: 0, Rows: 3, Dim: 2, Values: wire.AppendFloats(nil, other), Chains: []int32{0, 1, 2},
				Iterations: []int64{1, 1, 1}, FromRequestId: c.from, PointRows: []int32{2, -1, 0}}
			if err := s.Send(&sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Draws{Draws: d}}); err != nil {
				return err
			}
			return s.Send(&sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Finished{Finished: &sluicev1.Finished{
				Reason: sluicev1.FinishReason_FINISH_REASON_DRAWS_COLLECTED}}})
		}}
		cc := startFake(t, f)
		var got []float64
		_, err := Run(t.Context(), cc, Spec{Dim: 2, Chains: 3, Start: []float64{0, 0}, Step: 0.1},
			func(_ context.Context, b *Batch) error {
				for i, v := range b.Points {
					b.Grad[i] = -v
				}
				return nil
			}, OnDraws(func(d *Draws) { got = append(got, d.Values...) }))
		if !accepts.Load() {
			t.Errorf("%s: the client did not say it accepts draw references", c.name)
		}
		if c.want != "" {
			if err == nil || !strings.Contains(err.Error(), c.want) {
				t.Errorf("%s: error %v, want one containing %q", c.name, err, c.want)
			}
			continue
		}
		if err != nil {
			t.Fatalf("%s: %v", c.name, err)
		}
		want := []float64{5, 6, other[0], other[1], 1, 2} // rows 2, the one sent, 0
		if !slices.EqualFunc(got, want, func(a, b float64) bool { return math.Float64bits(a) == math.Float64bits(b) }) {
			t.Errorf("%s: draws %v, want %v", c.name, got, want)
		}
	}
}
