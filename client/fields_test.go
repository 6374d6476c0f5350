package client

import (
	"context"
	"reflect"
	"slices"
	"strings"
	"testing"
	"time"

	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/reflect/protoreflect"

	sluicev1 "sluice/proto/sluice/v1"
)

// These tests read the field lists of the wire API from the generated
// descriptors (protoreflect), so that a field added to
// proto/sluice/v1/sluice.proto and forgotten in this client fails here:
// every leaf of Register is filled from a Spec, every Spec field reaches
// the Register, and every leaf of Progress, Finished and PlanResponse
// changes the value this client decodes from it.

// registerNotFromSpec lists Register leaves that no Spec field sets on
// purpose (start_rows is derived from the length of Start and noise.kind
// from the presence of Noise, and both are checked here):
// accepts_draw_references and draws_in_points say what this client can
// do, not what the session is; Run sets them unless given the FullDraws
// option (TestDrawReferencesAreRebuilt).
var registerNotFromSpec = []string{"accepts_draw_references", "draws_in_points"}

// planRequestNotFromSpec lists PlanRequest leaves that Plan leaves unset on
// purpose: the request carries the start distance and second moment as
// fields of its own (which the server reads), not inside its Curvature,
// and a plan has no penalty centre.
var planRequestNotFromSpec = []string{"curvature.start_distance", "curvature.second_moment", "curvature.penalty_centre"}

type fieldPath []protoreflect.FieldDescriptor

func (p fieldPath) String() string {
	names := make([]string, len(p))
	for i, f := range p {
		names[i] = string(f.Name())
	}
	return strings.Join(names, ".")
}

// leafPaths returns every non-message field reachable from md through
// message fields of the sluice.v1 package.
func leafPaths(md protoreflect.MessageDescriptor, prefix fieldPath) []fieldPath {
	var out []fieldPath
	fields := md.Fields()
	for i := range fields.Len() {
		f := fields.Get(i)
		p := append(slices.Clip(prefix), f)
		if m := f.Message(); m != nil && m.ParentFile().Package() == "sluice.v1" {
			out = append(out, leafPaths(m, p)...)
		} else {
			out = append(out, p)
		}
	}
	return out
}

// distinctive returns a value unlike the field's default: the last value
// of an enum, true, 0.75, 3, "x", or the 8 bytes of the float64 0.75.
func distinctive(f protoreflect.FieldDescriptor) protoreflect.Value {
	switch f.Kind() {
	case protoreflect.EnumKind:
		vals := f.Enum().Values()
		return protoreflect.ValueOfEnum(vals.Get(vals.Len() - 1).Number())
	case protoreflect.BoolKind:
		return protoreflect.ValueOfBool(true)
	case protoreflect.DoubleKind:
		return protoreflect.ValueOfFloat64(0.75)
	case protoreflect.FloatKind:
		return protoreflect.ValueOfFloat32(0.75)
	case protoreflect.StringKind:
		return protoreflect.ValueOfString("x")
	case protoreflect.BytesKind:
		return protoreflect.ValueOfBytes(putFloats(nil, []float64{0.75}))
	case protoreflect.Int32Kind, protoreflect.Sint32Kind, protoreflect.Sfixed32Kind:
		return protoreflect.ValueOfInt32(3)
	case protoreflect.Int64Kind, protoreflect.Sint64Kind, protoreflect.Sfixed64Kind:
		return protoreflect.ValueOfInt64(3)
	case protoreflect.Uint32Kind, protoreflect.Fixed32Kind:
		return protoreflect.ValueOfUint32(3)
	case protoreflect.Uint64Kind, protoreflect.Fixed64Kind:
		return protoreflect.ValueOfUint64(3)
	}
	panic("client: no distinctive value for " + f.FullName())
}

// parentOf creates the path's enclosing messages (one element of each
// repeated one) and returns the innermost.
func parentOf(m protoreflect.Message, p fieldPath) protoreflect.Message {
	for _, f := range p[:len(p)-1] {
		if f.IsList() {
			l := m.Mutable(f).List()
			if l.Len() == 0 {
				l.Append(l.NewElement())
			}
			m = l.Get(0).Message()
		} else {
			m = m.Mutable(f).Message()
		}
	}
	return m
}

func setLeafTo(m protoreflect.Message, p fieldPath, v protoreflect.Value) {
	parent, f := parentOf(m, p), p[len(p)-1]
	if f.IsList() {
		parent.Mutable(f).List().Append(v)
	} else {
		parent.Set(f, v)
	}
}

// isSet reports whether the leaf holds a non-default value (in any element
// of a repeated enclosing message).
func isSet(m protoreflect.Message, p fieldPath) bool {
	f := p[0]
	if len(p) == 1 {
		return m.Has(f)
	}
	if f.IsList() {
		l := m.Get(f).List()
		for i := range l.Len() {
			if isSet(l.Get(i).Message(), p[1:]) {
				return true
			}
		}
		return false
	}
	return m.Has(f) && isSet(m.Get(f).Message(), p[1:])
}

// unread returns the leaves of example's message whose value does not
// change what convert makes of the message. An enum leaf is read when any
// of its non-zero values changes it (BOUND_SOURCE_ESTIMATED and
// UNSPECIFIED both decode to "not guaranteed").
func unread[M proto.Message](example M, convert func(M) any) []string {
	var out []string
	for _, p := range leafPaths(example.ProtoReflect().Descriptor(), nil) {
		base := example.ProtoReflect().New().Interface().(M)
		parentOf(base.ProtoReflect(), p)
		changed := false
		for _, v := range candidates(p[len(p)-1]) {
			full := proto.Clone(base).(M)
			setLeafTo(full.ProtoReflect(), p, v)
			changed = changed || !reflect.DeepEqual(convert(base), convert(full))
		}
		if !changed {
			out = append(out, p.String())
		}
	}
	return out
}

