package kernels

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"math"
	"reflect"
	"slices"
	"strings"
	"testing"
)

// editState returns the record b of the given kind with the named field
// replaced by an integer field holding vals (or removed when vals is
// nil), re-serialised in name order. Tests use it to build corrupt
// states field by field.
func editState(t testing.TB, b []byte, kind, name string, vals ...int) []byte {
	t.Helper()
	r, err := readState(b, kind)
	if err != nil {
		t.Fatal(err)
	}
	w := newStateWriter(kind)
	names := make([]string, 0, len(r.fields))
	for n := range r.fields {
		names = append(names, n)
	}
	if _, ok := r.fields[name]; !ok && vals != nil {
		names = append(names, name)
	}
	slices.Sort(names)
	for _, n := range names {
		if n == name {
			if vals != nil {
				w.ints(n, vals...)
			}
			continue
		}
		f := r.fields[n]
		w.head(n, f.tag, f.count)
		w.b = append(w.b, f.data...)
	}
	out, err := w.bytes()
	if err != nil {
		t.Fatal(err)
	}
	return out
}

// sampleState is a record with one field of every type.
func sampleState() []byte {
	w := newStateWriter("Sample")
	w.ints("dim", 2)
	w.ints("chains", 3)
	w.floats("h", 0.25)
	w.floats("x", 1, -2, math.Inf(1), math.NaN(), 0, math.SmallestNonzeroFloat64)
	w.flag("ready", true)
	w.ints("counts", -5, 0, math.MaxInt64)
	w.stream("rng", NewSource(7))
	b, _ := w.bytes()
	return b
}

// Every field written is read back bit for bit, and the stream resumes
// where it was.
func TestStateRoundTrip(t *testing.T) {
	b := sampleState()
	r, err := readState(b, "Sample")
	if err != nil {
		t.Fatal(err)
	}
	dim, chains := r.shape()
	x := r.floats("x", dim*chains)
	want := []float64{1, -2, math.Inf(1), math.NaN(), 0, math.SmallestNonzeroFloat64}
	for i := range want {
		if math.Float64bits(x[i]) != math.Float64bits(want[i]) {
			t.Fatalf("x[%d] = %v, want %v", i, x[i], want[i])
		}
	}
	if h, rd, c := r.float("h"), r.flag("ready"), r.ints("counts", 3); h != 0.25 || !rd || !slices.Equal(c, []int{-5, 0, math.MaxInt64}) {
		t.Fatalf("h %v ready %v counts %v", h, rd, c)
	}
	src := r.stream("rng")
	if r.err != nil {
		t.Fatal(r.err)
	}
	ref := NewSource(7)
	for range 5 {
		if a, b := src.Uint64(), ref.Uint64(); a != b {
			t.Fatalf("restored stream gives %d, want %d", a, b)
		}
	}
}

// Wrong kind, version, lengths, types, repeated or missing fields are
// errors.
func TestStateRejectsCorruptRecords(t *testing.T) {
	b := sampleState()
	if _, err := readState(b, "Other"); err == nil || !strings.Contains(err.Error(), "not a Other state") {
		t.Fatalf("wrong kind: %v", err)
	}
	v2 := bytes.Clone(b)
	binary.LittleEndian.PutUint16(v2[len(stateMagic):], 2)
	if _, err := readState(v2, "Sample"); err == nil {
		t.Fatal("version 2 accepted")
	}
	for n := range len(b) {
		if _, err := readState(b[:n], "Sample"); err == nil {
			t.Fatalf("truncated record of %d bytes accepted", n)
		}
	}
	if _, err := readState(append(bytes.Clone(b), 0), "Sample"); err == nil {
		t.Fatal("trailing byte accepted")
	}
	r, _ := readState(b, "Sample")
	if r.floats("x", 5); r.err == nil {
		t.Fatal("wrong length accepted")
	}
	r, _ = readState(b, "Sample")
	if r.ints("h", 1); r.err == nil {
		t.Fatal("wrong type accepted")
	}
	r, _ = readState(b, "Sample")
	if r.float("missing"); r.err == nil {
		t.Fatal("missing field accepted")
	}
	r, _ = readState(editState(t, b, "Sample", "ready", 2), "Sample")
	if r.flag("ready"); r.err == nil {
		t.Fatal("flag 2 accepted")
	}
	for _, dc := range [][2]int{{0, 3}, {2, 0}, {-1, 3}, {1 << 40, 1 << 24}, {math.MaxInt64, 2}} {
		s := editState(t, editState(t, b, "Sample", "dim", dc[0]), "Sample", "chains", dc[1])
		r, _ := readState(s, "Sample")
		if r.shape(); r.err == nil {
			t.Fatalf("dim %d chains %d accepted", dc[0], dc[1])
		}
	}
	// A repeated name.
	w := newStateWriter("Sample")
	w.ints("a", 1)
	w.ints("a", 2)
	dup, _ := w.bytes()
	if _, err := readState(dup, "Sample"); err == nil {
		t.Fatal("repeated field accepted")
	}
}

