package client

import (
	"bytes"
	"math"
	"math/rand/v2"
	"testing"

	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	"sluice/internal/codec/codectest"
	"sluice/internal/wire"
	sluicev1 "sluice/proto/sluice/v1"
)

func randValues(r *rand.Rand, n int) []float64 {
	v := make([]float64, n)
	for i := range v {
		v[i] = math.Float64frombits(r.Uint64()) // every bit pattern: NaNs, infinities, −0
	}
	return v
}

// randInt32 is 0 half the time (a field proto3 leaves out), else any
// int32, negative included.
func randInt32(r *rand.Rand) int32 {
	if r.IntN(2) == 0 {
		return 0
	}
	return int32(r.Uint32()) >> r.IntN(32)
}

func randInt32s(r *rand.Rand, n int) []int32 {
	v := make([]int32, n)
	for i := range v {
		v[i] = randInt32(r)
	}
	return v
}

// The hand-written Evaluations frame is, byte for byte, what
// proto.Marshal writes for the same message: arrays asked for and not,
// empty ones, negative and zero numbers.
func TestHandFramesMatchProto(t *testing.T) {
	r := rand.New(rand.NewPCG(1, 2))
	for range 2000 {
		e := evalFrame{requestID: r.Uint64() >> r.IntN(64), firstRow: randInt32(r), rows: randInt32(r), dim: randInt32(r)}
		pick := func() []float64 {
			switch r.IntN(3) {
			case 0:
				return nil
			case 1:
				return []float64{}
			}
			return randValues(r, 1+r.IntN(6))
		}
		e.grad, e.logDens, e.hess, e.hvecs = pick(), pick(), pick(), pick()
		want, err := proto.MarshalOptions{Deterministic: true}.Marshal(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{
			Evaluations: &sluicev1.Evaluations{RequestId: e.requestID, FirstRow: e.firstRow, Rows: e.rows, Dim: e.dim,
				Gradients: putFloats(nil, e.grad), LogDensities: putFloats(nil, e.logDens), Hessians: putFloats(nil, e.hess),
				HessianVectors: putFloats(nil, e.hvecs)}}})
		if err != nil {
			t.Fatal(err)
		}
		data, err := sessionCodec.Marshal(&e)
		if err != nil {
			t.Fatal(err)
		}
		if got := data.Materialize(); !bytes.Equal(got, want) {
			t.Fatalf("by hand % x\nproto   % x", got, want)
		}
		data.Free()
	}
}

func randDrawsMsg(r *rand.Rand) *sluicev1.Draws {
	rows := r.IntN(4)
	d := &sluicev1.Draws{Seq: r.Uint64() >> r.IntN(64), Rows: int32(rows), Dim: randInt32(r),
		Values: wire.AppendFloats(nil, randValues(r, r.IntN(8))), Chains: randInt32s(r, rows),
		FromRequestId: r.Uint64() >> r.IntN(64), PointRows: randInt32s(r, r.IntN(3))}
	for range rows {
		d.Iterations = append(d.Iterations, int64(r.Uint64())>>r.IntN(64))
	}
	return d
}

// responseFrames returns encodings of every kind of frame a session
// stream receives, the Points ones in many shapes.
func responseFrames(r *rand.Rand, n int) [][]byte {
	enc := func(m *sluicev1.SessionResponse) []byte {
		b, err := proto.Marshal(m)
		if err != nil {
			panic(err)
		}
		return b
	}
	out := [][]byte{
		nil, // no frame
		enc(&sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Registered{Registered: &sluicev1.Registered{SessionId: "s", Names: []string{"a"}}}}),
		enc(&sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Draws{Draws: randDrawsMsg(r)}}),
		enc(&sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Progress{Progress: &sluicev1.Progress{Steps: 3}}}),
		enc(&sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Finished{Finished: &sluicev1.Finished{Message: "m"}}}),
		enc(&sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Points{Points: &sluicev1.Points{}}}),
		{0x12, 0x02, 0x6a, 0x00},       // points holding an empty Draws frame
		{0x0a, 0x02, 0x52, 0x01, 0xff}, // registered, a string of invalid UTF-8 (proto.Unmarshal refuses it), ...
	}
	out[len(out)-1] = append(out[len(out)-1], enc(&sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Points{
		Points: &sluicev1.Points{Rows: 1}}})...) // ... then points
	for range n {
		rows, dim := r.IntN(4), 1+r.IntN(3)
		p := &sluicev1.Points{RequestId: r.Uint64() >> r.IntN(64), FirstRow: randInt32(r), Rows: int32(rows), Dim: int32(dim),
			Points: wire.AppendFloats(nil, randValues(r, rows*dim)), Chains: randInt32s(r, rows), TotalRows: randInt32(r),
			FullData: r.IntN(2) == 0, Replicates: randInt32(r)}
		for _, q := range []sluicev1.Quantity{1, 2, 3, 4} {
			if r.IntN(2) == 0 {
				p.Quantities = append(p.Quantities, q)
			}
		}
		if r.IntN(3) == 0 {
			p.Vectors = wire.AppendFloats(nil, randValues(r, rows*dim))
		}
		if r.IntN(3) == 0 {
			p.MinibatchGroups = randInt32s(r, rows)
		}
		if r.IntN(2) == 0 {
			p.Draws = randDrawsMsg(r)
		}
		out = append(out, enc(&sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Points{Points: p}}))
	}
	return out
}

