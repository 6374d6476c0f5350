package main

import (
	"bytes"
	"context"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/status"

	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server"
)

// sluice serve --health-addr: the extra listener answers health checks in
// plain text without a token, for the whole server and for the sampling
// service by name, and serves no other rpc; the main port still wants
// its token.
func TestServeHealthAddr(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	tokens := filepath.Join(t.TempDir(), "tokens")
	if err := os.WriteFile(tokens, []byte("token-of-the-health-test\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	addr, haddr := freeAddr(t), freeAddr(t)
	done := make(chan int, 1)
	var e bytes.Buffer
	go func() {
		done <- run(ctx, []string{"serve", "--addr", addr, "--health-addr", haddr, "--token-file", tokens, "--grace", "2s"},
			&bytes.Buffer{}, &e)
	}()
	hconn, err := grpc.NewClient(haddr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer hconn.Close()
	cctx, ccancel := context.WithTimeout(ctx, 2*time.Minute)
	defer ccancel()
	hc := healthpb.NewHealthClient(hconn)
	for _, svc := range []string{"", "sluice.v1.SluiceService"} {
		r, err := hc.Check(cctx, &healthpb.HealthCheckRequest{Service: svc}, grpc.WaitForReady(true))
		if err != nil || r.Status != healthpb.HealthCheckResponse_SERVING {
			t.Fatalf("health %q on --health-addr without a token: %v %v; want SERVING", svc, r, err)
		}
	}
	if _, err := hc.Check(cctx, &healthpb.HealthCheckRequest{Service: "no.such.Service"}); status.Code(err) != codes.NotFound {
		t.Errorf("health of an unknown service: %v, want NotFound", err)
	}
	// The sampling service is not there: neither the Session stream nor Plan.
	svc := sluicev1.NewSluiceServiceClient(hconn)
	stream, err := svc.Session(cctx)
	if err == nil {
		_, err = stream.Recv()
	}
	if status.Code(err) != codes.Unimplemented {
		t.Errorf("Session on --health-addr: %v, want Unimplemented", err)
	}
	if _, err := svc.Plan(cctx, &sluicev1.PlanRequest{}); status.Code(err) != codes.Unimplemented {
		t.Errorf("Plan on --health-addr: %v, want Unimplemented", err)
	}
	// The main port keeps its token check.
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	if _, err := sluicev1.NewSluiceServiceClient(conn).Plan(cctx, &sluicev1.PlanRequest{}, grpc.WaitForReady(true)); status.Code(err) != codes.Unauthenticated {
		t.Errorf("Plan on --addr without a token: %v, want Unauthenticated", err)
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
	if !strings.Contains(e.String(), `"msg":"health"`) {
		t.Errorf("no health log line: %s", e.String())
	}
}

// A --health-addr that cannot be listened on is reported with the flag's
// name, and nothing is left serving.
func TestServeHealthAddrBad(t *testing.T) {
	code, _, stderr := runCmd(t, context.Background(), "serve", "--addr", "127.0.0.1:0", "--health-addr", "127.0.0.1:notaport")
	if code == 0 || !strings.Contains(stderr, "--health-addr") {
		t.Errorf("exit %d, stderr %q; want an error naming --health-addr", code, stderr)
	}
}

// Every flag the server Deployment passes to sluice serve is one that
// `sluice serve -h` lists, and its readiness probe asks for the sampling
// service by its health name.
func TestDeploymentUsesServeFlags(t *testing.T) {
	_, _, help := runCmd(t, context.Background(), "serve", "-h")
	known := map[string]bool{}
	for _, m := range regexp.MustCompile(`(?m)^  -([a-z0-9-]+)`).FindAllStringSubmatch(help, -1) {
		known[m[1]] = true
	}
	if !known["health-addr"] || !known["addr"] {
		t.Fatalf("flags not found in serve -h:\n%s", help)
	}
	data, err := os.ReadFile(filepath.Join("..", "..", "deploy", "kubernetes", "server-deployment.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	args := regexp.MustCompile(`(?m)^\s*- --([a-z0-9-]+)(=|$)`).FindAllStringSubmatch(string(data), -1)
	if len(args) < 5 {
		t.Fatalf("found %d flags in the Deployment's args; the pattern no longer matches the manifest", len(args))
	}
	for _, a := range args {
		switch {
		case known[a[1]]:
		default:
			t.Errorf("the Deployment passes --%s, which sluice serve does not have", a[1])
		}
	}
	if !strings.Contains(string(data), "service: "+server.ServiceName) {
		t.Errorf("no probe asks for the health name %q", server.ServiceName)
	}
}
