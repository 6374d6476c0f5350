package wire

import (
	"encoding/binary"
	"errors"
	"math"
	"testing"
)

// Decoding arbitrary bytes never panics: a whole number of values decodes
// to exactly len(b)/8 values, each the little-endian binary64 of its
// eight bytes (IEEE 754-2008), after the prefix, which stays untouched;
// anything else is ErrPartialValue with the prefix unchanged. Encoding
// the values again gives back the bytes, bit for bit. Run with
//
//	go test -run XXX -fuzz '^FuzzDecodeFloats$' -fuzztime 10s ./internal/wire
func FuzzDecodeFloats(f *testing.F) {
	f.Add([]byte{}, 0)
	f.Add([]byte{0, 0, 0, 0, 0, 0, 0xF0, 0x3F}, 1)                                  // 1.0
	f.Add([]byte{0, 0, 0, 0, 0, 0, 0x04, 0xC0, 0x23, 1, 0, 0, 0, 0, 0xF8, 0x7F}, 2) // −2.5, a NaN with payload
	f.Add([]byte{1, 2, 3}, 3)
	f.Fuzz(func(t *testing.T, b []byte, prefix int) {
		prefix = int(uint(prefix) % 4)
		dst := make([]float64, prefix, prefix+1)
		for i := range dst {
			dst[i] = float64(i) + 0.5
		}
		got, err := DecodeFloats(dst, b)
		if len(b)%8 != 0 {
			if !errors.Is(err, ErrPartialValue) || len(got) != prefix {
				t.Fatalf("%d bytes: %v, %d values; want ErrPartialValue and the prefix unchanged", len(b), err, len(got))
			}
			return
		}
		if err != nil || len(got) != prefix+len(b)/8 {
			t.Fatalf("%d bytes: %v, %d values; want %d", len(b), err, len(got), prefix+len(b)/8)
		}
		for i := range prefix {
			if got[i] != float64(i)+0.5 {
				t.Fatalf("prefix value %d changed to %v", i, got[i])
			}
		}
		for i, v := range got[prefix:] {
			if w := binary.LittleEndian.Uint64(b[8*i:]); math.Float64bits(v) != w {
				t.Fatalf("value %d has bits %#x, the bytes say %#x", i, math.Float64bits(v), w)
			}
		}
		if back := AppendFloats(nil, got[prefix:]); string(back) != string(b) {
			t.Fatalf("re-encoding changed the bytes")
		}
	})
}

// Message sizing never panics and is consistent for any limit and row
// width: the rows it allows fit the limit, and one more would not.
func FuzzRowsPerMessage(f *testing.F) {
	f.Add(int64(4<<20), 10)
	f.Add(int64(0), 0)
	f.Add(int64(FrameOverhead+1), 1)
	f.Add(int64(math.MaxInt64), math.MaxInt32)
	f.Fuzz(func(t *testing.T, limit int64, values int) {
		if values < 0 || values > 1<<40 {
			return
		}
		n := RowsPerMessage(limit, values)
		if n < 0 {
			t.Fatalf("RowsPerMessage(%d, %d) = %d", limit, values, n)
		}
		if n == 0 || n == math.MaxInt32 {
			return
		}
		used := FrameOverhead + int64(n)*RowBytes(values)
		if used > limit || limit-used >= RowBytes(values) {
			t.Fatalf("RowsPerMessage(%d, %d) = %d: uses %d bytes", limit, values, n, used)
		}
	})
}
