package server

import (
	"bytes"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	"sluice/internal/codec"
	"sluice/internal/codec/codectest"
	"sluice/internal/wire"
	"sluice/kernels"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
)

func randFloats(r *rand.Rand, n int) []float64 {
	v := make([]float64, n)
	for i := range v {
		v[i] = math.Float64frombits(r.Uint64()) // every bit pattern: NaNs, infinities, −0
	}
	return v
}

// randInt is 0 half the time (a field proto3 leaves out), else any int
// an engine frame may hold, negative and beyond 32 bits included.
func randInt(r *rand.Rand) int {
	switch r.IntN(4) {
	case 0, 1:
		return 0
	case 2:
		return r.IntN(300)
	}
	return int(int64(r.Uint64()) >> r.IntN(64))
}

func randInts(r *rand.Rand, n int) []int {
	v := make([]int, n)
	for i := range v {
		v[i] = randInt(r)
	}
	return v
}

func randDraws(r *rand.Rand) *session.Draws {
	rows, dim := r.IntN(4), 1+r.IntN(3)
	d := &session.Draws{Seq: r.Uint64() >> r.IntN(64), Rows: rows, Dim: dim, Values: randFloats(r, r.IntN(rows+1)*dim),
		Chains: randInts(r, rows), Iterations: make([]int64, rows), FromRequestID: r.Uint64() >> r.IntN(64)}
	for i := range d.Iterations {
		d.Iterations[i] = int64(r.Uint64()) >> r.IntN(64)
	}
	switch r.IntN(3) {
	case 0:
		d.PointRows = randInts(r, rows)
	case 1:
		d.PointRows = []int{} // set but empty: from_request_id still goes out
	}
	return d
}

func randPoints(r *rand.Rand) *session.Points {
	rows, dim := r.IntN(4), 1+r.IntN(3)
	p := &session.Points{RequestID: r.Uint64() >> r.IntN(64), FirstRow: randInt(r), Rows: rows, TotalRows: randInt(r), Dim: dim,
		Points: randFloats(r, rows*dim), Chains: randInts(r, rows), Need: kernels.Need(r.IntN(16)),
		FullData: r.IntN(2) == 0, Replicates: randInt(r)}
	if r.IntN(2) == 0 {
		p.Vectors = randFloats(r, rows*dim)
	}
	if r.IntN(2) == 0 {
		p.Groups = randInts(r, rows)
	}
	if r.IntN(2) == 0 {
		p.Draws = randDraws(r)
	}
	return p
}

// The hand-written Points and Draws frames are, byte for byte, what
// proto.Marshal writes for the messages encoder.frame builds from the same
// engine frames (which the Python and C++ clients read with their
// protobuf runtimes): every field, zero values left out, negative and
// 64-bit values, a nested Draws frame, NaN payloads.
func TestHandFramesMatchProto(t *testing.T) {
	r := rand.New(rand.NewPCG(7, 8))
	c := codec.New(nil)
	for i := range 2000 {
		var f session.Frame = randPoints(r)
		if i%3 == 0 {
			f = randDraws(r)
		}
		var e encoder
		want, err := proto.MarshalOptions{Deterministic: true}.Marshal(e.frame(f))
		if err != nil {
			t.Fatal(err)
		}
		m := e.message(f)
		if _, ok := m.(codec.Sender); !ok {
			t.Fatalf("%T is not sent by hand", f)
		}
		data, err := c.Marshal(m)
		if err != nil {
			t.Fatal(err)
		}
		if got := data.Materialize(); !bytes.Equal(got, want) {
			t.Fatalf("frame %d (%T):\nby hand % x\nproto   % x", i, f, got, want)
		}
		data.Free()
	}
}

// referenceMessage is what the session's reader made of a frame before
// the codec: proto.Unmarshal (its failure reported as gRPC's codec
// reports it), the checks against the limits (the size being the bytes
// received), then messageFromWire.
func referenceMessage(b []byte, l answerLimits, gradBuf *[]float64) session.Message {
	var f sluicev1.SessionRequest
	if err := proto.Unmarshal(b, &f); err != nil {
		return session.Message{Err: recvError("evaluations",
			status.Errorf(codes.Internal, "grpc: failed to unmarshal the received message: %v", err))}
	}
	size := int64(len(b))
	switch {
	case size > l.limit:
		return session.Message{Err: &session.Error{Kind: session.TooLarge, Field: "evaluations", Chain: -1, Coord: -1,
			Reason: fmt.Sprintf("message of %d bytes exceeds the session's limit of %d bytes", size, l.limit)}}
	case len(f.GetEvaluations().GetGradients()) > 8*l.maxGrad:
		return session.Message{Err: session.BadField("evaluations.gradients",
			"carries %d values, more than any answer part of this session holds (%d: rows × replicates declared at registration (%d) × dim)",
			len(f.GetEvaluations().GetGradients())/8, l.maxGrad, l.replicates)}
	case size > l.maxFrame:
		return session.Message{Err: &session.Error{Kind: session.TooLarge, Field: "evaluations", Chain: -1, Coord: -1,
			Reason: fmt.Sprintf("message of %d bytes exceeds the largest answer this session needs (%d bytes; the message limit is %d)",
				size, l.maxFrame, l.limit)}}
	}
	return messageFromWire(&f, gradBuf)
}

