package server

import (
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"net"
	"os"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"
)

// TLSFiles name the PEM files of the server's transport security. The
// zero value means plaintext.
type TLSFiles struct {
	// CertFile and KeyFile hold the server's certificate chain and its
	// private key.
	CertFile, KeyFile string
	// ClientCAFile, when set, turns on mutual TLS: every client must
	// present a certificate signed by one of these authorities.
	ClientCAFile string
}

// Enabled reports whether any file is named.
func (f TLSFiles) Enabled() bool { return f.CertFile != "" || f.KeyFile != "" || f.ClientCAFile != "" }

// Config loads the files into a server TLS configuration: TLS 1.2 at
// least, and with ClientCAFile, client certificates required and verified.
// Errors name the file at fault.
func (f TLSFiles) Config() (*tls.Config, error) {
	if f.CertFile == "" || f.KeyFile == "" {
		return nil, errors.New("tls: a server certificate and its key are both needed (mutual TLS needs them too)")
	}
	cert, err := tls.LoadX509KeyPair(f.CertFile, f.KeyFile)
	if err != nil {
		return nil, fmt.Errorf("tls: certificate %s with key %s: %w", f.CertFile, f.KeyFile, err)
	}
	cfg := &tls.Config{Certificates: []tls.Certificate{cert}, MinVersion: tls.VersionTLS12}
	if f.ClientCAFile != "" {
		pem, err := os.ReadFile(f.ClientCAFile)
		if err != nil {
			return nil, fmt.Errorf("tls: client CA: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("tls: client CA %s holds no PEM certificate", f.ClientCAFile)
		}
		cfg.ClientCAs = pool
		cfg.ClientAuth = tls.RequireAndVerifyClientCert
	}
	return cfg, nil
}

// ServerOption loads the files and returns the gRPC option serving TLS
// with them (add it to Options.GRPCOptions).
func (f TLSFiles) ServerOption() (grpc.ServerOption, error) {
	cfg, err := f.Config()
	if err != nil {
		return nil, err
	}
	return grpc.Creds(credentials.NewTLS(cfg)), nil
}

// ErrInsecureListen is returned by CheckListenSecurity for plaintext on an
// address reachable from other hosts.
var ErrInsecureListen = errors.New("plaintext on a non-loopback address")

// CheckListenSecurity refuses to serve plaintext on an address other
// machines can reach: it returns an error wrapping ErrInsecureListen when
// addr (host:port) is not a loopback address, tls is false and insecure
// (the operator's explicit consent) is false. Loopback means an IP in
// 127.0.0.0/8 or ::1, or the name "localhost"; an empty host, an
// unspecified address (0.0.0.0, ::) and any other name count as reachable.
func CheckListenSecurity(addr string, tls, insecure bool) error {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return fmt.Errorf("listen address %q: %w", addr, err)
	}
	if tls || insecure || isLoopback(host) {
		return nil
	}
	return fmt.Errorf("%w: %s", ErrInsecureListen, addr)
}

func isLoopback(host string) bool {
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}
