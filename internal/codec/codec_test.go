package codec

import (
	"bytes"
	"encoding/binary"
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"google.golang.org/grpc/encoding"
	"google.golang.org/grpc/mem"
	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/types/known/wrapperspb"

	"sluice/internal/codec/codectest"
	"sluice/internal/wire"
)

// A message in many pieces reads as the same bytes and the same float64
// values as in one (the values' layout: internal/wire, IEEE 754 binary64
// little-endian), whatever span is asked for and however values straddle
// the pieces.
func TestFrameReadsAcrossPieces(t *testing.T) {
	r := rand.New(rand.NewPCG(1, 2))
	for range 300 {
		v := make([]float64, r.IntN(40))
		for i := range v {
			v[i] = math.Float64frombits(r.Uint64())
		}
		b := append([]byte{byte(r.IntN(256))}, wire.AppendFloats(nil, v)...) // one byte ahead: values start unaligned
		var f Frame
		f.HoldBytes(codectest.Pieces(r, b)...)
		if f.Len() != len(b) || !bytes.Equal(f.Bytes(), b) {
			t.Fatalf("frame of %d bytes holds %d: % x", len(b), f.Len(), f.Bytes())
		}
		lo := r.IntN(len(v) + 1)
		hi := lo + r.IntN(len(v)-lo+1)
		s := Span{1 + 8*lo, 8 * (hi - lo)}
		got, err := f.AppendFloats([]float64{-1}, s)
		if err != nil || len(got) != 1+hi-lo || got[0] != -1 {
			t.Fatalf("values %d to %d: %d values, %v", lo, hi, len(got), err)
		}
		for i, x := range got[1:] {
			if math.Float64bits(x) != math.Float64bits(v[lo+i]) {
				t.Fatalf("value %d: %x, want %x", lo+i, math.Float64bits(x), math.Float64bits(v[lo+i]))
			}
		}
		if got := f.AppendBytes([]byte{9}, s); !bytes.Equal(got, append([]byte{9}, b[s.Off:s.Off+s.Len]...)) {
			t.Fatalf("bytes %v differ", s)
		}
		if s.Len > 0 {
			if _, err := f.AppendFloats(nil, Span{s.Off, s.Len - 1}); err != ErrPartialValue {
				t.Fatalf("%d bytes: %v, want ErrPartialValue", s.Len-1, err)
			}
		}
		f.Release()
		if f.Len() != 0 || f.Bytes() != nil {
			t.Fatal("a released frame holds bytes")
		}
	}
}

// walk reads b's fields with a Cursor over the given pieces, and with
// protowire over b in one slice, as proto.Unmarshal reads unknown fields
// (protowire.ConsumeTag, a field number of at most 2²⁹−1, then
// protowire.ConsumeFieldValue); it fails t when they disagree on any
// field or on where the input stops parsing.
func walk(t *testing.T, b []byte, pieces [][]byte) {
	t.Helper()
	type seen struct {
		num      protowire.Number
		typ      protowire.Type
		from, to int
	}
	var want []seen
	wantOK := true
	for rest := b; len(rest) > 0; {
		num, typ, n := protowire.ConsumeTag(rest)
		if n < 0 || num > protowire.MaxValidNumber {
			wantOK = false
			break
		}
		m := protowire.ConsumeFieldValue(num, typ, rest[n:])
		if m < 0 {
			wantOK = false
			break
		}
		from := len(b) - len(rest) + n
		want = append(want, seen{num, typ, from, from + m})
		rest = rest[n+m:]
	}
	var f Frame
	f.HoldBytes(pieces...)
	defer f.Release()
	var got []seen
	gotOK := true
	for c := f.Cursor(); !c.Done(); {
		num, typ, err := c.Tag()
		if err != nil {
			gotOK = false
			break
		}
		from := c.pos
		if typ == protowire.BytesType {
			var s Span
			if s, err = c.Bytes(); err == nil && s.Off+s.Len != c.pos {
				t.Fatalf("bytes field ends at %d, the cursor at %d", s.Off+s.Len, c.pos)
			}
		} else {
			err = c.Skip(num, typ)
		}
		if err != nil {
			gotOK = false
			break
		}
		got = append(got, seen{num, typ, from, c.pos})
	}
	if gotOK != wantOK || !slices.Equal(got, want) {
		t.Fatalf("% x in %d pieces:\ncursor   %v %v\nprotowire %v %v", b, len(pieces), gotOK, got, wantOK, want)
	}
}

