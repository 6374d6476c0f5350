package server_test

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/hex"
	"encoding/pem"
	"errors"
	"io"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/metadata"
	reflectionpb "google.golang.org/grpc/reflection/grpc_reflection_v1"
	"google.golang.org/grpc/status"

	"sluice/client"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server"
)

// pki is a throwaway certificate authority with a server certificate for
// 127.0.0.1 and a client certificate, written as PEM files.
type pki struct {
	dir                                       string
	caCert, serverCert, serverKey             string
	clientCert, clientKey                     string
	otherCACert, otherClientCert, otherClient string
}

func newPKI(t *testing.T) pki {
	t.Helper()
	p := pki{dir: t.TempDir()}
	caKey, caDER := selfSignedCA(t, "sluice test CA")
	p.caCert = writePEM(t, p.dir, "ca.pem", "CERTIFICATE", caDER)
	ca, err := x509.ParseCertificate(caDER)
	if err != nil {
		t.Fatal(err)
	}
	p.serverCert, p.serverKey = issue(t, p.dir, "server", ca, caKey, x509.ExtKeyUsageServerAuth)
	p.clientCert, p.clientKey = issue(t, p.dir, "client", ca, caKey, x509.ExtKeyUsageClientAuth)
	// A client certificate from an authority the server does not trust.
	otherKey, otherDER := selfSignedCA(t, "stranger CA")
	other, err := x509.ParseCertificate(otherDER)
	if err != nil {
		t.Fatal(err)
	}
	p.otherCACert = writePEM(t, p.dir, "other-ca.pem", "CERTIFICATE", otherDER)
	p.otherClientCert, p.otherClient = issue(t, p.dir, "stranger", other, otherKey, x509.ExtKeyUsageClientAuth)
	return p
}

var serial int64

func template(cn string) *x509.Certificate {
	serial++
	return &x509.Certificate{
		SerialNumber: big.NewInt(serial),
		Subject:      pkix.Name{CommonName: cn},
		NotBefore:    time.Now().Add(-time.Hour),
		NotAfter:     time.Now().Add(24 * time.Hour),
	}
}

func selfSignedCA(t *testing.T, cn string) (*ecdsa.PrivateKey, []byte) {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := template(cn)
	tmpl.IsCA, tmpl.BasicConstraintsValid = true, true
	tmpl.KeyUsage = x509.KeyUsageCertSign | x509.KeyUsageDigitalSignature
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	return key, der
}

func issue(t *testing.T, dir, name string, ca *x509.Certificate, caKey *ecdsa.PrivateKey, usage x509.ExtKeyUsage) (certFile, keyFile string) {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := template(name)
	tmpl.KeyUsage = x509.KeyUsageDigitalSignature
	tmpl.ExtKeyUsage = []x509.ExtKeyUsage{usage}
	tmpl.IPAddresses = []net.IP{net.IPv4(127, 0, 0, 1)}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, ca, &key.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	kder, err := x509.MarshalPKCS8PrivateKey(key)
	if err != nil {
		t.Fatal(err)
	}
	return writePEM(t, dir, name+".pem", "CERTIFICATE", der), writePEM(t, dir, name+"-key.pem", "PRIVATE KEY", kder)
}

func writePEM(t *testing.T, dir, name, kind string, der []byte) string {
	t.Helper()
	path := filepath.Join(dir, name)
	if err := os.WriteFile(path, pem.EncodeToMemory(&pem.Block{Type: kind, Bytes: der}), 0o600); err != nil {
		t.Fatal(err)
	}
	return path
}

// serveTCP serves a Server with the given extra options on 127.0.0.1 and
// returns its address; it is stopped at cleanup.
func serveTCP(t *testing.T, opts ...grpc.ServerOption) string {
	t.Helper()
	_, addr := serveTCPServer(t, opts...)
	return addr
}

// serveTCPServer is serveTCP returning the server too.
func serveTCPServer(t *testing.T, opts ...grpc.ServerOption) (*server.Server, string) {
	t.Helper()
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	srv := server.New(server.Options{GRPCOptions: opts})
	done := make(chan struct{})
	go func() { _ = srv.Serve(lis); close(done) }()
	t.Cleanup(func() { srv.Stop(); <-done })
	return srv, lis.Addr().String()
}

func dialTCP(t *testing.T, addr string, opts ...grpc.DialOption) *grpc.ClientConn {
	t.Helper()
	conn, err := grpc.NewClient("passthrough:///"+addr, opts...)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = conn.Close() })
	return conn
}