// sameFloats compares bit patterns (NaNs included).
func sameFloats(a, b []float64) bool {
	if len(a) != len(b) || (a == nil) != (b == nil) {
		return false
	}
	for i := range a {
		if math.Float64bits(a[i]) != math.Float64bits(b[i]) {
			return false
		}
	}
	return true
}

// sameMessage reports how two engine messages differ ("" when they do
// not).
func sameMessage(a, b session.Message) string {
	if fmt.Sprint(a.Err) != fmt.Sprint(b.Err) || status.Code(a.Err) != status.Code(b.Err) {
		return fmt.Sprintf("error %v, want %v", a.Err, b.Err)
	}
	if se, ok := session.AsError(a.Err); ok {
		if we, _ := session.AsError(b.Err); we == nil || *se != *we {
			return fmt.Sprintf("error %+v, want %+v", a.Err, b.Err)
		}
	}
	if a.Stop != b.Stop || a.StopReason != b.StopReason || a.Shutdown != b.Shutdown || (a.Evaluations == nil) != (b.Evaluations == nil) {
		return fmt.Sprintf("%+v, want %+v", a, b)
	}
	if e, w := a.Evaluations, b.Evaluations; e != nil {
		if e.RequestID != w.RequestID || e.FirstRow != w.FirstRow || e.Rows != w.Rows || e.Dim != w.Dim ||
			!sameFloats(e.Grad, w.Grad) || !sameFloats(e.LogDensity, w.LogDensity) ||
			!sameFloats(e.Hessian, w.Hessian) || !sameFloats(e.HessVec, w.HessVec) {
			return fmt.Sprintf("evaluations %+v, want %+v", e, w)
		}
	}
	return ""
}

// checkAnswer receives b in the given pieces and checks that the reader
// makes of it what it made before the codec (referenceMessage), under
// limits l; it returns whether the frame was read by hand.
func checkAnswer(t *testing.T, b []byte, pieces [][]byte, l answerLimits) bool {
	t.Helper()
	var req request
	req.HoldBytes(pieces...)
	var buf, refBuf []float64
	got := req.message(l, &buf)
	fast := req.fast
	want := referenceMessage(b, l, &refBuf)
	if d := sameMessage(got, want); d != "" {
		t.Fatalf("% x in %d pieces (read by hand: %v): %s", b, len(pieces), fast, d)
	}
	if fast { // only what proto.Unmarshal reads as an Evaluations frame
		var f sluicev1.SessionRequest
		if proto.Unmarshal(b, &f) != nil || f.GetEvaluations() == nil {
			t.Fatalf("% x read by hand, but proto.Unmarshal reads %v", b, &f)
		}
	}
	req.Release()
	return fast
}

// answerFrames are encodings a hand parser must read as proto.Unmarshal
// does, each with what it exercises.
func answerFrames() map[string][]byte {
	ev := func(e *sluicev1.Evaluations) []byte {
		b, _ := proto.Marshal(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{Evaluations: e}})
		return b
	}
	cat := func(bs ...[]byte) []byte { return bytes.Join(bs, nil) }
	grads := wire.AppendFloats(nil, []float64{1, -2, math.NaN(), math.Inf(1), 5, 6})
	full := ev(&sluicev1.Evaluations{RequestId: 9, FirstRow: 2, Rows: 3, Dim: 2, Gradients: grads,
		LogDensities: wire.AppendFloats(nil, []float64{1, 2, 3}), Hessians: wire.AppendFloats(nil, make([]float64, 12)),
		HessianVectors: wire.AppendFloats(nil, []float64{7, 8, 9, 10, 11, 12})})
	stop, _ := proto.Marshal(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Stop{Stop: &sluicev1.Stop{Reason: "done"}}})
	badStop := []byte{0x1a, 0x03, 0x0a, 0x01, 0xff} // stop.reason of invalid UTF-8
	// The Evaluations message alone (no outer tag), to wrap by hand.
	inner := full[2:]
	wrap := func(b []byte) []byte { return append([]byte{0x12, byte(len(b))}, b...) }
	return map[string][]byte{
		"every field":         full,
		"negative first row":  ev(&sluicev1.Evaluations{RequestId: 1, FirstRow: -5, Rows: 1, Dim: 1, Gradients: grads[:8]}),
		"empty evaluations":   ev(&sluicev1.Evaluations{}),
		"empty frame":         nil,
		"stop":                stop,
		"evaluations, stop":   cat(full, stop),
		"stop, evaluations":   cat(stop, full),
		"bad stop, then eval": cat(badStop, full),
		"twice, merged":       cat(ev(&sluicev1.Evaluations{RequestId: 4, Gradients: grads}), ev(&sluicev1.Evaluations{Rows: 3, Dim: 2})),
		"scalars repeated": wrap(cat(inner, []byte{0x08, 0x63, 0x18, 0x01},
			[]byte{0x2a, 0x08, 0, 0, 0, 0, 0, 0, 0xf0, 0x3f})), // request_id 99, rows 1, gradients [1]
		"gradients of 7 bytes":        ev(&sluicev1.Evaluations{Rows: 1, Dim: 1, Gradients: make([]byte, 7)}),
		"hessians of 9 bytes":         ev(&sluicev1.Evaluations{Rows: 1, Dim: 1, Gradients: grads[:8], Hessians: make([]byte, 9)}),
		"unknown fields":              cat([]byte{0xa0, 0x06, 0x05, 0x0b, 0x08, 0x01, 0x0c}, wrap(cat([]byte{0xb5, 0x06, 1, 2, 3, 4}, inner))),
		"wrong wire type for rows":    wrap(cat(inner, []byte{0x1d, 1, 0, 0, 0})),
		"wrong wire type for frame":   cat([]byte{0x10, 0x05}, full),
		"wrong wire type, gradients":  wrap(cat(inner, []byte{0x28, 0x01})),
		"field number 0":              cat(full, []byte{0x00, 0x01}),
		"end group without a group":   cat(full, []byte{0x0c}),
		"truncated":                   full[:len(full)-3],
		"length beyond the end":       cat([]byte{0x12, 0x7f}, inner),
		"nested length beyond":        wrap([]byte{0x2a, 0x20, 1, 2}),
		"varint of eleven bytes":      wrap([]byte{0x08, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0x01}),
		"non-minimal tag":             cat([]byte{0x92, 0x00, byte(len(inner))}, inner),
		"field number above 2^29 − 1": cat(full, []byte{0xf8, 0xff, 0xff, 0xff, 0x0f, 0x01}),
	}
}