// The cursor reads fields as protowire does, on valid and broken input
// alike, in one piece or many.
func TestCursorAgreesWithProtowire(t *testing.T) {
	r := rand.New(rand.NewPCG(3, 4))
	var base []byte
	base = protowire.AppendTag(base, 1, protowire.VarintType)
	base = protowire.AppendVarint(base, 1<<62)
	base = protowire.AppendTag(base, 2, protowire.BytesType)
	base = protowire.AppendBytes(base, wire.AppendFloats(nil, []float64{1, 2, 3}))
	base = protowire.AppendTag(base, 3, protowire.Fixed32Type)
	base = protowire.AppendFixed32(base, 7)
	base = protowire.AppendTag(base, 4, protowire.Fixed64Type)
	base = protowire.AppendFixed64(base, 7)
	for _, b := range [][]byte{
		nil, base,
		{0x00},                               // field number 0
		{0x07, 1},                            // wire type 7
		{0x0c},                               // an end-group with no group
		{0x0b, 0x08, 0x01, 0x0c},             // group 1 holding a varint
		{0x0b, 0x08, 0x01},                   // an unterminated group
		{0xf8, 0xff, 0xff, 0xff, 0x0f, 0x01}, // field 2^32−1: above 2^29−1
		{0x08, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x02}, // a varint overflowing 64 bits
		{0x12, 0x05, 1, 2}, // a length beyond the end
		{0x1d, 1, 2, 3},    // a short fixed32
	} {
		for range 20 {
			walk(t, b, codectest.Pieces(r, b))
		}
	}
	for range 2000 {
		b := codectest.Scramble(r, base, 2)
		walk(t, b, codectest.Pieces(r, b))
	}
}

// FuzzCursor: the cursor reads any input as protowire does, in any
// pieces. Run with
//
//	go test -run XXX -fuzz '^FuzzCursor$' -fuzztime 100000x ./internal/codec
func FuzzCursor(f *testing.F) {
	f.Add([]byte{0x08, 0x01, 0x12, 0x02, 0xaa, 0xbb}, uint64(1))
	f.Add([]byte{0x0b, 0x08, 0x01, 0x0c, 0x15, 1, 2, 3, 4}, uint64(2))
	f.Add([]byte{0x08, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0x01}, uint64(3))
	f.Fuzz(func(t *testing.T, b []byte, seed uint64) {
		walk(t, b, codectest.Pieces(rand.New(rand.NewPCG(seed, 5)), b))
	})
}

// Varints reads a repeated varint field packed or not, converting as
// proto.Unmarshal does (an int32 keeps the low 32 bits).
func TestVarints(t *testing.T) {
	var b []byte
	b = protowire.AppendTag(b, 1, protowire.VarintType)
	b = protowire.AppendVarint(b, uint64(1<<40+5))
	var run []byte
	for _, x := range []int64{-1, 0, 300} {
		run = protowire.AppendVarint(run, uint64(x))
	}
	b = protowire.AppendTag(b, 1, protowire.BytesType)
	b = protowire.AppendBytes(b, run)
	b = protowire.AppendTag(b, 1, protowire.Fixed32Type)
	b = protowire.AppendFixed32(b, 1)
	var f Frame
	f.HoldBytes(b[:3], b[3:])
	var i32 []int32
	var i64 []int64
	c, d := f.Cursor(), f.Cursor()
	for !c.Done() {
		_, typ, _ := c.Tag()
		_, _, _ = d.Tag()
		var ok1, ok2 bool
		var err1, err2 error
		i32, ok1, err1 = Varints(&c, typ, i32)
		i64, ok2, err2 = Varints(&d, typ, i64)
		if err1 != nil || err2 != nil || ok1 != ok2 {
			t.Fatalf("%v %v %v %v", ok1, ok2, err1, err2)
		}
		if !ok1 {
			if c.Skip(1, typ) != nil || d.Skip(1, typ) != nil {
				t.Fatal("skip")
			}
		}
	}
	if !slices.Equal(i32, []int32{5, -1, 0, 300}) || !slices.Equal(i64, []int64{1<<40 + 5, -1, 0, 300}) {
		t.Fatalf("int32 %v, int64 %v", i32, i64)
	}
}

