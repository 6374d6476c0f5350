package codec

import (
	"encoding/binary"
	"errors"
	"slices"
	"sort"

	"google.golang.org/grpc/mem"
	"google.golang.org/protobuf/encoding/protowire"

	"sluice/internal/wire"
)

// Frame is one received message held in the buffers gRPC read it into
// (one per HTTP/2 DATA frame, so a large message lies in many), with a
// reference of its own on them: nothing is copied. It stays valid until
// the next Hold or Release. A Frame is not safe for concurrent use.
type Frame struct {
	data mem.BufferSlice
	segs [][]byte // the buffers' bytes, empty ones left out
	ends []int    // ends[i]: the offset just past segs[i]
	size int
	flat []byte // Bytes' copy of a message in several buffers
	// flatOK says flat holds this message.
	flatOK bool
}

// Hold implements Receiver: the frame takes a reference on data (gRPC
// frees its own after Unmarshal) and drops the message it held.
func (f *Frame) Hold(data mem.BufferSlice) {
	f.Release()
	data.Ref()
	f.data = append(f.data, data...)
	for _, b := range f.data {
		if s := b.ReadOnlyData(); len(s) > 0 {
			f.size += len(s)
			f.segs = append(f.segs, s)
			f.ends = append(f.ends, f.size)
		}
	}
}

// HoldBytes holds a message given as consecutive pieces (tests; a message
// received some other way).
func (f *Frame) HoldBytes(pieces ...[]byte) {
	bs := make(mem.BufferSlice, len(pieces))
	for i, p := range pieces {
		bs[i] = mem.SliceBuffer(p)
	}
	f.Hold(bs)
}

// Release gives the buffers back to gRPC; the frame is then empty.
func (f *Frame) Release() {
	f.data.Free()
	clear(f.data)
	clear(f.segs)
	f.data, f.segs, f.ends, f.size, f.flatOK = f.data[:0], f.segs[:0], f.ends[:0], 0, false
}

// Len is the message's length in bytes.
func (f *Frame) Len() int { return f.size }

// Bytes returns the whole message in one slice, valid as long as the
// frame holds it: the buffer itself when the message lies in one, else a
// copy kept in the frame (and reused by the next message that needs it).
func (f *Frame) Bytes() []byte {
	switch {
	case len(f.segs) == 1:
		return f.segs[0]
	case len(f.segs) == 0:
		return nil
	case !f.flatOK:
		f.flat = f.flat[:0]
		for _, s := range f.segs {
			f.flat = append(f.flat, s...)
		}
		f.flatOK = true
	}
	return f.flat
}

// Span is a range of a frame's bytes: Len bytes from offset Off.
type Span struct{ Off, Len int }

// seg returns the index of the segment holding offset off (< Len()).
func (f *Frame) seg(off int) int { return sort.SearchInts(f.ends, off+1) }

// AppendBytes appends the bytes of s to dst.
func (f *Frame) AppendBytes(dst []byte, s Span) []byte {
	dst = slices.Grow(dst, s.Len)
	for i, off, n := -1, s.Off, s.Len; n > 0; i, off = i+1, 0 {
		if i < 0 {
			i = f.seg(off)
			off -= f.ends[i] - len(f.segs[i])
		}
		b := f.segs[i][off:]
		b = b[:min(len(b), n)]
		dst = append(dst, b...)
		n -= len(b)
	}
	return dst
}

// ErrPartialValue is wire.ErrPartialValue: a float array's length is not
// a whole number of values.
var ErrPartialValue = wire.ErrPartialValue

// AppendFloats decodes the float array at s (the wire's layout, see
// internal/wire) and appends its values to dst, growing it once; when s
// is not a whole number of values it returns dst unchanged and
// ErrPartialValue. Values split between two buffers are put together.
func (f *Frame) AppendFloats(dst []float64, s Span) ([]float64, error) {
	if s.Len%8 != 0 {
		return dst, ErrPartialValue
	}
	dst = slices.Grow(dst, s.Len/8)
	var part [8]byte // a value split between buffers
	have := 0
	for i, off, n := -1, s.Off, s.Len; n > 0; i, off = i+1, 0 {
		if i < 0 {
			i = f.seg(off)
			off -= f.ends[i] - len(f.segs[i])
		}
		b := f.segs[i][off:]
		b = b[:min(len(b), n)]
		n -= len(b)
		if have > 0 {
			k := copy(part[have:], b)
			have += k
			b = b[k:]
			if have == 8 {
				dst, _ = wire.DecodeFloats(dst, part[:])
				have = 0
			}
		}
		whole := len(b) &^ 7
		dst, _ = wire.DecodeFloats(dst, b[:whole])
		have += copy(part[have:], b[whole:])
	}
	return dst, nil
}

// errMalformed reports input the hand parsers do not take; they then
// leave the frame to proto.Unmarshal, whose error (or result) stands.
var errMalformed = errors.New("codec: malformed or unusual protobuf")

