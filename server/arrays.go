package server

import (
	"sluice/internal/wire"
	"sluice/server/session"
)

// floatsInto decodes a wire array into dst's storage (grown when too
// small); field names it in the error. An empty array gives dst[:0].
func floatsInto(dst []float64, field string, b []byte) ([]float64, error) {
	out, err := wire.DecodeFloats(dst[:0], b)
	if err != nil {
		return nil, session.BadField(field, "has %d bytes, not a whole number of float64 values", len(b))
	}
	return out, nil
}

// floats decodes a wire array into a new slice (nil when empty); field
// names it in the error.
func floats(field string, b []byte) ([]float64, error) {
	if len(b) == 0 {
		return nil, nil
	}
	return floatsInto(nil, field, b)
}
