package server

import (
	"testing"

	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
)

// Registration and answer decoding never panic on arbitrary input: every
// refusal is a *session.Error naming a field, and becomes a status whose
// BadRequest detail names it; an accepted budget is within the
// per-session limit. `go test -run XXX -fuzz '^FuzzRegister$' -fuzztime
// 10s ./server/` explores further; plain `go test` runs the seeds and the
// committed corpus (testdata/fuzz).
func FuzzRegister(f *testing.F) {
	seed := func(r *sluicev1.Register) {
		b, _ := proto.Marshal(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Register{Register: r}})
		f.Add(b)
	}
	seed(&sluicev1.Register{Dim: 2, Chains: 3, Start: make([]byte, 16), StartRows: 1, Step: 0.1})
	seed(&sluicev1.Register{Dim: 1, Chains: 1, Start: make([]byte, 8), StartRows: 1, Step: 1e-3, MaxSeconds: 3, Names: []string{"a"}})
	seed(&sluicev1.Register{Dim: -4, Chains: 1 << 30, Step: -1, MaxSeconds: -1, Start: []byte{1, 2, 3}})
	seed(&sluicev1.Register{Dim: 1 << 30, Chains: 1 << 30, StartRows: 1, Step: 1})
	seed(&sluicev1.Register{Kernel: "ozaki", Dim: 512, Chains: 1 << 10, StartRows: 1, Start: make([]byte, 8*512), Step: 0.1})
	seed(&sluicev1.Register{Kernel: "svrg", Dim: 4, Chains: 2, StartRows: 1, Start: make([]byte, 32), Step: 0.1,
		Noise: &sluicev1.GradientNoise{Kind: sluicev1.GradientKind_GRADIENT_KIND_STOCHASTIC, Replicates: 64}})
	seed(&sluicev1.Register{Kernel: "ozaki-krylov", Dim: 8, Chains: 4, StartRows: 1, Start: make([]byte, 64), Step: 0.1, KrylovMaxIterations: 1 << 30})
	seed(&sluicev1.Register{Dim: 2, Chains: 1, StartRows: 1, Start: make([]byte, 16), Step: 0.1, Names: []string{"a", string(make([]byte, 300))}})
	f.Fuzz(func(t *testing.T, b []byte) {
		var req sluicev1.SessionRequest
		if proto.Unmarshal(b, &req) != nil || req.GetRegister() == nil {
			return
		}
		lim := session.Limits{MaxDim: 1 << 12, MaxChains: 1 << 10, MaxValues: 1 << 16, MaxSessionBytes: 64 << 20, FollowBuffer: 100}
		spec, err := specFromWire(req.GetRegister())
		if err == nil {
			var b session.Budget
			b, err = session.Need(spec, lim)
			if err == nil && b.Total > lim.MaxSessionBytes {
				t.Fatalf("budget %d accepted over the limit %d", b.Total, lim.MaxSessionBytes)
			}
		}
		if err == nil {
			_, err = session.New("fuzz", spec, lim)
		}
		if err != nil {
			if e, ok := session.AsError(err); !ok || e.Field == "" {
				t.Fatalf("refusal without a field: %v", err)
			}
			statusNamesField(t, err)
		}
	})
}

// Decoding an arbitrary answer frame never panics.
func FuzzEvaluations(f *testing.F) {
	b, _ := proto.Marshal(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{Evaluations: &sluicev1.Evaluations{
		RequestId: 1, Rows: 2, Dim: 2, Gradients: make([]byte, 32), Hessians: make([]byte, 7)}}})
	f.Add(b)
	b, _ = proto.Marshal(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{Evaluations: &sluicev1.Evaluations{
		RequestId: 3, Rows: 1, Dim: 2, Gradients: make([]byte, 16), LogDensities: make([]byte, 8), Hessians: make([]byte, 32), HessianVectors: make([]byte, 16)}}})
	f.Add(b)
	b, _ = proto.Marshal(&sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Stop{Stop: &sluicev1.Stop{Reason: string(make([]byte, 2000))}}})
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
			statusNamesField(t, m.Err)
		}
	})
}

// statusNamesField checks that err becomes a status carrying a
// BadRequest detail that names a field.
func statusNamesField(t *testing.T, err error) {
	t.Helper()
	st := status.Convert(toStatus(err))
	for _, d := range st.Details() {
		if br, ok := d.(*errdetails.BadRequest); ok && len(br.FieldViolations) > 0 && br.FieldViolations[0].Field != "" {
			return
		}
	}
	t.Fatalf("status %v %q names no field", st.Code(), st.Message())
}