// candidates returns the distinctive value of a field, or every non-zero
// value of an enum.
func candidates(f protoreflect.FieldDescriptor) []protoreflect.Value {
	if f.Kind() != protoreflect.EnumKind {
		return []protoreflect.Value{distinctive(f)}
	}
	var out []protoreflect.Value
	vals := f.Enum().Values()
	for i := range vals.Len() {
		if n := vals.Get(i).Number(); n != 0 {
			out = append(out, protoreflect.ValueOfEnum(n))
		}
	}
	return out
}

// fill sets every field of the struct v points to a non-zero value,
// recursing into structs and pointers to structs; slices get n elements.
func fill(v reflect.Value, n int) {
	switch v.Kind() {
	case reflect.Pointer:
		v.Set(reflect.New(v.Type().Elem()))
		fill(v.Elem(), n)
	case reflect.Struct:
		for i := range v.NumField() {
			fill(v.Field(i), n)
		}
	case reflect.Slice:
		v.Set(reflect.MakeSlice(v.Type(), n, n))
		for i := range n {
			fill(v.Index(i), n)
		}
	case reflect.Bool:
		v.SetBool(true)
	case reflect.Int, reflect.Int32, reflect.Int64:
		if v.Type() == reflect.TypeFor[time.Duration]() {
			v.SetInt(int64(1500 * time.Millisecond))
		} else {
			v.SetInt(3)
		}
	case reflect.Uint64:
		v.SetUint(3)
	case reflect.Float64:
		v.SetFloat(0.75)
	case reflect.String:
		v.SetString("x")
	default:
		panic("client: fill: no value for " + v.Type().String())
	}
}

// fullSpec is a Spec with every field set (Dim 2, one start row).
func fullSpec() Spec {
	var s Spec
	fill(reflect.ValueOf(&s).Elem(), 2)
	s.Dim, s.Chains, s.Wants.Metric, s.MetricForm = 2, 3, TV, MetricDense
	return s
}

func TestEveryRegisterFieldComesFromTheSpec(t *testing.T) {
	s := fullSpec()
	reg := registerFrame(s, s.MaxMessageBytes).GetRegister().ProtoReflect() // Run's limit: the Spec's when > 0
	for _, p := range leafPaths(reg.Descriptor(), nil) {
		if !isSet(reg, p) && !slices.Contains(registerNotFromSpec, p.String()) {
			t.Errorf("Register.%s: no Spec field sets it", p)
		}
	}
}

func TestEverySpecFieldReachesTheRegister(t *testing.T) {
	base := Spec{Dim: 2, Chains: 1, Start: []float64{0, 0}, Step: 0.1}
	full := fullSpec()
	bv, fv := reflect.ValueOf(base), reflect.ValueOf(full)
	for i := range bv.NumField() {
		one := reflect.New(bv.Type()).Elem()
		one.Set(bv)
		one.Field(i).Set(fv.Field(i))
		name := bv.Type().Field(i).Name
		if name == "Dim" { // the full Dim equals the base's: Start changes with it
			one.FieldByName("Dim").SetInt(1)
			one.FieldByName("Start").Set(reflect.ValueOf([]float64{0}))
		}
		o := one.Interface().(Spec)
		if proto.Equal(registerFrame(o, o.MaxMessageBytes), registerFrame(base, base.MaxMessageBytes)) {
			t.Errorf("Spec.%s does not reach the Register frame", name)
		}
	}
}

func TestEveryProgressFieldIsRead(t *testing.T) {
	for _, f := range unread(&sluicev1.Progress{}, func(m *sluicev1.Progress) any { return progressFromWire(m) }) {
		t.Errorf("Progress.%s is not read into client.Progress", f)
	}
}

func TestEveryFollowHeaderFieldIsRead(t *testing.T) {
	for _, f := range unread(&sluicev1.FollowHeader{}, func(m *sluicev1.FollowHeader) any { return headerFromWire(m) }) {
		t.Errorf("FollowHeader.%s is not read into client.FollowHeader", f)
	}
}

func TestEveryFinishedFieldIsRead(t *testing.T) {
	convert := func(m *sluicev1.Finished) any {
		r := runner{sum: &Summary{}}
		r.finish(m)
		return *r.sum
	}
	for _, f := range unread(&sluicev1.Finished{}, convert) {
		t.Errorf("Finished.%s is not read into client.Summary", f)
	}
}

func TestEveryPlanFieldIsUsed(t *testing.T) {
	for _, f := range unread(&sluicev1.PlanResponse{}, func(m *sluicev1.PlanResponse) any { return planFromWire(m) }) {
		t.Errorf("PlanResponse.%s is not read into client.PlanResult", f)
	}
	var spec PlanSpec
	fill(reflect.ValueOf(&spec).Elem(), 2)
	spec.Metric = W2
	var got *sluicev1.PlanRequest
	cc := startFake(t, &fakeServer{plan: func(_ context.Context, r *sluicev1.PlanRequest) (*sluicev1.PlanResponse, error) {
		got = r
		return &sluicev1.PlanResponse{}, nil
	}})
	if _, err := Plan(context.Background(), cc, spec); err != nil {
		t.Fatal(err)
	}
	for _, p := range leafPaths(got.ProtoReflect().Descriptor(), nil) {
		if !isSet(got.ProtoReflect(), p) && !slices.Contains(planRequestNotFromSpec, p.String()) {
			t.Errorf("PlanRequest.%s: no PlanSpec field sets it", p)
		}
	}
}
