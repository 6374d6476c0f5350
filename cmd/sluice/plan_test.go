package main

import (
	"context"
	"encoding/json"
	"math"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"

	"sluice/kernels/bound"
	sluicev1 "sluice/proto/sluice/v1"
)

// `sluice plan --m 1 --M 4 --dim 2 --eps 0.1 --metric tv --json` reports
// the plan a session makes: Dalalyan's (2017) TV rule for 0.9·ε (a tenth
// of ε is kept for the shift of the mode search's start), whose worked
// example at ε = 0.09 is h = 4.081222607730081e-05, K = 151969 (the
// rule's own example at ε = 0.1, K = 114873, is checked in kernels/bound
// against NumPy), and a bound of at most ε that counts the shift.
func TestPlanReproducesTheTVVector(t *testing.T) {
	code, stdout, stderr := runCmd(t, context.Background(), "plan", "--m", "1", "--M", "4", "--dim", "2", "--eps", "0.1", "--metric", "tv", "--json")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	var p planJSON
	if err := json.Unmarshal([]byte(stdout), &p); err != nil {
		t.Fatal(err)
	}
	rule, err := bound.TVRule(bound.Setting{Convexity: 1, Smoothness: 4, Dim: 2, Source: bound.Declared}, 0.09)
	if err != nil {
		t.Fatal(err)
	}
	if math.Abs(p.Step-rule.Step) > 1e-12*rule.Step || p.Iterations != int64(rule.Iterations) || p.Iterations != 151969 {
		t.Fatalf("plan %+v, the rule at 0.9·ε gives h = %v, K = %d", p, rule.Step, rule.Iterations)
	}
	if !p.ConstantsRecalled || p.Bound.Value > 0.1 || p.Bound.Value < 0.09 || p.Seconds != -1 {
		t.Fatalf("plan %+v", p)
	}
	if !strings.Contains(strings.Join(p.Assumptions, "\n"), "N(x̂, M⁻¹I)") {
		t.Fatalf("the assumptions do not say where the chains start: %q", p.Assumptions)
	}
}

// The Plan rpc gives the same plan as the local computation, and invalid
// input names the field.
func TestPlanRPCMatchesLocalAndNamesBadFields(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	addr := freeAddr(t)
	done := make(chan int, 1)
	sctx, stop := context.WithCancel(ctx)
	go func() {
		done <- run(sctx, []string{"serve", "--addr", addr, "--log-level", "error"}, &strings.Builder{}, &strings.Builder{})
	}()
	defer func() { stop(); <-done }()
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	req := &sluicev1.PlanRequest{Curvature: &sluicev1.Curvature{StrongConvexity: 1, Smoothness: 4}, Dim: 2, Eps: 0.1,
		Metric: sluicev1.Metric_METRIC_W2, Chains: 4, EvaluationsPerSecond: 1000}
	resp, err := sluicev1.NewSluiceServiceClient(conn).Plan(ctx, req, grpc.WaitForReady(true))
	if err != nil {
		t.Fatal(err)
	}
	code, stdout, _ := runCmd(t, ctx, "plan", "--m", "1", "--M", "4", "--dim", "2", "--eps", "0.1", "--metric", "w2", "--chains", "4", "--rate", "1000", "--json")
	var local planJSON
	if code != 0 || json.Unmarshal([]byte(stdout), &local) != nil {
		t.Fatalf("local plan: exit %d %s", code, stdout)
	}
	if resp.Step != local.Step || resp.Iterations != local.Iterations || resp.Evaluations != 4*resp.Iterations ||
		math.Abs(resp.Seconds-float64(resp.Evaluations)/1000) > 1e-9 {
		t.Fatalf("rpc %+v vs local %+v", resp, local)
	}
	for _, tc := range []struct {
		edit  func(*sluicev1.PlanRequest)
		field string
	}{
		{func(r *sluicev1.PlanRequest) { r.Eps = -1 }, "eps"},
		{func(r *sluicev1.PlanRequest) { r.Curvature.StrongConvexity = 5 }, "curvature.strong_convexity"},
		{func(r *sluicev1.PlanRequest) { r.Dim = 0 }, "dim"},
		{func(r *sluicev1.PlanRequest) { r.Metric = 0 }, "metric"},
		{func(r *sluicev1.PlanRequest) { r.Curvature = nil }, "curvature"},
	} {
		bad := &sluicev1.PlanRequest{Curvature: &sluicev1.Curvature{StrongConvexity: 1, Smoothness: 4}, Dim: 2, Eps: 0.1, Metric: sluicev1.Metric_METRIC_W2}
		tc.edit(bad)
		_, err := sluicev1.NewSluiceServiceClient(conn).Plan(ctx, bad)
		st := status.Convert(err)
		if st.Code() != 3 || !strings.HasPrefix(st.Message(), tc.field+":") {
			t.Errorf("want INVALID_ARGUMENT on %s, got %v %q", tc.field, st.Code(), st.Message())
		}
	}
	if code, _, _ := runCmd(t, ctx, "plan", "--m", "1", "--M", "4", "--dim", "2", "--eps", "0.9", "--metric", "tv"); code != 2 {
		t.Fatalf("eps 0.9 for TV: exit %d, want 2", code)
	}
}
