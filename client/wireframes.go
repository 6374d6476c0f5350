package client

import (
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/mem"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	"sluice/internal/codec"
	"sluice/internal/wire"
	sluicev1 "sluice/proto/sluice/v1"
)

// The hot frames of a session stream, by hand (internal/codec): a Points
// frame is read where gRPC received it and its points decoded from there
// straight into the held request (hold); an Evaluations frame is written
// straight from the batch into the send buffer. Everything else goes
// through proto.Unmarshal and proto.Marshal. The bytes are the same
// protobuf either way (TestHandFramesMatchProto,
// TestPointsParserMatchesProto, FuzzPointsParser).

// sessionCodec is the codec of Run's session streams.
var sessionCodec = codec.New(nil)

// withCodec is the call option that puts it on a stream.
func withCodec() grpc.CallOption { return grpc.ForceCodecV2(sessionCodec) }

// Field numbers of sluice.proto that the hand code reads or writes.
const (
	fieldResponseRegistered protowire.Number = 1 // SessionResponse.registered
	fieldResponsePoints     protowire.Number = 2 // SessionResponse.points
	fieldResponseDraws      protowire.Number = 3 // SessionResponse.draws
	fieldResponseProgress   protowire.Number = 4 // SessionResponse.progress
	fieldResponseFinished   protowire.Number = 5 // SessionResponse.finished

	fieldRequestEvaluations protowire.Number = 2 // SessionRequest.evaluations
)

// Points fields.
const (
	pointsRequestID protowire.Number = iota + 1
	pointsFirstRow
	pointsRows
	pointsDim
	pointsPoints
	pointsChains
	pointsQuantities
	pointsTotalRows
	pointsVectors
	pointsMinibatchGroups
	pointsFullData
	pointsReplicates
	pointsDraws
)

// Draws fields.
const (
	drawsSeq protowire.Number = iota + 1
	drawsRows
	drawsDim
	drawsValues
	drawsChains
	drawsIterations
	drawsFromRequestID
	drawsPointRows
)

// Evaluations fields.
const (
	evalRequestID protowire.Number = iota + 1
	evalFirstRow
	evalRows
	evalDim
	evalGradients
	evalLogDensities
	evalHessians
	evalHessianVectors
)

// response is one frame received on a session stream, held where gRPC
// received it (codec.Frame). A Points frame is read by hand into points,
// whose Points field stays empty: its bytes are pts, read by hold; the
// other arrays (vectors, a carried Draws frame's values) are copied out.
// A Draws frame is read by hand into draws. msg, points, draws and their
// slices are reused: valid until the next frame.
type response struct {
	codec.Frame
	msg        sluicev1.SessionResponse
	wrapPoints sluicev1.SessionResponse_Points
	wrapDraws  sluicev1.SessionResponse_Draws
	points     sluicev1.Points
	draws      sluicev1.Draws
	// fast says points holds the frame; pts is where its points lie.
	fast bool
	pts  codec.Span
	// Storage reused by points and draws.
	chains, groups, drawChains, pointRows []int32
	quantities                            []sluicev1.Quantity
	iterations                            []int64
	vectors, values                       []byte
}

// Hold implements codec.Receiver.
func (x *response) Hold(data mem.BufferSlice) {
	x.Frame.Hold(data)
	x.fast = false
}

// Release implements codec.Frame's Release: the frame read by hand goes
// with the buffers.
func (x *response) Release() {
	x.Frame.Release()
	x.fast = false
}

// message returns the frame: read by hand when it is a Points frame,
// else by proto.Unmarshal (into a new message, which the caller may keep).
func (x *response) message() (*sluicev1.SessionResponse, error) {
	if x.parse() {
		x.fast = x.msg.GetPoints() != nil
		return &x.msg, nil
	}
	m := new(sluicev1.SessionResponse)
	err := proto.Unmarshal(x.Bytes(), m)
	x.Release()
	if err != nil {
		// What gRPC's own codec would have answered.
		return nil, status.Errorf(codes.Internal, "grpc: failed to unmarshal the received message: %v", err)
	}
	return m, nil
}

// pointsOf returns the points array of p: where it lies in the frame
// received when p is the frame read by hand, else p's bytes.
func (x *response) pointsOf(p *sluicev1.Points) wireArray {
	if x.fast && p == &x.points {
		return wireArray{f: &x.Frame, s: x.pts}
	}
	return wireArray{b: p.GetPoints()}
}