func secCtx(t *testing.T) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	t.Cleanup(cancel)
	return ctx
}

// plan calls the unary Plan rpc with an empty request: a call that got
// past the interceptors reaches the handler, which refuses the request
// with INVALID_ARGUMENT (no curvature given).
func plan(ctx context.Context, conn *grpc.ClientConn) codes.Code {
	_, err := sluicev1.NewSluiceServiceClient(conn).Plan(ctx, &sluicev1.PlanRequest{})
	return status.Code(err)
}

func health(ctx context.Context, conn *grpc.ClientConn) error {
	_, err := healthpb.NewHealthClient(conn).Check(ctx, &healthpb.HealthCheckRequest{Service: server.ServiceName})
	return err
}

func TestTLS(t *testing.T) {
	p := newPKI(t)
	ctx := secCtx(t)
	opt, err := server.TLSFiles{CertFile: p.serverCert, KeyFile: p.serverKey}.ServerOption()
	if err != nil {
		t.Fatal(err)
	}
	addr := serveTCP(t, opt)
	creds, err := client.TLSCredentials(p.caCert, "", "")
	if err != nil {
		t.Fatal(err)
	}
	if err := health(ctx, dialTCP(t, addr, creds)); err != nil {
		t.Fatalf("health over TLS: %v", err)
	}
	if c := plan(ctx, dialTCP(t, addr, creds)); c != codes.InvalidArgument {
		t.Fatalf("Plan over TLS: %v, want the handler's InvalidArgument", c)
	}
	// A plaintext client cannot talk to a TLS server.
	if err := health(ctx, dialTCP(t, addr, grpc.WithTransportCredentials(insecure.NewCredentials()))); status.Code(err) != codes.Unavailable {
		t.Fatalf("plaintext client to a TLS server: %v, want Unavailable", err)
	}
	// A client trusting another authority refuses the server.
	stranger, err := client.TLSCredentials(p.otherCACert, "", "")
	if err != nil {
		t.Fatal(err)
	}
	if err := health(ctx, dialTCP(t, addr, stranger)); status.Code(err) != codes.Unavailable {
		t.Fatalf("client not trusting the server's CA: %v, want Unavailable", err)
	}
}

func TestMutualTLS(t *testing.T) {
	p := newPKI(t)
	ctx := secCtx(t)
	opt, err := server.TLSFiles{CertFile: p.serverCert, KeyFile: p.serverKey, ClientCAFile: p.caCert}.ServerOption()
	if err != nil {
		t.Fatal(err)
	}
	addr := serveTCP(t, opt)
	for _, c := range []struct {
		name      string
		cert, key string
		ok        bool
	}{
		{"no client certificate", "", "", false},
		{"certificate from an untrusted authority", p.otherClientCert, p.otherClient, false},
		{"certificate from the trusted authority", p.clientCert, p.clientKey, true},
	} {
		creds, err := client.TLSCredentials(p.caCert, c.cert, c.key)
		if err != nil {
			t.Fatal(err)
		}
		err = health(ctx, dialTCP(t, addr, creds))
		if c.ok && err != nil {
			t.Errorf("%s: %v, want served", c.name, err)
		}
		if !c.ok && status.Code(err) != codes.Unavailable {
			t.Errorf("%s: %v, want the handshake refused (Unavailable)", c.name, err)
		}
	}
}

