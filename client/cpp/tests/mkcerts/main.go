// Command mkcerts writes the throw-away certificates scripts/test-cpp runs
// the C++ client's TLS tests with: a certificate authority, a server
// certificate for 127.0.0.1, ::1 and localhost signed by it, a client
// certificate signed by it (for mutual TLS), and a second authority that
// signed neither (to check that an untrusted server is refused). Keys are
// ECDSA P-256; everything is valid for one day and lives in a directory of
// the test's own.
//
//	go run ./client/cpp/tests/mkcerts DIR
//
// writes DIR/ca.pem, DIR/server.pem, DIR/server-key.pem, DIR/client.pem,
// DIR/client-key.pem and DIR/other-ca.pem.
package main

import (
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"fmt"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"time"
)

func main() {
	if len(os.Args) != 2 {
		fmt.Fprintln(os.Stderr, "usage: mkcerts DIR")
		os.Exit(2)
	}
	if err := write(os.Args[1]); err != nil {
		fmt.Fprintln(os.Stderr, "mkcerts:", err)
		os.Exit(1)
	}
}

// issued is a certificate with its key.
type issued struct {
	cert *x509.Certificate
	der  []byte
	key  *ecdsa.PrivateKey
}

var serial int64

// issue makes a certificate from tmpl, signed by parent (nil: self-signed).
func issue(tmpl *x509.Certificate, parent *issued) (*issued, error) {
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		return nil, err
	}
	serial++
	tmpl.SerialNumber = big.NewInt(serial)
	tmpl.NotBefore = time.Now().Add(-time.Hour)
	tmpl.NotAfter = time.Now().Add(24 * time.Hour)
	signer, signerCert := key, tmpl
	if parent != nil {
		signer, signerCert = parent.key, parent.cert
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, signerCert, &key.PublicKey, signer)
	if err != nil {
		return nil, err
	}
	cert, err := x509.ParseCertificate(der)
	if err != nil {
		return nil, err
	}
	return &issued{cert: cert, der: der, key: key}, nil
}

func authority(name string) (*issued, error) {
	return issue(&x509.Certificate{
		Subject:               pkix.Name{CommonName: name},
		IsCA:                  true,
		BasicConstraintsValid: true,
		KeyUsage:              x509.KeyUsageCertSign | x509.KeyUsageCRLSign,
	}, nil)
}

func write(dir string) error {
	if err := os.MkdirAll(dir, 0o700); err != nil {
		return err
	}
	ca, err := authority("sluice test authority")
	if err != nil {
		return err
	}
	other, err := authority("sluice untrusted authority")
	if err != nil {
		return err
	}
	srv, err := issue(&x509.Certificate{
		Subject:     pkix.Name{CommonName: "localhost"},
		DNSNames:    []string{"localhost"},
		IPAddresses: []net.IP{net.IPv4(127, 0, 0, 1), net.IPv6loopback},
		KeyUsage:    x509.KeyUsageDigitalSignature,
		ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth},
	}, ca)
	if err != nil {
		return err
	}
	cli, err := issue(&x509.Certificate{
		Subject:     pkix.Name{CommonName: "sluice test client"},
		KeyUsage:    x509.KeyUsageDigitalSignature,
		ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageClientAuth},
	}, ca)
	if err != nil {
		return err
	}
	for name, c := range map[string]*issued{"ca": ca, "other-ca": other, "server": srv, "client": cli} {
		if err := writePEM(filepath.Join(dir, name+".pem"), "CERTIFICATE", c.der); err != nil {
			return err
		}
	}
	for name, c := range map[string]*issued{"server": srv, "client": cli} {
		der, err := x509.MarshalPKCS8PrivateKey(c.key)
		if err != nil {
			return err
		}
		if err := writePEM(filepath.Join(dir, name+"-key.pem"), "PRIVATE KEY", der); err != nil {
			return err
		}
	}
	return nil
}

func writePEM(path, kind string, der []byte) error {
	return os.WriteFile(path, pem.EncodeToMemory(&pem.Block{Type: kind, Bytes: der}), 0o600)
}
