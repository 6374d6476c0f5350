// Package codectest owns the adversarial inputs the tests of the hand
// parsers (internal/codec's users) are held to proto.Unmarshal with: a
// valid encoding rewritten in ways the protobuf encoding allows or a
// parser must refuse (fields reordered and repeated, unknown fields of
// every wire type, packed and unpacked runs, non-minimal varints,
// truncations, stray bytes), and a message cut into the pieces gRPC may
// hand over. It knows no schema: proto.Unmarshal of the result, not this
// package, says what the bytes mean. Tests only.
package codectest

import (
	"math/rand/v2"

	"google.golang.org/protobuf/encoding/protowire"
)

// field is one field of an encoding: its number, wire type and value
// bytes (everything after the tag).
type field struct {
	num   protowire.Number
	typ   protowire.Type
	value []byte
}

// fields splits b into its fields; ok is false when b does not parse.
func fields(b []byte) (fs []field, ok bool) {
	for len(b) > 0 {
		num, typ, n := protowire.ConsumeTag(b)
		if n < 0 {
			return nil, false
		}
		m := protowire.ConsumeFieldValue(num, typ, b[n:])
		if m < 0 {
			return nil, false
		}
		fs = append(fs, field{num, typ, b[n : n+m]})
		b = b[n+m:]
	}
	return fs, true
}

// Scramble returns a rewrite of the encoding b, chosen by r: most are
// valid encodings that read differently or alike (which is for
// proto.Unmarshal to say), some are broken. Nested length-delimited
// values that parse as messages are rewritten in turn, to depth levels.
func Scramble(r *rand.Rand, b []byte, depth int) []byte {
	fs, ok := fields(b)
	if !ok {
		return mangle(r, b)
	}
	var out []field
	for _, f := range fs {
		if f.typ == protowire.BytesType && depth > 0 && r.IntN(3) > 0 {
			if v, n := protowire.ConsumeBytes(f.value); n > 0 {
				if _, ok := fields(v); ok && len(v) > 0 {
					f.value = protowire.AppendBytes(nil, Scramble(r, v, depth-1))
				}
			}
		}
		out = append(out, f)
		switch r.IntN(8) {
		case 0: // the same field again
			out = append(out, f)
		case 1: // an unknown field before it
			out = append(out, out[len(out)-1])
			out[len(out)-2] = unknown(r)
		case 2: // a varint field as a packed run, or the reverse
			out[len(out)-1] = repack(r, f)
		}
	}
	if r.IntN(4) == 0 { // fields in another order
		r.Shuffle(len(out), func(i, j int) { out[i], out[j] = out[j], out[i] })
	}
	var enc []byte
	for _, f := range out {
		enc = appendTag(r, enc, f.num, f.typ)
		enc = append(enc, f.value...)
	}
	if r.IntN(10) == 0 {
		enc = mangle(r, enc)
	}
	return enc
}

// appendTag appends a tag, now and then as a non-minimal varint (one
// byte longer, which proto.Unmarshal reads as the same tag).
func appendTag(r *rand.Rand, b []byte, num protowire.Number, typ protowire.Type) []byte {
	n := len(b)
	b = protowire.AppendVarint(b, protowire.EncodeTag(num, typ))
	if r.IntN(16) == 0 && len(b)-n < 10 {
		b[len(b)-1] |= 0x80
		b = append(b, 0)
	}
	return b
}

// unknown returns a field of a number no sluice message uses, of a random
// wire type (groups included).
func unknown(r *rand.Rand) field {
	num := protowire.Number(100 + r.IntN(1000))
	switch r.IntN(6) {
	case 0:
		return field{num, protowire.VarintType, protowire.AppendVarint(nil, r.Uint64()>>r.IntN(64))}
	case 1:
		return field{num, protowire.Fixed32Type, protowire.AppendFixed32(nil, r.Uint32())}
	case 2:
		return field{num, protowire.Fixed64Type, protowire.AppendFixed64(nil, r.Uint64())}
	case 3:
		v := make([]byte, r.IntN(20))
		for i := range v {
			v[i] = byte(r.Uint32())
		}
		return field{num, protowire.BytesType, protowire.AppendBytes(nil, v)}
	case 4: // a group holding a varint
		g := protowire.AppendTag(nil, 1, protowire.VarintType)
		g = protowire.AppendVarint(g, 7)
		return field{num, protowire.StartGroupType, protowire.AppendTag(g, num, protowire.EndGroupType)}
	default: // a huge field number
		return field{protowire.MaxValidNumber, protowire.VarintType, []byte{1}}
	}
}

// repack turns a varint field into a packed run of one to three values,
// or a length-delimited value made of varints into single varint fields'
// worth (its first value).
func repack(r *rand.Rand, f field) field {
	switch f.typ {
	case protowire.VarintType:
		var run []byte
		for range 1 + r.IntN(3) {
			run = append(run, f.value...)
		}
		return field{f.num, protowire.BytesType, protowire.AppendBytes(nil, run)}
	case protowire.BytesType:
		v, n := protowire.ConsumeBytes(f.value)
		if n < 0 || len(v) == 0 {
			return f
		}
		if _, m := protowire.ConsumeVarint(v); m > 0 {
			return field{f.num, protowire.VarintType, v[:m]}
		}
	}
	return f
}

// mangle breaks b: cuts it short, flips a byte, or adds stray bytes.
func mangle(r *rand.Rand, b []byte) []byte {
	b = append([]byte(nil), b...)
	switch {
	case len(b) > 0 && r.IntN(3) == 0:
		return b[:r.IntN(len(b))]
	case len(b) > 0 && r.IntN(2) == 0:
		b[r.IntN(len(b))] ^= byte(1 + r.IntN(255))
		return b
	}
	return append(b, byte(r.Uint32()), byte(r.Uint32()))
}

// Pieces cuts b into pieces as gRPC may hand a message over: one, or many
// of random lengths (some of one byte), so that values and tags straddle
// them.
func Pieces(r *rand.Rand, b []byte) [][]byte {
	if len(b) == 0 || r.IntN(4) == 0 {
		return [][]byte{b}
	}
	var out [][]byte
	for len(b) > 0 {
		n := 1 + r.IntN(min(len(b), 1+r.IntN(24)))
		if r.IntN(8) == 0 {
			out = append(out, nil) // an empty buffer
		}
		out = append(out, b[:n])
		b = b[n:]
	}
	return out
}
