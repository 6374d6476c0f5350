package kernels

import (
	"encoding/binary"
	"fmt"
	"math"
	"math/rand/v2"
)

// The one state codec every kernel's MarshalBinary and UnmarshalBinary
// use. A state is a versioned record of named fields, little-endian:
//
//	"sluice-state" | version u16 | kind (u8 length, bytes) | fields u32
//	then per field: name (u8 length, bytes) | tag u8 | count u32 | payload
//
// with tag 'f' (count float64 values), 'i' (count int64 values) or 'b'
// (count bytes, used for the random stream's state). Every length is
// checked against the bytes that remain before anything is allocated, a
// name may appear once, and nothing may follow the last field, so corrupt
// or truncated input is an error and never a panic or a huge allocation.
// A kernel reads its fields by name and then validates their values and
// shapes itself.

const (
	stateMagic   = "sluice-state"
	stateVersion = 1
)

// stateWriter builds one record.
type stateWriter struct {
	b      []byte
	fields uint32
	err    error
}

// newStateWriter starts a record of the given kind (the kernel's name).
func newStateWriter(kind string) *stateWriter {
	w := &stateWriter{b: make([]byte, 0, 256)}
	w.b = append(w.b, stateMagic...)
	w.b = binary.LittleEndian.AppendUint16(w.b, stateVersion)
	w.b = append(w.b, byte(len(kind)))
	w.b = append(w.b, kind...)
	w.b = binary.LittleEndian.AppendUint32(w.b, 0) // field count, set by bytes
	return w
}

func (w *stateWriter) head(name string, tag byte, n int) {
	if len(name) > 255 || n > math.MaxUint32 {
		panic(fmt.Sprintf("kernels: state field %q with %d values", name, n))
	}
	w.b = append(w.b, byte(len(name)))
	w.b = append(w.b, name...)
	w.b = append(w.b, tag)
	w.b = binary.LittleEndian.AppendUint32(w.b, uint32(n))
	w.fields++
}

// floats writes a named array of float64 values.
func (w *stateWriter) floats(name string, v ...float64) {
	w.head(name, 'f', len(v))
	for _, f := range v {
		w.b = binary.LittleEndian.AppendUint64(w.b, math.Float64bits(f))
	}
}

// ints writes a named array of integers.
func (w *stateWriter) ints(name string, v ...int) {
	w.head(name, 'i', len(v))
	for _, x := range v {
		w.b = binary.LittleEndian.AppendUint64(w.b, uint64(int64(x)))
	}
}

// flag writes a boolean as an integer 0 or 1.
func (w *stateWriter) flag(name string, v bool) {
	x := 0
	if v {
		x = 1
	}
	w.ints(name, x)
}

// stream writes the state of a PCG random stream.
func (w *stateWriter) stream(name string, src *rand.PCG) {
	rs, err := src.MarshalBinary()
	if err != nil && w.err == nil {
		w.err = err
	}
	w.head(name, 'b', len(rs))
	w.b = append(w.b, rs...)
}

// raw writes a named array of bytes (another record, for example).
func (w *stateWriter) raw(name string, v []byte) {
	w.head(name, 'b', len(v))
	w.b = append(w.b, v...)
}

// bytes returns the finished record.
func (w *stateWriter) bytes() ([]byte, error) {
	if w.err != nil {
		return nil, w.err
	}
	at := len(stateMagic) + 2 + 1 + int(w.b[len(stateMagic)+2])
	binary.LittleEndian.PutUint32(w.b[at:], w.fields)
	return w.b, nil
}

// stateField is one parsed field; data aliases the input.
type stateField struct {
	tag   byte
	count int
	data  []byte
}

// stateRecord is a parsed record. Its getters remember the first error
// (a missing field, a wrong type or a wrong length) and return zero values
// after it, so a kernel reads all its fields and checks err once.
type stateRecord struct {
	kind   string
	size   int // bytes in the record
	fields map[string]stateField
	err    error
}

// readState parses b as a record of the given kind.
func readState(b []byte, kind string) (*stateRecord, error) {
	bad := func(what string) error {
		return fmt.Errorf("kernels: corrupt %s state: %s", kind, what)
	}
	if len(b) < len(stateMagic)+2+1 || string(b[:len(stateMagic)]) != stateMagic {
		return nil, fmt.Errorf("kernels: not a %s state", kind)
	}
	b = b[len(stateMagic):]
	if v := binary.LittleEndian.Uint16(b); v != stateVersion {
		return nil, fmt.Errorf("kernels: %s state version %d, want %d", kind, v, stateVersion)
	}
	b = b[2:]
	n := int(b[0])
	b = b[1:]
	if len(b) < n {
		return nil, bad("truncated kind")
	}
	if string(b[:n]) != kind {
		return nil, fmt.Errorf("kernels: not a %s state (a %q state)", kind, b[:n])
	}
	b = b[n:]
	if len(b) < 4 {
		return nil, bad("truncated field count")
	}
	count := binary.LittleEndian.Uint32(b)
	b = b[4:]
	// Each field takes at least 6 bytes: bound the map before making it.
	if uint64(count) > uint64(len(b)/6) {
		return nil, bad("field count exceeds input")
	}
	r := &stateRecord{kind: kind, size: len(b), fields: make(map[string]stateField, count)}
	for range count {
		if len(b) < 1 {
			return nil, bad("truncated field")
		}
		nl := int(b[0])
		if len(b) < 1+nl+1+4 {
			return nil, bad("truncated field")
		}
		name := string(b[1 : 1+nl])
		b = b[1+nl:]
		tag := b[0]
		cnt := uint64(binary.LittleEndian.Uint32(b[1:]))
		b = b[5:]
		size := cnt
		switch tag {
		case 'f', 'i':
			size = 8 * cnt
		case 'b':
		default:
			return nil, bad(fmt.Sprintf("field %q has unknown type %d", name, tag))
		}
		if size > uint64(len(b)) {
			return nil, bad(fmt.Sprintf("field %q truncated", name))
		}
		if _, dup := r.fields[name]; dup {
			return nil, bad(fmt.Sprintf("field %q repeated", name))
		}
		r.fields[name] = stateField{tag: tag, count: int(cnt), data: b[:size]}
		b = b[size:]
	}
	if len(b) != 0 {
		return nil, bad(fmt.Sprintf("%d bytes after the last field", len(b)))
	}
	return r, nil
}

