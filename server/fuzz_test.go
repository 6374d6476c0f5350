package server

import (
	"testing"

	"google.golang.org/protobuf/proto"

	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
)

// Registration and answer decoding never panic on arbitrary input: every
// refusal is a *session.Error naming a field (validation is
// fuzzed). `go test -fuzz FuzzRegister ./server/` explores further; plain
// `go test` runs the seeds.
func FuzzRegister(f *testing.F) {
	seed := func(r *sluicev1.Register) {
		b, _ := proto.Marshal(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Register{Register: r}})
		f.Add(b)
	}
	seed(&sluicev1.Register{Dim: 2, Chains: 3, Start: make([]byte, 16), StartRows: 1, Step: 0.1})
	seed(&sluicev1.Register{Dim: 1, Chains: 1, Start: make([]byte, 8), StartRows: 1, Step: 1e-3, MaxSeconds: 3, Names: []string{"a"}})
	seed(&sluicev1.Register{Dim: -4, Chains: 1 << 30, Step: -1, MaxSeconds: -1, Start: []byte{1, 2, 3}})
	seed(&sluicev1.Register{Dim: 1 << 30, Chains: 1 << 30, StartRows: 1, Step: 1})
	f.Fuzz(func(t *testing.T, b []byte) {
		var req sluicev1.SessionRequest
		if proto.Unmarshal(b, &req) != nil || req.GetRegister() == nil {
			return
		}
		spec, err := specFromWire(req.GetRegister())
		if err == nil {
			_, err = session.New("fuzz", spec, session.Limits{MaxDim: 1 << 12, MaxChains: 1 << 10, MaxValues: 1 << 16})
		}
		if err != nil {
			if e, ok := session.AsError(err); !ok || e.Field == "" {
				t.Fatalf("refusal without a field: %v", err)
			}
		}
	})
}

// Decoding an arbitrary answer frame never panics.
func FuzzEvaluations(f *testing.F) {
	b, _ := proto.Marshal(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{Evaluations: &sluicev1.Evaluations{
		RequestId: 1, Rows: 2, Dim: 2, Gradients: make([]byte, 32), Hessians: make([]byte, 7)}}})
	f.Add(b)
	f.Fuzz(func(t *testing.T, b []byte) {
		var req sluicev1.SessionRequest
		if proto.Unmarshal(b, &req) != nil {
			return
		}
		var buf []float64
		m := messageFromWire(&req, &buf)
		if m.Err != nil {
			if _, ok := session.AsError(m.Err); !ok {
				t.Fatalf("decode error is not a field error: %v", m.Err)
			}
		}
	})
}