// FuzzStateRecord: any input is parsed or refused without a panic, and a
// record that parses re-serialises to itself field by field.
func FuzzStateRecord(f *testing.F) {
	f.Add(sampleState())
	f.Add([]byte(stateMagic))
	f.Add([]byte{})
	for _, k := range fuzzKernels() {
		b, _ := k.(Checkpointer).MarshalBinary()
		f.Add(b)
	}
	dense, _ := NewDenseMetric(3, metricSigma)
	for _, k := range metricKernels() {
		k.(MetricUser).SetMetric(dense)
		a := &Answer{}
		stateTestEval(k.Next(), a)
		k.Tell(a)
		b, _ := k.(Checkpointer).MarshalBinary()
		f.Add(b)
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		r, err := readState(b, "Sample")
		if err == nil {
			r.shape()
			r.floats("x", -1)
			r.stream("rng")
		}
		// Every kernel refuses the input or accepts it without panicking,
		// and an accepted state marshals again.
		for _, k := range fuzzKernels() {
			if k.(Checkpointer).UnmarshalBinary(b) == nil {
				if _, err := k.(Checkpointer).MarshalBinary(); err != nil {
					t.Fatalf("%T: accepted state does not marshal: %v", k, err)
				}
			}
		}
	})
}

// fuzzKernels returns one small kernel of every kind.
func fuzzKernels() []Kernel {
	p, c := 3, 2
	x0 := []float64{0.5, -0.25, 1}
	return []Kernel{
		NewLMC(p, c, 0.1, x0, NewSource(1)),
		NewKinetic(p, c, 0.1, 0, 0, x0, nil, NewSource(2)),
		NewMidpoint(p, c, 0.1, 0, x0, nil, NewSource(3)),
		NewOverdampedMidpoint(p, c, 0.1, x0, NewSource(4)),
		NewMALA(p, c, 0.3, 5, x0, NewSource(5)),
		NewSGLD(p, c, 0.05, SGLDSchedule{}, x0, NewSource(6)),
		NewSGLDCV(p, c, 0.05, SGLDCVOptions{MaxIter: 3}, x0, NewSource(7)),
		NewSVRG(p, c, 0.05, 3, x0, NewSource(8)),
		NewOzaki(p, c, 0.1, x0, NewSource(9)),
		NewOzakiKrylov(p, c, 0.1, x0, 1e-8, 3, NewSource(10)),
		NewHitAndRun(p, c, x0, HitAndRunOptions{}, NewSource(11)),
		NewRejection(p, c, make([]float64, p), 1.5, float64(p)*math.Log(1.5)+1, NewSource(12)),
		NewBAOAB(p, c, 0.1, 0, 0, x0, nil, NewSource(13)),
	}
}

// stateTestLambda is the precision of the Gaussian N(0, diag(1/λ)) every
// kernel is driven on in the round-trip test.
var stateTestLambda = []float64{1, 1.5, 2}

// stateTestEval answers any request on N(0, diag(1/λ)): gradient, log
// density (normalised), Hessian and Hessian-vector products.
func stateTestEval(req *Request, a *Answer) {
	p := len(stateTestLambda)
	a.Reserve(req.Need|NeedHessian|NeedHessianVector, req.Rows, p)
	clear(a.Hessian)
	for r := range req.Rows {
		x := req.Points[r*p : (r+1)*p]
		lp := -0.5 * float64(p) * math.Log(2*math.Pi)
		for i, l := range stateTestLambda {
			a.Grad[r*p+i] = -l * x[i]
			lp += 0.5*math.Log(l) - 0.5*l*x[i]*x[i]
			a.Hessian[r*p*p+i*p+i] = -l
			if req.Vectors != nil {
				a.HessVec[r*p+i] = -l * req.Vectors[r*p+i]
			}
		}
		a.LogDensity[r] = lp
	}
}

// Every kernel, marshalled after each of its first Tells (so within a
// step for the kernels with several requests per step) and unmarshalled
// into a zero kernel of its type, continues bit for bit like the
// original, and the two end in the same state.
func TestStateRoundTripEveryKernel(t *testing.T) {
	for i := range fuzzKernels() {
		name := fmt.Sprintf("%T", fuzzKernels()[i])
		t.Run(name, func(t *testing.T) {
			for tells := range 7 {
				k := fuzzKernels()[i]
				a := &Answer{}
				for range tells {
					stateTestEval(k.Next(), a)
					k.Tell(a)
				}
				b, err := k.(Checkpointer).MarshalBinary()
				if err != nil {
					t.Fatal(err)
				}
				r := newLike(k)
				if err := r.(Checkpointer).UnmarshalBinary(b); err != nil {
					t.Fatalf("after %d Tells: %v", tells, err)
				}
				ar := &Answer{}
				for n := range 12 {
					stateTestEval(k.Next(), a)
					stateTestEval(r.Next(), ar)
					if k.Tell(a) != r.Tell(ar) {
						t.Fatalf("after %d Tells, Tell %d: step completion differs", tells, n)
					}
					if !hitrunEqualBits(k.Positions(), r.Positions()) || k.Steps() != r.Steps() {
						t.Fatalf("after %d Tells, Tell %d: positions or steps differ", tells, n)
					}
				}
				sk, _ := k.(Checkpointer).MarshalBinary()
				sr, _ := r.(Checkpointer).MarshalBinary()
				if !bytes.Equal(sk, sr) {
					t.Fatalf("after %d Tells: states differ after identical continuation", tells)
				}
			}
		})
	}
}

// newLike returns a zero kernel of k's type.
func newLike(k Kernel) Kernel { return reflect.New(reflect.TypeOf(k).Elem()).Interface().(Kernel) }