// checkResponse receives b in the given pieces and checks that the
// client reads the frame it would have read with proto.Unmarshal (or
// fails as gRPC's proto codec fails); it returns whether the frame was
// read by hand.
func checkResponse(t *testing.T, b []byte, pieces [][]byte) bool {
	t.Helper()
	var x response
	x.HoldBytes(pieces...)
	defer x.Release()
	got, gerr := x.message()
	want := new(sluicev1.SessionResponse)
	werr := proto.Unmarshal(b, want)
	switch {
	case werr != nil:
		if gerr == nil || status.Convert(gerr).Message() != "grpc: failed to unmarshal the received message: "+werr.Error() {
			t.Fatalf("% x: %v, want the error of %v", b, gerr, werr)
		}
		return false
	case gerr != nil:
		t.Fatalf("% x: %v, proto.Unmarshal reads %v", b, gerr, want)
	}
	if got != &x.msg { // left to proto.Unmarshal
		if x.fast || !proto.Equal(got, want) {
			t.Fatalf("% x: %v, want %v", b, got, want)
		}
		return false
	}
	// Read by hand: unknown fields dropped (the client never reads
	// them), the points left where they lie in the frame.
	want = new(sluicev1.SessionResponse)
	if err := (proto.UnmarshalOptions{DiscardUnknown: true}).Unmarshal(b, want); err != nil {
		t.Fatal(err)
	}
	c := proto.Clone(got).(*sluicev1.SessionResponse)
	if p := got.GetPoints(); p != nil {
		pts := x.pointsOf(p)
		if p.Points != nil || !x.fast || pts.f == nil {
			t.Fatalf("% x: points read by hand as %v, not left in the frame", b, got)
		}
		vals, err := pts.decode(nil)
		if wp := want.GetPoints().GetPoints(); len(wp)%8 == 0 {
			if err != nil || !bytes.Equal(wire.AppendFloats(nil, vals), wp) {
				t.Fatalf("% x: points % x (%v), want % x", b, wire.AppendFloats(nil, vals), err, wp)
			}
		} else if pts.size() != len(wp) || err == nil {
			t.Fatalf("% x: points of %d bytes, %v; want %d bytes, an error", b, pts.size(), err, len(wp))
		}
		c.GetPoints().Points = want.GetPoints().GetPoints()
	} else if x.fast {
		t.Fatalf("% x: read by hand as %v, yet points are looked for in the frame", b, got)
	}
	if !proto.Equal(c, want) {
		t.Fatalf("% x: read by hand as %v, want %v", b, c, want)
	}
	return true
}

// The client reads every frame as proto.Unmarshal reads it, whether it
// reads it by hand (Points and Draws frames) or not, in one piece or in many, on
// encodings rewritten in every way the protobuf encoding allows and on
// broken ones.
func TestPointsParserMatchesProto(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	bases := responseFrames(r, 40)
	for i, b := range bases {
		fast := checkResponse(t, b, [][]byte{b})
		if want := i == 2 || i >= 5 && i != 7; fast != want {
			t.Fatalf("frame %d (% x): read by hand %v, want %v", i, b, fast, want)
		}
		for range 10 {
			if checkResponse(t, b, codectest.Pieces(r, b)) != fast {
				t.Fatalf("frame %d: read by hand in one piece but not in several, or the reverse", i)
			}
		}
	}
	fast := 0
	const n = 4000
	for i := range n {
		b := codectest.Scramble(r, bases[i%len(bases)], 3)
		if checkResponse(t, b, codectest.Pieces(r, b)) {
			fast++
		}
	}
	if fast < n/4 {
		t.Fatalf("only %d of %d scrambled frames read by hand", fast, n)
	}
}

// FuzzPointsParser: the client reads any frame, in any pieces, as
// proto.Unmarshal reads it (TestPointsParserMatchesProto). Run with
//
//	go test -run XXX -fuzz '^FuzzPointsParser$' -fuzztime 20000x ./client/
func FuzzPointsParser(f *testing.F) {
	for i, b := range responseFrames(rand.New(rand.NewPCG(5, 6)), 6) {
		f.Add(b, uint64(i))
	}
	f.Fuzz(func(t *testing.T, b []byte, seed uint64) {
		checkResponse(t, b, codectest.Pieces(rand.New(rand.NewPCG(seed, 7)), b))
	})
}