// parse reads a SessionResponse whose frame is points or draws, as
// proto.Unmarshal would (fields in any order, unknown ones skipped, the
// last occurrence of a scalar or an array kept, repeated fields appended,
// messages given twice merged), into x.msg; false for anything else
// (another frame, both, none, input proto.Unmarshal may refuse), which
// proto.Unmarshal then reads.
func (x *response) parse() bool {
	x.points = sluicev1.Points{}
	x.draws = sluicev1.Draws{}
	x.chains, x.groups, x.quantities = x.chains[:0], x.groups[:0], x.quantities[:0]
	x.drawChains, x.pointRows, x.iterations = x.drawChains[:0], x.pointRows[:0], x.iterations[:0]
	var p pointsParse
	var frame protowire.Number // the member of the oneof read
	c := x.Cursor()
	for !c.Done() {
		num, typ, err := c.Tag()
		if err != nil {
			return false
		}
		switch {
		case typ == protowire.BytesType && (num == fieldResponsePoints || num == fieldResponseDraws):
			if frame != 0 && frame != num {
				return false // the oneof set twice, to different frames
			}
			frame = num
			s, err := c.Bytes()
			if err != nil {
				return false
			}
			if num == fieldResponsePoints && !x.mergePoints(s, &p) || num == fieldResponseDraws && !x.mergeDraws(s, &p) {
				return false
			}
		case typ == protowire.BytesType && (num == fieldResponseRegistered || num == fieldResponseProgress || num == fieldResponseFinished):
			return false // another frame of the oneof
		default:
			if c.Skip(num, typ) != nil {
				return false
			}
		}
	}
	switch frame {
	case fieldResponsePoints:
		x.pts = p.points
		x.points.Chains, x.points.Quantities, x.points.MinibatchGroups = x.chains, x.quantities, x.groups
		if p.vectors.Len > 0 {
			x.vectors = x.AppendBytes(x.vectors[:0], p.vectors)
			x.points.Vectors = x.vectors
		}
		if p.draws {
			x.points.Draws = &x.draws
		}
		x.wrapPoints.Points = &x.points
		x.msg.Frame = &x.wrapPoints
	case fieldResponseDraws:
		x.wrapDraws.Draws = &x.draws
		x.msg.Frame = &x.wrapDraws
	default:
		return false
	}
	x.draws.Chains, x.draws.Iterations, x.draws.PointRows = x.drawChains, x.iterations, x.pointRows
	if p.values.Len > 0 {
		x.values = x.AppendBytes(x.values[:0], p.values)
		x.draws.Values = x.values
	}
	return true
}

// pointsParse is where a Points frame's arrays lie, and whether it holds
// a Draws frame.
type pointsParse struct {
	points, vectors, values codec.Span
	draws                   bool
}

// mergePoints reads the Points message at s into x.points.
func (x *response) mergePoints(s codec.Span, p *pointsParse) bool {
	c := x.Sub(s)
	pt := &x.points
	for !c.Done() {
		num, typ, err := c.Tag()
		if err != nil {
			return false
		}
		known := true
		switch {
		case typ == protowire.VarintType && (num == pointsRequestID || num == pointsFirstRow || num == pointsRows ||
			num == pointsDim || num == pointsTotalRows || num == pointsFullData || num == pointsReplicates):
			v, err := c.Varint()
			if err != nil {
				return false
			}
			switch num {
			case pointsRequestID:
				pt.RequestId = v
			case pointsFirstRow:
				pt.FirstRow = int32(v)
			case pointsRows:
				pt.Rows = int32(v)
			case pointsDim:
				pt.Dim = int32(v)
			case pointsTotalRows:
				pt.TotalRows = int32(v)
			case pointsFullData:
				pt.FullData = protowire.DecodeBool(v)
			case pointsReplicates:
				pt.Replicates = int32(v)
			}
		case typ == protowire.BytesType && (num == pointsPoints || num == pointsVectors || num == pointsDraws):
			sp, err := c.Bytes()
			if err != nil {
				return false
			}
			switch num {
			case pointsPoints:
				p.points = sp
			case pointsVectors:
				p.vectors = sp
			case pointsDraws:
				p.draws = true
				if !x.mergeDraws(sp, p) {
					return false
				}
			}
		case num == pointsChains:
			x.chains, known, err = codec.Varints(&c, typ, x.chains)
		case num == pointsQuantities:
			x.quantities, known, err = codec.Varints(&c, typ, x.quantities)
		case num == pointsMinibatchGroups:
			x.groups, known, err = codec.Varints(&c, typ, x.groups)
		default:
			known = false
		}
		if err == nil && !known {
			err = c.Skip(num, typ)
		}
		if err != nil {
			return false
		}
	}
	return true
}