func TestTLSFilesErrors(t *testing.T) {
	p := newPKI(t)
	for name, f := range map[string]server.TLSFiles{
		"key missing":          {CertFile: p.serverCert},
		"client CA only":       {ClientCAFile: p.caCert},
		"no such file":         {CertFile: filepath.Join(p.dir, "absent.pem"), KeyFile: p.serverKey},
		"key of another cert":  {CertFile: p.serverCert, KeyFile: p.clientKey},
		"client CA not a cert": {CertFile: p.serverCert, KeyFile: p.serverKey, ClientCAFile: p.serverKey},
	} {
		if _, err := f.Config(); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
}

const goodToken = "a-token-of-thirty-two-characters"

func tokenServer(t *testing.T) string {
	t.Helper()
	path := filepath.Join(t.TempDir(), "tokens")
	content := "# tokens of the test\n\n  another-token-0123456789  \n" + goodToken + "\n"
	if err := os.WriteFile(path, []byte(content), 0o600); err != nil {
		t.Fatal(err)
	}
	tokens, err := server.LoadTokens(path)
	if err != nil {
		t.Fatal(err)
	}
	return serveTCP(t, tokens.ServerOptions()...)
}

func TestBearerTokens(t *testing.T) {
	ctx := secCtx(t)
	addr := tokenServer(t)
	plain := grpc.WithTransportCredentials(insecure.NewCredentials())
	for _, c := range []struct {
		name string
		opts []grpc.DialOption
		want codes.Code
	}{
		{"missing", nil, codes.Unauthenticated},
		{"wrong", []grpc.DialOption{client.WithPlaintextToken("a-token-of-thirty-two-characterz")}, codes.Unauthenticated},
		{"prefix of a right one", []grpc.DialOption{client.WithPlaintextToken(goodToken[:20])}, codes.Unauthenticated},
		{"right", []grpc.DialOption{client.WithPlaintextToken(goodToken)}, codes.InvalidArgument},
		{"the other right one", []grpc.DialOption{client.WithPlaintextToken("another-token-0123456789")}, codes.InvalidArgument},
	} {
		conn := dialTCP(t, addr, append(c.opts, plain)...)
		if got := plan(ctx, conn); got != c.want {
			t.Errorf("unary, token %s: %v, want %v", c.name, got, c.want)
		}
		// The streaming Session rpc: a call let through reaches the
		// handler, which refuses a stream closed before its first frame.
		st, err := sluicev1.NewSluiceServiceClient(conn).Session(ctx)
		if err == nil {
			_ = st.CloseSend()
			_, err = st.Recv()
		}
		if got := status.Code(err); got != c.want {
			t.Errorf("stream, token %s: %v, want %v", c.name, err, c.want)
		}
		// Health stays open whatever the token.
		if err := health(ctx, conn); err != nil {
			t.Errorf("health, token %s: %v, want served", c.name, err)
		}
	}
	// Reflection needs the token too.
	st, err := reflectionpb.NewServerReflectionClient(dialTCP(t, addr, plain)).ServerReflectionInfo(ctx)
	if err == nil {
		err = st.Send(&reflectionpb.ServerReflectionRequest{MessageRequest: &reflectionpb.ServerReflectionRequest_ListServices{}})
		if err == nil || errors.Is(err, io.EOF) { // io.EOF: the server already ended the call; Recv has its status
			_, err = st.Recv()
		}
	}
	if status.Code(err) != codes.Unauthenticated {
		t.Errorf("reflection without a token: %v, want Unauthenticated", err)
	}
	// A scheme other than Bearer.
	conn := dialTCP(t, addr, plain)
	mctx := metadataCtx(ctx, "authorization", "Basic "+goodToken)
	if _, err := sluicev1.NewSluiceServiceClient(conn).Plan(mctx, &sluicev1.PlanRequest{}); status.Code(err) != codes.Unauthenticated {
		t.Errorf("Basic scheme: %v, want Unauthenticated", err)
	}
	mctx = metadataCtx(ctx, "authorization", "bearer "+goodToken)
	if _, err := sluicev1.NewSluiceServiceClient(conn).Plan(mctx, &sluicev1.PlanRequest{}); status.Code(err) != codes.InvalidArgument {
		t.Errorf("lower-case scheme (RFC 6750 schemes are case-insensitive): %v, want the handler's InvalidArgument", err)
	}
}

func TestTokenWithoutTLSNeedsConsent(t *testing.T) {
	addr := tokenServer(t)
	conn, err := grpc.NewClient("passthrough:///"+addr, grpc.WithTransportCredentials(insecure.NewCredentials()), client.WithToken(goodToken))
	if err == nil {
		_ = conn.Close()
		t.Fatal("WithToken over plaintext accepted; want gRPC's refusal to send credentials in the clear")
	}
	if !strings.Contains(err.Error(), "transport level security") {
		t.Fatalf("WithToken over plaintext: %v, want gRPC's refusal to send credentials in the clear", err)
	}
}

func TestParseTokens(t *testing.T) {
	for name, content := range map[string]string{
		"empty":               "",
		"only comments":       "# nothing\n\n",
		"too short":           "short\n",
		"inner space":         "a token with spaces inside\n",
		"one good, one short": goodToken + "\nshort\n",
	} {
		_, err := server.ParseTokens(strings.NewReader(content))
		if err == nil {
			t.Errorf("%s: accepted", name)
		} else if strings.Contains(err.Error(), goodToken) || strings.Contains(err.Error(), "short\"") {
			t.Errorf("%s: error repeats a token: %v", name, err)
		}
	}
	tok, err := server.ParseTokens(strings.NewReader("\t" + goodToken + "  \r\n# c\n"))
	if err != nil {
		t.Fatal(err)
	}
	if !tok.Valid(goodToken) || tok.Valid(goodToken+" ") || tok.Valid("") {
		t.Error("Valid disagrees with the file")
	}
}

func TestCheckListenSecurity(t *testing.T) {
	for _, c := range []struct {
		addr          string
		tls, insecure bool
		ok            bool
	}{
		{"127.0.0.1:7070", false, false, true},
		{"127.9.9.9:7070", false, false, true},
		{"[::1]:7070", false, false, true},
		{"localhost:7070", false, false, true},
		{"0.0.0.0:7070", false, false, false},
		{":7070", false, false, false},
		{"[::]:7070", false, false, false},
		{"192.0.2.10:7070", false, false, false},
		{"sampler.example:7070", false, false, false},
		{"0.0.0.0:7070", true, false, true},
		{"0.0.0.0:7070", false, true, true},
	} {
		err := server.CheckListenSecurity(c.addr, c.tls, c.insecure)
		if c.ok != (err == nil) {
			t.Errorf("CheckListenSecurity(%q, tls=%v, insecure=%v) = %v, want ok=%v", c.addr, c.tls, c.insecure, err, c.ok)
		}
		if err != nil && !errors.Is(err, server.ErrInsecureListen) {
			t.Errorf("%q: %v does not wrap ErrInsecureListen", c.addr, err)
		}
	}
	if err := server.CheckListenSecurity("no-port", false, false); err == nil || errors.Is(err, server.ErrInsecureListen) {
		t.Errorf("address without a port: %v, want a parse error", err)
	}
}

func TestSessionIDsAndTokens(t *testing.T) {
	seen := map[string]bool{}
	for range 1000 {
		for _, v := range []string{server.NewSessionID(), server.NewSessionToken()} {
			b, err := hexDecode(v)
			if err != nil || len(b) != 16 {
				t.Fatalf("%q: want 32 hex digits (128 bits): %v", v, err)
			}
			if seen[v] {
				t.Fatalf("%q drawn twice", v) // 2000 draws of 128 bits: a repeat has probability ~1e-32
			}
			seen[v] = true
		}
	}
	// Bits are uniform: over 2000 × 128 bits the count of ones is
	// Binomial(256000, 1/2), mean 128000, sd 253; allow 6 sd.
	ones := 0
	for v := range seen {
		b, _ := hexDecode(v)
		for _, x := range b {
			for ; x != 0; x &= x - 1 {
				ones++
			}
		}
	}
	if d := ones - 128000; d < -6*253 || d > 6*253 {
		t.Errorf("%d one bits of 256000, want 128000 ± %d", ones, 6*253)
	}
	tok := server.NewSessionToken()
	if !server.SessionTokenEqual(tok, tok) || server.SessionTokenEqual(tok[:31]+"x", tok) ||
		server.SessionTokenEqual("", tok) || server.SessionTokenEqual("", "") {
		t.Error("SessionTokenEqual")
	}
}

func hexDecode(s string) ([]byte, error) { return hex.DecodeString(s) }

func metadataCtx(ctx context.Context, kv ...string) context.Context {
	return metadata.AppendToOutgoingContext(ctx, kv...)
}

// TLS and tokens together: the token travels inside TLS with
// client.WithToken (no plaintext consent needed).
func TestTLSWithToken(t *testing.T) {
	p := newPKI(t)
	ctx := secCtx(t)
	opt, err := server.TLSFiles{CertFile: p.serverCert, KeyFile: p.serverKey}.ServerOption()
	if err != nil {
		t.Fatal(err)
	}
	tokens, err := server.ParseTokens(strings.NewReader(goodToken))
	if err != nil {
		t.Fatal(err)
	}
	addr := serveTCP(t, append([]grpc.ServerOption{opt}, tokens.ServerOptions()...)...)
	creds, err := client.TLSCredentials(p.caCert, "", "")
	if err != nil {
		t.Fatal(err)
	}
	if c := plan(ctx, dialTCP(t, addr, creds, client.WithToken(goodToken))); c != codes.InvalidArgument {
		t.Errorf("TLS with the token: %v, want the handler's InvalidArgument", c)
	}
	if c := plan(ctx, dialTCP(t, addr, creds)); c != codes.Unauthenticated {
		t.Errorf("TLS without a token: %v, want Unauthenticated", c)
	}
}