func (r *stateRecord) fail(format string, a ...any) {
	if r.err == nil {
		r.err = fmt.Errorf("kernels: corrupt %s state: %s", r.kind, fmt.Sprintf(format, a...))
	}
}

// field returns the named field if it has the tag and, with n ≥ 0,
// exactly n values.
func (r *stateRecord) field(name string, tag byte, n int) (stateField, bool) {
	if r.err != nil {
		return stateField{}, false
	}
	f, ok := r.fields[name]
	switch {
	case !ok:
		r.fail("field %q missing", name)
	case f.tag != tag:
		r.fail("field %q has the wrong type", name)
	case n >= 0 && f.count != n:
		r.fail("field %q has %d values, want %d", name, f.count, n)
	default:
		return f, true
	}
	return stateField{}, false
}

// has reports whether the record holds the named field.
func (r *stateRecord) has(name string) bool {
	_, ok := r.fields[name]
	return ok
}

// floats returns a new slice with the named float array, which must have
// exactly n values (any number with n < 0).
func (r *stateRecord) floats(name string, n int) []float64 {
	f, ok := r.field(name, 'f', n)
	if !ok {
		return nil
	}
	out := make([]float64, f.count)
	for i := range out {
		out[i] = math.Float64frombits(binary.LittleEndian.Uint64(f.data[8*i:]))
	}
	return out
}

// fill copies the named float array, of exactly len(dst) values, into dst.
func (r *stateRecord) fill(name string, dst []float64) {
	if v := r.floats(name, len(dst)); v != nil {
		copy(dst, v)
	}
}

// float returns the named single float.
func (r *stateRecord) float(name string) float64 {
	if v := r.floats(name, 1); v != nil {
		return v[0]
	}
	return 0
}

// ints returns the named integer array of exactly n values (any with
// n < 0).
func (r *stateRecord) ints(name string, n int) []int {
	f, ok := r.field(name, 'i', n)
	if !ok {
		return nil
	}
	out := make([]int, f.count)
	for i := range out {
		v := int64(binary.LittleEndian.Uint64(f.data[8*i:]))
		if int64(int(v)) != v {
			r.fail("field %q overflows int", name)
			return nil
		}
		out[i] = int(v)
	}
	return out
}

// integer returns the named single integer.
func (r *stateRecord) integer(name string) int {
	if v := r.ints(name, 1); v != nil {
		return v[0]
	}
	return 0
}

// flag returns the named boolean (an integer that must be 0 or 1).
func (r *stateRecord) flag(name string) bool {
	v := r.integer(name)
	if v != 0 && v != 1 {
		r.fail("field %q is %d, want 0 or 1", name, v)
	}
	return v == 1
}

// raw returns the named array of bytes; it aliases the input.
func (r *stateRecord) raw(name string) []byte {
	f, ok := r.field(name, 'b', -1)
	if !ok {
		return nil
	}
	return f.data
}

// stream returns the named PCG random stream.
func (r *stateRecord) stream(name string) *rand.PCG {
	f, ok := r.field(name, 'b', -1)
	if !ok {
		return nil
	}
	src := &rand.PCG{}
	if err := src.UnmarshalBinary(f.data); err != nil {
		r.fail("random stream %q: %v", name, err)
		return nil
	}
	return src
}

// shape reads the integers "dim" and "chains" and checks that both are
// positive and that an array of dim×chains float64 values fits in the
// record, as every kernel's positions do (so a corrupt count cannot make a
// kernel allocate beyond a small multiple of the input's size).
func (r *stateRecord) shape() (dim, chains int) {
	dim, chains = r.integer("dim"), r.integer("chains")
	if r.err != nil {
		return 0, 0
	}
	if dim < 1 || chains < 1 || dim > r.size/8/chains {
		r.fail("dim %d, chains %d", dim, chains)
		return 0, 0
	}
	return dim, chains
}

// check reports r.err, adding a failure when ok is false.
func (r *stateRecord) check(ok bool, what string) error {
	if r.err == nil && !ok {
		r.fail("%s", what)
	}
	return r.err
}

// positive reports whether v is a positive finite number.
func positive(v float64) bool { return v > 0 && !math.IsInf(v, 1) }