// The field writers write what protowire's own functions write for a
// proto3 field (the protobuf encoding: nothing for a zero or empty
// value, packed repeated integers, negative int32 as ten-byte varints),
// and their Size functions measure it.
func TestWriters(t *testing.T) {
	r := rand.New(rand.NewPCG(5, 6))
	for range 500 {
		num := protowire.Number(1 + r.IntN(3000))
		ints := make([]int, r.IntN(5))
		for i := range ints {
			ints[i] = int(int32(r.Uint32())) >> r.IntN(32)
		}
		i64 := make([]int64, r.IntN(5))
		for i := range i64 {
			i64[i] = int64(r.Uint64()) >> r.IntN(64)
		}
		fl := make([]float64, r.IntN(4))
		for i := range fl {
			fl[i] = r.NormFloat64()
		}
		v := uint64(0)
		if r.IntN(2) == 0 {
			v = r.Uint64() >> r.IntN(64)
		}
		var want []byte
		if v != 0 {
			want = protowire.AppendVarint(protowire.AppendTag(want, num, protowire.VarintType), v)
		}
		if len(fl) > 0 {
			var raw []byte
			for _, x := range fl {
				raw = binary.LittleEndian.AppendUint64(raw, math.Float64bits(x))
			}
			want = protowire.AppendBytes(protowire.AppendTag(want, num, protowire.BytesType), raw)
		}
		if len(ints) > 0 {
			var run []byte
			for _, x := range ints {
				run = protowire.AppendVarint(run, uint64(int64(int32(x))))
			}
			want = protowire.AppendBytes(protowire.AppendTag(want, num, protowire.BytesType), run)
		}
		if len(i64) > 0 {
			var run []byte
			for _, x := range i64 {
				run = protowire.AppendVarint(run, uint64(x))
			}
			want = protowire.AppendBytes(protowire.AppendTag(want, num, protowire.BytesType), run)
		}
		want = protowire.AppendBytes(protowire.AppendTag(want, num, protowire.BytesType), []byte{1, 2})
		var got []byte
		got = AppendVarint(got, num, v)
		got = AppendFloats(got, num, fl)
		got = AppendInt32s(got, num, ints)
		got = AppendInt64s(got, num, i64)
		got = append(AppendMessageHeader(got, num, 2), 1, 2)
		size := SizeVarint(num, v) + SizeFloats(num, len(fl)) + SizeInt32s(num, ints) + SizeInt64s(num, i64) + SizeMessage(num, 2)
		if !bytes.Equal(got, want) || size != len(want) {
			t.Fatalf("wrote % x (size %d), want % x", got, size, want)
		}
	}
	if AppendBool(nil, 3, false) != nil || !bytes.Equal(AppendBool(nil, 3, true), []byte{0x18, 1}) || SizeBool(3, true) != 2 {
		t.Fatal("bool field")
	}
	if Int32(-1) != math.MaxUint64 || Int32(1<<31) != 0xFFFFFFFF80000000 || Int32(1<<32+5) != 5 {
		t.Fatal("int32 varints sign-extend after truncation to 32 bits")
	}
}

// sender writes n bytes, or announces one more than it writes.
type sender struct {
	n   int
	lie bool
}

func (s *sender) WireSize() int {
	if s.lie {
		return s.n + 1
	}
	return s.n
}

func (s *sender) AppendWire(b []byte) []byte {
	for i := range s.n {
		b = append(b, byte(i))
	}
	return b
}

// countPool counts buffers put back.
type countPool struct{ puts int }

func (p *countPool) Get(n int) *[]byte { b := make([]byte, n); return &b }
func (p *countPool) Put(*[]byte)       { p.puts++ }

// The codec: Senders write their bytes into one buffer (and a Sender that
// writes other than it announced is an error), Receivers hold gRPC's
// buffers with a reference of their own, and every other message goes
// through gRPC's proto codec, byte for byte.
func TestCodec(t *testing.T) {
	pool := &countPool{}
	c := New(pool)
	if c.Name() != "proto" {
		t.Fatalf("name %q", c.Name())
	}
	for _, n := range []int{0, 10, 5000} {
		d, err := c.Marshal(&sender{n: n})
		if err != nil || d.Len() != n || !bytes.Equal(d.Materialize(), (&sender{n: n}).AppendWire(nil)) {
			t.Fatalf("%d bytes: %d, %v", n, d.Len(), err)
		}
		d.Free()
		if _, err := c.Marshal(&sender{n: n, lie: true}); err == nil {
			t.Fatalf("%d bytes announced as %d: no error", n, n+1)
		}
	}
	m := wrapperspb.Bytes(bytes.Repeat([]byte{7}, 3000))
	std := encoding.GetCodecV2("proto")
	d1, err1 := c.Marshal(m)
	d2, err2 := std.Marshal(m)
	if err1 != nil || err2 != nil || !bytes.Equal(d1.Materialize(), d2.Materialize()) {
		t.Fatalf("a proto message: %v, %v", err1, err2)
	}
	var back wrapperspb.BytesValue
	if err := c.Unmarshal(d1, &back); err != nil || !proto.Equal(&back, m) {
		t.Fatalf("unmarshal: %v", err)
	}

	buf := bytes.Repeat([]byte{1, 2, 3, 4}, 1000) // pooled: above gRPC's threshold
	data := mem.BufferSlice{mem.NewBuffer(&buf, pool)}
	before := pool.puts
	var f Frame
	if err := c.Unmarshal(data, &f); err != nil {
		t.Fatal(err)
	}
	data.Free() // gRPC's reference
	if pool.puts != before || !bytes.Equal(f.Bytes(), bytes.Repeat([]byte{1, 2, 3, 4}, 1000)) {
		t.Fatalf("after gRPC let go: %d puts, % x", pool.puts-before, f.Bytes())
	}
	f.Release()
	if pool.puts != before+1 {
		t.Fatalf("after Release: %d puts, want 1", pool.puts-before)
	}
}
