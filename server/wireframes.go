package server

import (
	"fmt"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/mem"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	"sluice/internal/codec"
	"sluice/kernels"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
)

// The hot frames of a session, by hand (internal/codec): Points and Draws
// written straight from the engine's frames into the send buffer, and an
// Evaluations frame read in place from the buffers gRPC received it in.
// The bytes are those of proto.Marshal of the messages encoder.frame
// builds (TestHandFramesMatchProto), and a received frame reads as
// proto.Unmarshal reads it (TestAnswerParserMatchesProto, FuzzAnswerParser).

// Field numbers of sluice.proto that the hand code writes or reads.
const (
	fieldResponsePoints protowire.Number = 2 // SessionResponse.points
	fieldResponseDraws  protowire.Number = 3 // SessionResponse.draws

	fieldRequestRegister    protowire.Number = 1 // SessionRequest.register
	fieldRequestEvaluations protowire.Number = 2 // SessionRequest.evaluations
	fieldRequestStop        protowire.Number = 3 // SessionRequest.stop
	fieldRequestResume      protowire.Number = 4 // SessionRequest.resume
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

// quantityOrder is the order of a Points frame's quantities.
var quantityOrder = [...]struct {
	need kernels.Need
	q    sluicev1.Quantity
}{
	{kernels.NeedGradient, sluicev1.Quantity_QUANTITY_GRADIENT},
	{kernels.NeedLogDensity, sluicev1.Quantity_QUANTITY_LOG_DENSITY},
	{kernels.NeedHessian, sluicev1.Quantity_QUANTITY_HESSIAN},
	{kernels.NeedHessianVector, sluicev1.Quantity_QUANTITY_HESSIAN_VECTOR},
}

// quantities appends the quantities need asks for to dst.
func quantities[T ~int32 | ~int](dst []T, need kernels.Need) []T {
	for _, x := range quantityOrder {
		if need.Has(x.need) {
			dst = append(dst, T(x.q))
		}
	}
	return dst
}

// pointsFrame is a SessionResponse carrying a Points frame, as a
// codec.Sender; set fills it, and it is valid while p is.
type pointsFrame struct {
	p       *session.Points
	q       [len(quantityOrder)]int
	nq      int
	vectors []float64
	// body and draws are the lengths of the Points message and of its
	// nested Draws message.
	body, draws int
}

func (f *pointsFrame) set(p *session.Points) {
	f.p = p
	f.nq = len(quantities(f.q[:0], p.Need))
	f.vectors = nil
	if p.Need.Has(kernels.NeedHessianVector) {
		f.vectors = p.Vectors
	}
	f.draws = 0
	if p.Draws != nil {
		f.draws = drawsSize(p.Draws)
	}
	f.body = f.size()
}

func (f *pointsFrame) size() int {
	p := f.p
	n := codec.SizeVarint(pointsRequestID, p.RequestID) + codec.SizeVarint(pointsFirstRow, codec.Int32(p.FirstRow)) +
		codec.SizeVarint(pointsRows, codec.Int32(p.Rows)) + codec.SizeVarint(pointsDim, codec.Int32(p.Dim)) +
		codec.SizeFloats(pointsPoints, len(p.Points)) + codec.SizeInt32s(pointsChains, p.Chains) +
		codec.SizeInt32s(pointsQuantities, f.q[:f.nq]) + codec.SizeVarint(pointsTotalRows, codec.Int32(p.TotalRows)) +
		codec.SizeFloats(pointsVectors, len(f.vectors)) + codec.SizeInt32s(pointsMinibatchGroups, p.Groups) +
		codec.SizeBool(pointsFullData, p.FullData) + codec.SizeVarint(pointsReplicates, codec.Int32(p.Replicates))
	if p.Draws != nil {
		n += codec.SizeMessage(pointsDraws, f.draws)
	}
	return n
}

// WireSize implements codec.Sender.
func (f *pointsFrame) WireSize() int { return codec.SizeMessage(fieldResponsePoints, f.body) }

// AppendWire implements codec.Sender.
func (f *pointsFrame) AppendWire(b []byte) []byte {
	p := f.p
	b = codec.AppendMessageHeader(b, fieldResponsePoints, f.body)
	b = codec.AppendVarint(b, pointsRequestID, p.RequestID)
	b = codec.AppendVarint(b, pointsFirstRow, codec.Int32(p.FirstRow))
	b = codec.AppendVarint(b, pointsRows, codec.Int32(p.Rows))
	b = codec.AppendVarint(b, pointsDim, codec.Int32(p.Dim))
	b = codec.AppendFloats(b, pointsPoints, p.Points)
	b = codec.AppendInt32s(b, pointsChains, p.Chains)
	b = codec.AppendInt32s(b, pointsQuantities, f.q[:f.nq])
	b = codec.AppendVarint(b, pointsTotalRows, codec.Int32(p.TotalRows))
	b = codec.AppendFloats(b, pointsVectors, f.vectors)
	b = codec.AppendInt32s(b, pointsMinibatchGroups, p.Groups)
	b = codec.AppendBool(b, pointsFullData, p.FullData)
	b = codec.AppendVarint(b, pointsReplicates, codec.Int32(p.Replicates))
	if p.Draws != nil {
		b = codec.AppendMessageHeader(b, pointsDraws, f.draws)
		b = appendDraws(b, p.Draws)
	}
	return b
}

// drawsFrame is a SessionResponse carrying a Draws frame, as a
// codec.Sender; set fills it, and it is valid while d is.
type drawsFrame struct {
	d    *session.Draws
	body int
}

func (f *drawsFrame) set(d *session.Draws) { f.d, f.body = d, drawsSize(d) }

// WireSize implements codec.Sender.
func (f *drawsFrame) WireSize() int { return codec.SizeMessage(fieldResponseDraws, f.body) }

// AppendWire implements codec.Sender.
func (f *drawsFrame) AppendWire(b []byte) []byte {
	return appendDraws(codec.AppendMessageHeader(b, fieldResponseDraws, f.body), f.d)
}

// drawsSize is the length of the Draws message of d.
func drawsSize(d *session.Draws) int {
	n := codec.SizeVarint(drawsSeq, d.Seq) + codec.SizeVarint(drawsRows, codec.Int32(d.Rows)) +
		codec.SizeVarint(drawsDim, codec.Int32(d.Dim)) + codec.SizeFloats(drawsValues, len(d.Values)) +
		codec.SizeInt32s(drawsChains, d.Chains) + codec.SizeInt64s(drawsIterations, d.Iterations)
	if d.PointRows != nil {
		n += codec.SizeVarint(drawsFromRequestID, d.FromRequestID) + codec.SizeInt32s(drawsPointRows, d.PointRows)
	}
	return n
}

// appendDraws appends the Draws message of d.
func appendDraws(b []byte, d *session.Draws) []byte {
	b = codec.AppendVarint(b, drawsSeq, d.Seq)
	b = codec.AppendVarint(b, drawsRows, codec.Int32(d.Rows))
	b = codec.AppendVarint(b, drawsDim, codec.Int32(d.Dim))
	b = codec.AppendFloats(b, drawsValues, d.Values)
	b = codec.AppendInt32s(b, drawsChains, d.Chains)
	b = codec.AppendInt64s(b, drawsIterations, d.Iterations)
	if d.PointRows != nil {
		b = codec.AppendVarint(b, drawsFromRequestID, d.FromRequestID)
		b = codec.AppendInt32s(b, drawsPointRows, d.PointRows)
	}
	return b
}

// answerView is an Evaluations frame as it lies in a received frame: its
// numbers read, its arrays where they lie.
type answerView struct {
	requestID           uint64
	firstRow, rows, dim int32
	grad, logDens       codec.Span
	hess, hessVec       codec.Span
}

// parseAnswer reads a SessionRequest whose frame is evaluations, as
// proto.Unmarshal would: fields in any order, unknown ones skipped, a
// scalar or array given twice taken from its last occurrence, the
// evaluations message given twice merged. ok is false for anything else
// (another frame, none, or input proto.Unmarshal may refuse): the caller
// then leaves the frame to proto.Unmarshal.
func parseAnswer(f *codec.Frame) (v answerView, ok bool) {
	c := f.Cursor()
	for !c.Done() {
		num, typ, err := c.Tag()
		if err != nil {
			return v, false
		}
		switch {
		case num == fieldRequestEvaluations && typ == protowire.BytesType:
			s, err := c.Bytes()
			if err != nil || !v.merge(f, s) {
				return v, false
			}
			ok = true
		case typ == protowire.BytesType && (num == fieldRequestRegister || num == fieldRequestStop || num == fieldRequestResume):
			return v, false // another frame of the oneof
		default:
			if c.Skip(num, typ) != nil {
				return v, false
			}
		}
	}
	return v, ok
}

// merge reads the Evaluations message at s into v.
func (v *answerView) merge(f *codec.Frame, s codec.Span) bool {
	c := f.Sub(s)
	for !c.Done() {
		num, typ, err := c.Tag()
		if err != nil {
			return false
		}
		var span *codec.Span
		var i32 *int32
		switch num {
		case evalRequestID:
			if typ == protowire.VarintType {
				x, err := c.Varint()
				if err != nil {
					return false
				}
				v.requestID = x
				continue
			}
		case evalFirstRow:
			i32 = &v.firstRow
		case evalRows:
			i32 = &v.rows
		case evalDim:
			i32 = &v.dim
		case evalGradients:
			span = &v.grad
		case evalLogDensities:
			span = &v.logDens
		case evalHessians:
			span = &v.hess
		case evalHessianVectors:
			span = &v.hessVec
		}
		switch {
		case i32 != nil && typ == protowire.VarintType:
			x, err := c.Varint()
			if err != nil {
				return false
			}
			*i32 = int32(x)
		case span != nil && typ == protowire.BytesType:
			if *span, err = c.Bytes(); err != nil {
				return false
			}
		default:
			if c.Skip(num, typ) != nil {
				return false
			}
		}
	}
	return true
}

// request is one frame received on a session stream, held where gRPC
// received it (codec.Frame): an Evaluations frame is read in place, its
// arrays decoded straight into the engine's buffers; any other frame is
// left to proto.Unmarshal.
type request struct {
	codec.Frame
	parsed bool
	// fast says ev holds the frame; else msg does, or err says why not.
	fast bool
	ev   answerView
	msg  *sluicev1.SessionRequest
	err  error
}

// Hold implements codec.Receiver.
func (r *request) Hold(data mem.BufferSlice) {
	r.Frame.Hold(data)
	r.parsed, r.fast, r.msg, r.err = false, false, nil, nil
}

// Release gives the buffers back to gRPC, and forgets what was read.
func (r *request) Release() {
	r.Frame.Release()
	r.parsed, r.fast, r.msg, r.err = false, false, nil, nil
}

// parse reads the frame, once.
func (r *request) parse() {
	if r.parsed {
		return
	}
	r.parsed = true
	if r.ev, r.fast = parseAnswer(&r.Frame); r.fast {
		return
	}
	r.msg = new(sluicev1.SessionRequest)
	if err := proto.Unmarshal(r.Bytes(), r.msg); err != nil {
		// What gRPC's own codec would have answered.
		r.msg, r.err = nil, status.Errorf(codes.Internal, "grpc: failed to unmarshal the received message: %v", err)
	}
}

// evaluationRows returns the rows of an Evaluations frame (metrics).
func (r *request) evaluationRows() (int32, bool) {
	r.parse()
	if r.fast {
		return r.ev.rows, true
	}
	if e := r.msg.GetEvaluations(); e != nil {
		return e.GetRows(), true
	}
	return 0, false
}

// answerLimits are what the reader checks a frame against before it
// decodes it.
type answerLimits struct {
	// limit is the session's message limit; maxFrame the largest answer
	// it needs; maxGrad the most gradient values an answer part holds,
	// replicates those declared at registration.
	limit, maxFrame     int64
	maxGrad, replicates int
}

// message turns the frame into an engine message, refusing first what
// would exceed what registration reserved; gradients are decoded into
// *gradBuf (see messageFromWire).
func (r *request) message(l answerLimits, gradBuf *[]float64) session.Message {
	r.parse()
	if r.err != nil {
		return session.Message{Err: recvError("evaluations", r.err)}
	}
	size := int64(r.Len())
	gradBytes := r.ev.grad.Len
	if !r.fast {
		gradBytes = len(r.msg.GetEvaluations().GetGradients())
	}
	switch {
	case size > l.limit:
		return session.Message{Err: &session.Error{Kind: session.TooLarge, Field: "evaluations", Chain: -1, Coord: -1,
			Reason: fmt.Sprintf("message of %d bytes exceeds the session's limit of %d bytes", size, l.limit)}}
	case gradBytes > 8*l.maxGrad:
		// Decoded, it would grow the reader's buffers beyond what
		// registration reserved.
		return session.Message{Err: session.BadField("evaluations.gradients",
			"carries %d values, more than any answer part of this session holds (%d: rows × replicates declared at registration (%d) × dim)",
			gradBytes/8, l.maxGrad, l.replicates)}
	case size > l.maxFrame:
		return session.Message{Err: &session.Error{Kind: session.TooLarge, Field: "evaluations", Chain: -1, Coord: -1,
			Reason: fmt.Sprintf("message of %d bytes exceeds the largest answer this session needs (%d bytes; the message limit is %d)",
				size, l.maxFrame, l.limit)}}
	}
	if !r.fast {
		return messageFromWire(r.msg, gradBuf)
	}
	v, f := &r.ev, &r.Frame
	return evaluationsMessage(v.requestID, v.firstRow, v.rows, v.dim, answerArrays{
		grad: wireFloats{f: f, s: v.grad}, logDens: wireFloats{f: f, s: v.logDens},
		hess: wireFloats{f: f, s: v.hess}, hessVec: wireFloats{f: f, s: v.hessVec}}, gradBuf)
}
