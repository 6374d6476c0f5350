package codec

import (
	"google.golang.org/protobuf/encoding/protowire"

	"sluice/internal/wire"
)

// The field writers below produce what proto.Marshal produces for a
// proto3 field of implicit presence: nothing for a zero value or an empty
// array, else the tag and the value; repeated integers packed. Each Size
// function is the length of what its Append function writes. Integers of
// int32 fields are given as their varint: Int32(x).

// Int32 is the varint of an int32 field holding x (converted to int32,
// as the engine's ints are): negative values take ten bytes, sign
// extended, as proto.Marshal writes them.
func Int32(x int) uint64 { return uint64(int32(x)) }

// SizeVarint is the length of a varint field holding v.
func SizeVarint(num protowire.Number, v uint64) int {
	if v == 0 {
		return 0
	}
	return protowire.SizeTag(num) + protowire.SizeVarint(v)
}

// AppendVarint appends a varint field holding v.
func AppendVarint(b []byte, num protowire.Number, v uint64) []byte {
	if v == 0 {
		return b
	}
	return protowire.AppendVarint(protowire.AppendTag(b, num, protowire.VarintType), v)
}

// SizeBool is the length of a bool field holding v.
func SizeBool(num protowire.Number, v bool) int { return SizeVarint(num, protowire.EncodeBool(v)) }

// AppendBool appends a bool field holding v.
func AppendBool(b []byte, num protowire.Number, v bool) []byte {
	return AppendVarint(b, num, protowire.EncodeBool(v))
}

// SizeFloats is the length of a bytes field holding n float64 values in
// the wire's array layout.
func SizeFloats(num protowire.Number, n int) int {
	if n == 0 {
		return 0
	}
	return protowire.SizeTag(num) + protowire.SizeBytes(8*n)
}

// AppendFloats appends a bytes field holding v in the wire's array
// layout, written straight from v.
func AppendFloats(b []byte, num protowire.Number, v []float64) []byte {
	if len(v) == 0 {
		return b
	}
	b = protowire.AppendVarint(protowire.AppendTag(b, num, protowire.BytesType), uint64(8*len(v)))
	return wire.AppendFloats(b, v)
}

// SizeMessage is the length of a message field whose message takes n
// bytes (a message field set is written even when empty).
func SizeMessage(num protowire.Number, n int) int {
	return protowire.SizeTag(num) + protowire.SizeBytes(n)
}

// AppendMessageHeader appends the tag and length of a message field whose
// message takes n bytes; the message follows.
func AppendMessageHeader(b []byte, num protowire.Number, n int) []byte {
	return protowire.AppendVarint(protowire.AppendTag(b, num, protowire.BytesType), uint64(n))
}

// packedLen is the payload of a packed field of the varints of v.
func packedLen[T ~int | ~int64](v []T, varint func(T) uint64) int {
	n := 0
	for _, x := range v {
		n += protowire.SizeVarint(varint(x))
	}
	return n
}

func int32Varint(x int) uint64 { return Int32(x) }

func int64Varint[T ~int | ~int64](x T) uint64 { return uint64(int64(x)) }

// SizeInt32s is the length of a packed repeated int32 field holding v.
func SizeInt32s(num protowire.Number, v []int) int {
	if len(v) == 0 {
		return 0
	}
	return protowire.SizeTag(num) + protowire.SizeBytes(packedLen(v, int32Varint))
}

// AppendInt32s appends a packed repeated int32 field holding v.
func AppendInt32s(b []byte, num protowire.Number, v []int) []byte {
	if len(v) == 0 {
		return b
	}
	b = protowire.AppendVarint(protowire.AppendTag(b, num, protowire.BytesType), uint64(packedLen(v, int32Varint)))
	for _, x := range v {
		b = protowire.AppendVarint(b, Int32(x))
	}
	return b
}

// SizeInt64s is the length of a packed repeated int64 field holding v.
func SizeInt64s(num protowire.Number, v []int64) int {
	if len(v) == 0 {
		return 0
	}
	return protowire.SizeTag(num) + protowire.SizeBytes(packedLen(v, int64Varint[int64]))
}

// AppendInt64s appends a packed repeated int64 field holding v.
func AppendInt64s(b []byte, num protowire.Number, v []int64) []byte {
	if len(v) == 0 {
		return b
	}
	b = protowire.AppendVarint(protowire.AppendTag(b, num, protowire.BytesType), uint64(packedLen(v, int64Varint[int64])))
	for _, x := range v {
		b = protowire.AppendVarint(b, uint64(x))
	}
	return b
}
