package wire

import (
	"errors"
	"math"
	"testing"
)

// The layout is IEEE 754 binary64, little-endian: 1.0 is 0x3FF0000000000000
// and −2.5 is 0xC004000000000000 (IEEE 754-2008, from the bit fields:
// sign, biased exponent 1023 + e, fraction).
func TestFloatLayout(t *testing.T) {
	b := AppendFloats([]byte{0xAA}, []float64{1, -2.5})
	want := []byte{0xAA, 0, 0, 0, 0, 0, 0, 0xF0, 0x3F, 0, 0, 0, 0, 0, 0, 0x04, 0xC0}
	if string(b) != string(want) {
		t.Fatalf("AppendFloats = % x, want % x", b, want)
	}
	got, err := DecodeFloats([]float64{7}, b[1:])
	if err != nil || len(got) != 3 || got[0] != 7 || got[1] != 1 || got[2] != -2.5 {
		t.Fatalf("DecodeFloats = %v, %v; want [7 1 -2.5]", got, err)
	}
}

// Every bit pattern survives, NaN payloads and signed zeros included.
func TestFloatRoundTrip(t *testing.T) {
	v := []float64{0, math.Copysign(0, -1), math.Inf(1), math.Inf(-1), math.Float64frombits(0x7FF8000000000123),
		math.SmallestNonzeroFloat64, math.MaxFloat64, -1e-300}
	got, err := DecodeFloats(nil, AppendFloats(nil, v))
	if err != nil || len(got) != len(v) {
		t.Fatalf("round trip: %v, %v", got, err)
	}
	for i := range v {
		if math.Float64bits(got[i]) != math.Float64bits(v[i]) {
			t.Errorf("value %d: %x, want %x", i, math.Float64bits(got[i]), math.Float64bits(v[i]))
		}
	}
	if got, err := DecodeFloats(nil, nil); err != nil || len(got) != 0 {
		t.Fatalf("empty array: %v, %v", got, err)
	}
}

func TestPartialValueRefused(t *testing.T) {
	dst := []float64{1}
	got, err := DecodeFloats(dst, make([]byte, 12))
	if !errors.Is(err, ErrPartialValue) || len(got) != 1 {
		t.Fatalf("12 bytes: %v, %v; want ErrPartialValue and dst unchanged", got, err)
	}
}

// Rows per message: (limit − 1024) / (8·values + 16), worked by hand.
func TestRowsPerMessage(t *testing.T) {
	for _, c := range []struct {
		limit  int64
		values int
		want   int
	}{
		{4 << 20, 10, (4<<20 - 1024) / 96},
		{1024 + 3*(8*7+16), 7, 3},
		{1024 + 3*(8*7+16) - 1, 7, 2},
		{1024 + 71, 7, 0},
		{1024, 1, 0},
		{0, 1, 0},
	} {
		if got := RowsPerMessage(c.limit, c.values); got != c.want {
			t.Errorf("RowsPerMessage(%d, %d) = %d, want %d", c.limit, c.values, got, c.want)
		}
	}
}