// The reader makes of every frame, read by hand or not, the engine
// message (or the error, with its status and named field) that it made
// with proto.Unmarshal; the hand parser takes the Evaluations frames, in
// one piece or in many, and leaves the rest to proto.Unmarshal.
func TestAnswerParserMatchesProto(t *testing.T) {
	r := rand.New(rand.NewPCG(9, 10))
	wide := answerLimits{limit: 1 << 20, maxFrame: 1 << 20, maxGrad: 1 << 16, replicates: 1}
	for name, b := range answerFrames() {
		t.Run(name, func(t *testing.T) {
			fast := checkAnswer(t, b, [][]byte{b}, wide)
			for range 30 {
				if checkAnswer(t, b, codectest.Pieces(r, b), wide) != fast {
					t.Fatal("read by hand in one piece but not in several, or the reverse")
				}
			}
			if want := name == "every field" || name == "twice, merged" || name == "empty evaluations"; want && !fast {
				t.Fatal("an Evaluations frame not read by hand")
			}
			for _, l := range []answerLimits{
				{limit: 20, maxFrame: 20, maxGrad: 100, replicates: 1},
				{limit: 1 << 20, maxFrame: 1 << 20, maxGrad: 2, replicates: 2},
				{limit: 1 << 20, maxFrame: 30, maxGrad: 100, replicates: 1},
			} {
				checkAnswer(t, b, codectest.Pieces(r, b), l)
			}
		})
	}
	bases := make([][]byte, 0, 8)
	for _, b := range answerFrames() {
		bases = append(bases, b)
	}
	fast := 0
	const n = 4000
	for i := range n {
		b := codectest.Scramble(r, bases[i%len(bases)], 2)
		l := wide
		if i%5 == 0 {
			l = answerLimits{limit: int64(r.IntN(200)), maxFrame: int64(r.IntN(200)), maxGrad: r.IntN(10), replicates: 1}
		}
		if checkAnswer(t, b, codectest.Pieces(r, b), l) {
			fast++
		}
	}
	if fast < n/10 {
		t.Fatalf("only %d of %d scrambled frames read by hand", fast, n)
	}
}

// FuzzAnswerParser: the session's reader makes of any frame, in any
// pieces, what it made with proto.Unmarshal (TestAnswerParserMatchesProto).
// Run with
//
//	go test -run XXX -fuzz '^FuzzAnswerParser$' -fuzztime 20000x ./server/
func FuzzAnswerParser(f *testing.F) {
	for _, b := range answerFrames() {
		f.Add(b, uint64(len(b)), uint8(0))
	}
	f.Fuzz(func(t *testing.T, b []byte, seed uint64, lim uint8) {
		l := answerLimits{limit: 1 << 20, maxFrame: 1 << 20, maxGrad: 1 << 16, replicates: 1}
		if lim > 0 {
			l = answerLimits{limit: int64(lim), maxFrame: int64(lim) / 2, maxGrad: int(lim % 16), replicates: 1}
		}
		checkAnswer(t, b, codectest.Pieces(rand.New(rand.NewPCG(seed, 11)), b), l)
	})
}
