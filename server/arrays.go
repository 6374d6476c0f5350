package server

import (
	"encoding/binary"
	"math"

	"sluice/server/session"
)

// putFloats appends v to dst as little-endian float64 bytes, the wire's
// array layout.
func putFloats(dst []byte, v []float64) []byte {
	n := len(dst)
	dst = append(dst, make([]byte, 8*len(v))...)
	b := dst[n:]
	for i, x := range v {
		binary.LittleEndian.PutUint64(b[8*i:], math.Float64bits(x))
	}
	return dst
}

// floatsInto decodes a wire array into dst's storage (grown when too
// small); field names it in the error. An empty array gives dst[:0].
func floatsInto(dst []float64, field string, b []byte) ([]float64, error) {
	if len(b)%8 != 0 {
		return nil, session.BadField(field, "has %d bytes, not a whole number of float64 values", len(b))
	}
	n := len(b) / 8
	if cap(dst) < n {
		dst = make([]float64, n)
	}
	dst = dst[:n]
	for i := range dst {
		dst[i] = math.Float64frombits(binary.LittleEndian.Uint64(b[8*i:]))
	}
	return dst, nil
}

// floats decodes a wire array; field names it in the error.
func floats(field string, b []byte) ([]float64, error) {
	if len(b)%8 != 0 {
		return nil, session.BadField(field, "has %d bytes, not a whole number of float64 values", len(b))
	}
	if len(b) == 0 {
		return nil, nil
	}
	out := make([]float64, len(b)/8)
	for i := range out {
		out[i] = math.Float64frombits(binary.LittleEndian.Uint64(b[8*i:]))
	}
	return out, nil
}
