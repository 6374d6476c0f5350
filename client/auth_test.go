package client_test

import (
	"context"
	"os"
	"path/filepath"
	"testing"

	"sluice/client"
)

func TestTokenMetadata(t *testing.T) {
	md, err := client.Token{Value: "abc-123"}.GetRequestMetadata(context.Background())
	if err != nil || len(md) != 1 || md["authorization"] != "Bearer abc-123" {
		t.Fatalf("metadata %v, %v; want authorization: Bearer abc-123 (RFC 6750, section 2.1)", md, err)
	}
	if !(client.Token{Value: "x"}).RequireTransportSecurity() || (client.Token{Value: "x", AllowPlaintext: true}).RequireTransportSecurity() {
		t.Error("RequireTransportSecurity: want true unless AllowPlaintext")
	}
}

func TestTLSCredentialsErrors(t *testing.T) {
	dir := t.TempDir()
	notPEM := filepath.Join(dir, "ca.pem")
	if err := os.WriteFile(notPEM, []byte("not a certificate"), 0o600); err != nil {
		t.Fatal(err)
	}
	for name, files := range map[string][3]string{
		"absent CA":        {filepath.Join(dir, "absent.pem"), "", ""},
		"CA not PEM":       {notPEM, "", ""},
		"cert without key": {"", notPEM, ""},
		"key without cert": {"", "", notPEM},
		"unreadable pair":  {"", notPEM, notPEM},
	} {
		if _, err := client.TLSCredentials(files[0], files[1], files[2]); err == nil {
			t.Errorf("%s: accepted", name)
		}
	}
	if _, err := client.TLSCredentials("", "", ""); err != nil {
		t.Errorf("system roots: %v", err)
	}
}
