package server

import (
	"sluice/internal/codec"
	"sluice/internal/wire"
	"sluice/server/session"
)

// wireFloats is a float array as received: the bytes of a decoded
// message (b), or a span of a frame held as received (f, s).
type wireFloats struct {
	b []byte
	f *codec.Frame
	s codec.Span
}

// size is the array's length in bytes.
func (w wireFloats) size() int {
	if w.f != nil {
		return w.s.Len
	}
	return len(w.b)
}

// into decodes the array into dst's storage (grown when too small);
// field names it in the error. An empty array gives dst[:0].
func (w wireFloats) into(dst []float64, field string) ([]float64, error) {
	var out []float64
	var err error
	if w.f != nil {
		out, err = w.f.AppendFloats(dst[:0], w.s)
	} else {
		out, err = wire.DecodeFloats(dst[:0], w.b)
	}
	if err != nil {
		return nil, session.BadField(field, "has %d bytes, not a whole number of float64 values", w.size())
	}
	return out, nil
}

// fresh decodes the array into a new slice (nil when empty); field names
// it in the error.
func (w wireFloats) fresh(field string) ([]float64, error) {
	if w.size() == 0 {
		return nil, nil
	}
	return w.into(nil, field)
}

// floats decodes a wire array into a new slice (nil when empty); field
// names it in the error.
func floats(field string, b []byte) ([]float64, error) { return wireFloats{b: b}.fresh(field) }
