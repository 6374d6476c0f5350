package main

import (
	"bytes"
	"context"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/status"

	sluicev1 "sluice/proto/sluice/v1"
)

func TestServeRefusesUnsafeSettings(t *testing.T) {
	ctx := context.Background()
	dir := t.TempDir()
	short := filepath.Join(dir, "short")
	if err := os.WriteFile(short, []byte("tiny\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"serve", "--addr", "0.0.0.0:0"}, "--insecure"},
		{[]string{"serve", "--addr", ":0"}, "--insecure"},
		{[]string{"serve", "--pprof"}, "--pprof needs --metrics-addr"},
		{[]string{"serve", "--metrics-addr", "0.0.0.0:0"}, "--metrics-addr"},
		{[]string{"serve", "--tls-cert", filepath.Join(dir, "cert.pem")}, "key"},
		{[]string{"serve", "--token-file", filepath.Join(dir, "absent")}, "--token-file"},
		{[]string{"serve", "--token-file", short}, "line 1"},
	} {
		code, _, stderr := runCmd(t, ctx, c.args...)
		if code != 2 || !strings.Contains(stderr, c.want) {
			t.Errorf("%v: exit %d, stderr %q; want 2 and a message naming %q", c.args, code, stderr, c.want)
		}
	}
}

// sluice serve with tokens and metrics: health stays open, other calls
// need the token, and the refusal shows in the metrics, served with the
// profiles on their own listener.
func TestServeWithTokensAndMetrics(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	tokens := filepath.Join(t.TempDir(), "tokens")
	if err := os.WriteFile(tokens, []byte("# test\nsecret-token-of-the-test\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	addr, maddr := freeAddr(t), freeAddr(t)
	done := make(chan int, 1)
	var e bytes.Buffer
	go func() {
		done <- run(ctx, []string{"serve", "--addr", addr, "--token-file", tokens, "--metrics-addr", maddr, "--pprof", "--grace", "2s"},
			&bytes.Buffer{}, &e)
	}()
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	cctx, ccancel := context.WithTimeout(ctx, 2*time.Minute)
	defer ccancel()
	r, err := healthpb.NewHealthClient(conn).Check(cctx, &healthpb.HealthCheckRequest{}, grpc.WaitForReady(true))
	if err != nil || r.Status != healthpb.HealthCheckResponse_SERVING {
		t.Fatalf("health without a token: %v %v", r, err)
	}
	_, err = sluicev1.NewSluiceServiceClient(conn).Plan(cctx, &sluicev1.PlanRequest{})
	if status.Code(err) != codes.Unauthenticated {
		t.Fatalf("Plan without a token: %v, want Unauthenticated", err)
	}
	body := httpGet(t, "http://"+maddr+"/metrics")
	if !strings.Contains(body, `sluice_refusals_total{reason="unauthenticated"} 1`) {
		t.Errorf("metrics lack the refusal:\n%s", body)
	}
	if body := httpGet(t, "http://"+maddr+"/debug/pprof/"); !strings.Contains(body, "goroutine") {
		t.Errorf("profiles index lacks goroutine:\n%s", body)
	}
	cancel()
	select {
	case code := <-done:
		if code != 0 {
			t.Fatalf("serve exited %d: %s", code, e.String())
		}
	case <-time.After(2 * time.Minute):
		t.Fatal("serve did not stop")
	}
}

func httpGet(t *testing.T, url string) string {
	t.Helper()
	resp, err := http.Get(url) // the metrics listener is open before the gRPC server serves
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil || resp.StatusCode != http.StatusOK {
		t.Fatalf("GET %s: %d %v", url, resp.StatusCode, err)
	}
	return string(b)
}
