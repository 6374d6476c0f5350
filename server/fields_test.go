package server

import (
	"encoding/binary"
	"math"
	"reflect"
	"slices"
	"strings"
	"testing"
	"time"

	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/reflect/protoreflect"

	"sluice/kernels/bound"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
)

// registerIgnored lists the Register fields the server deliberately does
// not read into the engine's Spec: none. A field added to
// proto/sluice/v1/sluice.proto and forgotten in specFromWire fails
// TestEveryRegisterFieldIsRead unless it is named here with the reason.
var registerIgnored = map[string]string{}

// TestEveryRegisterFieldIsRead sets each leaf field of Register alone (the
// field list comes from the generated descriptor) and checks that the
// engine Spec decoded from it differs from the one decoded without it. An
// enum leaf counts as read when any of its non-zero values changes the
// Spec (GRADIENT_KIND_EXACT is the default, only STOCHASTIC changes it).
func TestEveryRegisterFieldIsRead(t *testing.T) {
	for _, p := range registerLeaves((&sluicev1.Register{}).ProtoReflect().Descriptor(), nil) {
		name := pathName(p)
		base := &sluicev1.Register{}
		parentOf(base.ProtoReflect(), p)
		want, err := specFromWire(base)
		if err != nil {
			t.Fatalf("%s: base: %v", name, err)
		}
		read := false
		for _, v := range leafValues(p[len(p)-1]) {
			full := proto.Clone(base).(*sluicev1.Register)
			leaf := parentOf(full.ProtoReflect(), p)
			if f := p[len(p)-1]; f.IsList() {
				leaf.Mutable(f).List().Append(v)
			} else {
				leaf.Set(f, v)
			}
			got, err := specFromWire(full)
			if err != nil {
				t.Fatalf("%s: %v", name, err)
			}
			read = read || !reflect.DeepEqual(got, want)
		}
		_, ignored := registerIgnored[name]
		switch {
		case !read && !ignored:
			t.Errorf("Register.%s is not read by specFromWire", name)
		case read && ignored:
			t.Errorf("Register.%s is read but listed as ignored", name)
		}
	}
}

// registerLeaves returns every non-message field reachable from md through
// message fields of the sluice.v1 package, as field paths.
func registerLeaves(md protoreflect.MessageDescriptor, prefix []protoreflect.FieldDescriptor) [][]protoreflect.FieldDescriptor {
	var out [][]protoreflect.FieldDescriptor
	fields := md.Fields()
	for i := range fields.Len() {
		f := fields.Get(i)
		p := append(slices.Clip(prefix), f)
		if m := f.Message(); m != nil && m.ParentFile().Package() == "sluice.v1" {
			out = append(out, registerLeaves(m, p)...)
		} else {
			out = append(out, p)
		}
	}
	return out
}

func pathName(p []protoreflect.FieldDescriptor) string {
	names := make([]string, len(p))
	for i, f := range p {
		names[i] = string(f.Name())
	}
	return strings.Join(names, ".")
}

// parentOf creates the path's enclosing messages and returns the
// innermost.
func parentOf(m protoreflect.Message, p []protoreflect.FieldDescriptor) protoreflect.Message {
	for _, f := range p[:len(p)-1] {
		m = m.Mutable(f).Message()
	}
	return m
}

// leafValues returns values unlike the field's default that decode
// cleanly: every non-zero enum value, true, 0.75, 3, "x", or the 8 bytes
// of the float64 0.75.
func leafValues(f protoreflect.FieldDescriptor) []protoreflect.Value {
	switch f.Kind() {
	case protoreflect.EnumKind:
		var out []protoreflect.Value
		vals := f.Enum().Values()
		for i := range vals.Len() {
			if n := vals.Get(i).Number(); n != 0 {
				out = append(out, protoreflect.ValueOfEnum(n))
			}
		}
		return out
	case protoreflect.BoolKind:
		if f.HasPresence() { // an optional bool whose default is true is read when false
			return []protoreflect.Value{protoreflect.ValueOfBool(true), protoreflect.ValueOfBool(false)}
		}
		return []protoreflect.Value{protoreflect.ValueOfBool(true)}
	case protoreflect.DoubleKind:
		return []protoreflect.Value{protoreflect.ValueOfFloat64(0.75)}
	case protoreflect.StringKind:
		return []protoreflect.Value{protoreflect.ValueOfString("x")}
	case protoreflect.BytesKind:
		return []protoreflect.Value{protoreflect.ValueOfBytes(binary.LittleEndian.AppendUint64(nil, math.Float64bits(0.75)))}
	case protoreflect.Int32Kind:
		return []protoreflect.Value{protoreflect.ValueOfInt32(3)}
	case protoreflect.Int64Kind:
		return []protoreflect.Value{protoreflect.ValueOfInt64(3)}
	case protoreflect.Uint64Kind:
		return []protoreflect.Value{protoreflect.ValueOfUint64(3)}
	}
	panic("server: fields test: no value for " + f.FullName())
}

// TestEveryFollowHeaderFieldIsWritten converts a header whose every
// figure is set and checks that each leaf of FollowHeader (the field list
// comes from the generated descriptor) holds a non-default value, except
// the sequence numbers, which Follow sets from the log when it sends the
// header.
func TestEveryFollowHeaderFieldIsWritten(t *testing.T) {
	h := session.Header{SessionID: "s", Dim: 2, Chains: 3, Kernel: "lmc", Names: []string{"a", "b"}, Step: 0.5, Seed: 7,
		BurnIn: 4, KeepEvery: 2, DrawsPerChain: 9, MaxEvaluations: 11, MaxTime: time.Second, EvaluationsPerStep: 3,
		Wants: session.Wants{MinBulkESS: 1, MinTailESS: 2, MaxRhat: 1.1, MaxKSD: 0.5, Eps: 0.1, Metric: bound.W2}}
	w := headerToWire(h).ProtoReflect()
	setBySender := map[string]bool{"first_seq": true, "next_seq": true}
	for _, p := range registerLeaves(w.Descriptor(), nil) {
		name := pathName(p)
		m := w
		for _, f := range p[:len(p)-1] {
			m = m.Get(f).Message()
		}
		if f := p[len(p)-1]; !m.Has(f) && !setBySender[name] {
			t.Errorf("FollowHeader.%s is not written by headerToWire", name)
		}
	}
}
