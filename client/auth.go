package client

import (
	"context"
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"os"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"
)

// Token is a bearer token sent with every call, in the metadata key
// "authorization" as "Bearer <token>" (what a server started with a token
// file checks). It implements credentials.PerRPCCredentials.
type Token struct {
	Value string
	// AllowPlaintext lets the token travel over a connection without TLS,
	// for a server on the same machine. Otherwise gRPC refuses to send it
	// in the clear.
	AllowPlaintext bool
}

// GetRequestMetadata implements credentials.PerRPCCredentials.
func (t Token) GetRequestMetadata(context.Context, ...string) (map[string]string, error) {
	return map[string]string{"authorization": "Bearer " + t.Value}, nil
}

// RequireTransportSecurity implements credentials.PerRPCCredentials.
func (t Token) RequireTransportSecurity() bool { return !t.AllowPlaintext }

// WithToken returns a dial option sending token with every call; the
// connection must use TLS (see WithTLS and TLSFromFiles). With Dial, pass
// it through WithGRPCOptions.
func WithToken(token string) grpc.DialOption { return grpc.WithPerRPCCredentials(Token{Value: token}) }

// WithPlaintextToken is WithToken for a plaintext connection to a server on
// the same machine: anyone on the path can read a token sent this way.
func WithPlaintextToken(token string) grpc.DialOption {
	return grpc.WithPerRPCCredentials(Token{Value: token, AllowPlaintext: true})
}

// TLSFromFiles returns the TLS settings for a connection to a server with a
// certificate. caFile holds the authorities trusted to sign the server's
// certificate (empty: the system's roots). certFile and keyFile, both or
// neither, hold the client's own certificate for servers requiring mutual
// TLS. Pass the result to Dial with WithTLS.
func TLSFromFiles(caFile, certFile, keyFile string) (*tls.Config, error) {
	cfg := &tls.Config{MinVersion: tls.VersionTLS12}
	if caFile != "" {
		pem, err := os.ReadFile(caFile)
		if err != nil {
			return nil, fmt.Errorf("client: CA: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("client: CA %s holds no PEM certificate", caFile)
		}
		cfg.RootCAs = pool
	}
	if (certFile == "") != (keyFile == "") {
		return nil, errors.New("client: a client certificate needs its key, and a key its certificate")
	}
	if certFile != "" {
		cert, err := tls.LoadX509KeyPair(certFile, keyFile)
		if err != nil {
			return nil, fmt.Errorf("client: certificate %s with key %s: %w", certFile, keyFile, err)
		}
		cfg.Certificates = []tls.Certificate{cert}
	}
	return cfg, nil
}

// TLSCredentials is TLSFromFiles as a gRPC dial option, for callers that
// build their own connection with grpc.NewClient.
func TLSCredentials(caFile, certFile, keyFile string) (grpc.DialOption, error) {
	cfg, err := TLSFromFiles(caFile, certFile, keyFile)
	if err != nil {
		return nil, err
	}
	return grpc.WithTransportCredentials(credentials.NewTLS(cfg)), nil
}