// Cursor reads protobuf fields in order from a range of a frame, across
// the frame's buffers. Its methods mirror protowire's and fail where it
// fails; a failure means the input is not one the hand parser takes.
type Cursor struct {
	f        *Frame
	seg, off int // the byte at pos is f.segs[seg][off]
	pos, end int
	tmp      [binary.MaxVarintLen64]byte // a varint split between buffers
}

// Cursor returns a cursor over the whole message.
func (f *Frame) Cursor() Cursor { return f.Sub(Span{0, f.size}) }

// Sub returns a cursor over s, a nested message.
func (f *Frame) Sub(s Span) Cursor {
	c := Cursor{f: f, pos: s.Off, end: s.Off + s.Len}
	if s.Off < f.size {
		c.seg = f.seg(s.Off)
		c.off = s.Off - (f.ends[c.seg] - len(f.segs[c.seg]))
	} else if len(f.segs) > 0 {
		c.seg = len(f.segs) - 1
		c.off = len(f.segs[c.seg])
	}
	return c
}

// Done reports whether the range is read.
func (c *Cursor) Done() bool { return c.pos >= c.end }

// peek returns the next bytes of the range, in one slice: the rest of
// the current buffer, or at least ten bytes (a varint's most) put
// together from the next ones; fewer only at the range's end.
func (c *Cursor) peek() []byte {
	rem := c.end - c.pos
	if rem <= 0 {
		return nil
	}
	want := min(rem, len(c.tmp))
	if s := c.f.segs[c.seg][c.off:]; len(s) >= want {
		return s[:min(len(s), rem)]
	}
	n := 0
	for i, off := c.seg, c.off; n < want; i, off = i+1, 0 {
		n += copy(c.tmp[n:want], c.f.segs[i][off:])
	}
	return c.tmp[:want]
}

func (c *Cursor) advance(n int) {
	c.pos += n
	c.off += n
	for c.seg < len(c.f.segs)-1 && c.off >= len(c.f.segs[c.seg]) {
		c.off -= len(c.f.segs[c.seg])
		c.seg++
	}
}

// Tag reads a field's tag. As proto.Unmarshal, it refuses field numbers
// outside 1 to 2²⁹−1.
func (c *Cursor) Tag() (protowire.Number, protowire.Type, error) {
	num, typ, n := protowire.ConsumeTag(c.peek())
	if n < 0 || num > protowire.MaxValidNumber {
		return 0, 0, errMalformed
	}
	c.advance(n)
	return num, typ, nil
}

// Varint reads a varint.
func (c *Cursor) Varint() (uint64, error) {
	v, n := protowire.ConsumeVarint(c.peek())
	if n < 0 {
		return 0, errMalformed
	}
	c.advance(n)
	return v, nil
}

// Bytes reads a length-delimited value and returns where it lies.
func (c *Cursor) Bytes() (Span, error) {
	m, err := c.Varint()
	if err != nil || m > uint64(c.end-c.pos) {
		return Span{}, errMalformed
	}
	s := Span{c.pos, int(m)}
	c.advance(int(m))
	return s, nil
}

// Skip skips the value of a field the parser does not know (or knows
// with another wire type), as proto.Unmarshal skips unknown fields
// (protowire.ConsumeFieldValue). Groups, long deprecated and never sent
// by sluice, are skipped on the message put together in one slice.
func (c *Cursor) Skip(num protowire.Number, typ protowire.Type) error {
	switch typ {
	case protowire.VarintType:
		_, err := c.Varint()
		return err
	case protowire.Fixed32Type, protowire.Fixed64Type:
		n := 4
		if typ == protowire.Fixed64Type {
			n = 8
		}
		if c.end-c.pos < n {
			return errMalformed
		}
		c.advance(n)
		return nil
	case protowire.BytesType:
		_, err := c.Bytes()
		return err
	}
	n := protowire.ConsumeFieldValue(num, typ, c.f.Bytes()[c.pos:c.end])
	if n < 0 {
		return errMalformed
	}
	c.advance(n)
	return nil
}

// Varints reads one occurrence of a repeated varint field (int32, int64
// or an enum): one value (wire type varint) or a packed run (bytes),
// appended to dst converted as proto.Unmarshal converts them (int32 keeps
// the low 32 bits). ok is false for another wire type: the field is then
// unknown, for Skip.
func Varints[T ~int32 | ~int64](c *Cursor, typ protowire.Type, dst []T) (out []T, ok bool, err error) {
	switch typ {
	case protowire.VarintType:
		v, err := c.Varint()
		if err != nil {
			return dst, true, err
		}
		return append(dst, T(v)), true, nil
	case protowire.BytesType:
		s, err := c.Bytes()
		if err != nil {
			return dst, true, err
		}
		for sub := c.f.Sub(s); !sub.Done(); {
			v, err := sub.Varint()
			if err != nil {
				return dst, true, err
			}
			dst = append(dst, T(v))
		}
		return dst, true, nil
	}
	return dst, false, nil
}
