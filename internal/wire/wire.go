// Package wire owns what client and server must agree on below the
// protobuf messages: the byte layout of float arrays (little-endian
// IEEE 754 float64, packed, no header) and the arithmetic that sizes a
// frame's rows within a message limit. It imports only the standard
// library, so both sides and the engine can share it.
package wire

import (
	"encoding/binary"
	"errors"
	"math"
	"slices"
)

// ErrPartialValue is returned for an array whose length is not a whole
// number of float64 values.
var ErrPartialValue = errors.New("wire: array length is not a whole number of float64 values")

// AppendFloats appends v to dst as little-endian float64 bytes and
// returns the extended slice; dst grows once, to its final size.
func AppendFloats(dst []byte, v []float64) []byte {
	n := len(dst)
	dst = slices.Grow(dst, 8*len(v))[:n+8*len(v)]
	b := dst[n:]
	for i, x := range v {
		binary.LittleEndian.PutUint64(b[8*i:], math.Float64bits(x))
	}
	return dst
}

// DecodeFloats appends the float64 values of the wire array b to dst and
// returns the extended slice; dst grows once, to its final size. When b
// is not a whole number of values it returns dst unchanged and
// ErrPartialValue.
func DecodeFloats(dst []float64, b []byte) ([]float64, error) {
	if len(b)%8 != 0 {
		return dst, ErrPartialValue
	}
	n, m := len(dst), len(b)/8
	dst = slices.Grow(dst, m)[:n+m]
	out := dst[n:]
	for i := range out {
		out[i] = math.Float64frombits(binary.LittleEndian.Uint64(b[8*i:]))
	}
	return dst, nil
}

// FrameOverhead is the bytes a message keeps for everything but its rows:
// the frame's scalar fields, field tags and lengths, and the per-parameter
// entries are sized separately by whoever adds them.
const FrameOverhead = 1024

// RowOverhead is the bytes a row may take beyond its float64 values: a
// varint chain index (at most 5 bytes as a packed int32), a second varint
// (a minibatch group, at most 10 bytes for a negative int32, or an
// iteration, at most 10 bytes as an int64), and slack.
const RowOverhead = 16

// RowBytes is the most bytes one row of values float64 values takes in a
// frame.
func RowBytes(values int) int64 { return 8*int64(values) + RowOverhead }

// RowsPerMessage is how many rows of values float64 values fit a message
// of limit bytes; 0 when not even one does.
func RowsPerMessage(limit int64, values int) int {
	if limit <= FrameOverhead {
		return 0
	}
	return int(min((limit-FrameOverhead)/RowBytes(values), math.MaxInt32))
}