// mergeDraws reads the Draws message at s into x.draws.
func (x *response) mergeDraws(s codec.Span, p *pointsParse) bool {
	c := x.Sub(s)
	d := &x.draws
	for !c.Done() {
		num, typ, err := c.Tag()
		if err != nil {
			return false
		}
		known := true
		switch {
		case typ == protowire.VarintType && (num == drawsSeq || num == drawsRows || num == drawsDim || num == drawsFromRequestID):
			v, err := c.Varint()
			if err != nil {
				return false
			}
			switch num {
			case drawsSeq:
				d.Seq = v
			case drawsRows:
				d.Rows = int32(v)
			case drawsDim:
				d.Dim = int32(v)
			case drawsFromRequestID:
				d.FromRequestId = v
			}
		case typ == protowire.BytesType && num == drawsValues:
			if p.values, err = c.Bytes(); err != nil {
				return false
			}
		case num == drawsChains:
			x.drawChains, known, err = codec.Varints(&c, typ, x.drawChains)
		case num == drawsIterations:
			x.iterations, known, err = codec.Varints(&c, typ, x.iterations)
		case num == drawsPointRows:
			x.pointRows, known, err = codec.Varints(&c, typ, x.pointRows)
		default:
			known = false
		}
		if err == nil && !known {
			err = c.Skip(num, typ)
		}
		if err != nil {
			return false
		}
	}
	return true
}

// wireArray is a float array as received: bytes of a decoded message (b),
// or a span of a frame held as received (f, s).
type wireArray struct {
	b []byte
	f *codec.Frame
	s codec.Span
}

// size is the array's length in bytes.
func (w wireArray) size() int {
	if w.f != nil {
		return w.s.Len
	}
	return len(w.b)
}

// decode appends the array's values to dst (see wire.DecodeFloats).
func (w wireArray) decode(dst []float64) ([]float64, error) {
	if w.f != nil {
		return w.f.AppendFloats(dst, w.s)
	}
	return wire.DecodeFloats(dst, w.b)
}

// evalFrame is a SessionRequest carrying an Evaluations frame, as a
// codec.Sender written straight from the batch's arrays (nil: not sent).
type evalFrame struct {
	requestID                  uint64
	firstRow, rows, dim        int32
	grad, logDens, hess, hvecs []float64
}

func (e *evalFrame) size() int {
	return codec.SizeVarint(evalRequestID, e.requestID) + codec.SizeVarint(evalFirstRow, uint64(e.firstRow)) +
		codec.SizeVarint(evalRows, uint64(e.rows)) + codec.SizeVarint(evalDim, uint64(e.dim)) +
		codec.SizeFloats(evalGradients, len(e.grad)) + codec.SizeFloats(evalLogDensities, len(e.logDens)) +
		codec.SizeFloats(evalHessians, len(e.hess)) + codec.SizeFloats(evalHessianVectors, len(e.hvecs))
}

// WireSize implements codec.Sender.
func (e *evalFrame) WireSize() int { return codec.SizeMessage(fieldRequestEvaluations, e.size()) }

// AppendWire implements codec.Sender.
func (e *evalFrame) AppendWire(b []byte) []byte {
	b = codec.AppendMessageHeader(b, fieldRequestEvaluations, e.size())
	b = codec.AppendVarint(b, evalRequestID, e.requestID)
	b = codec.AppendVarint(b, evalFirstRow, uint64(e.firstRow))
	b = codec.AppendVarint(b, evalRows, uint64(e.rows))
	b = codec.AppendVarint(b, evalDim, uint64(e.dim))
	b = codec.AppendFloats(b, evalGradients, e.grad)
	b = codec.AppendFloats(b, evalLogDensities, e.logDens)
	b = codec.AppendFloats(b, evalHessians, e.hess)
	return codec.AppendFloats(b, evalHessianVectors, e.hvecs)
}
