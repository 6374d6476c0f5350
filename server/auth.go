package server

import (
	"bufio"
	"context"
	"crypto/rand"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"os"
	"strings"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/metadata"
	"google.golang.org/grpc/status"
)

// Tokens is the set of bearer tokens the server accepts. Clients send one
// in the metadata key "authorization" as "Bearer <token>".
//
// The interceptors check every rpc except the health service, which load
// balancers and orchestrators probe without credentials. Reflection is
// checked like the sampling service: it describes the API to whoever asks,
// and a tool such as a command-line gRPC client can send the header.
//
// Only SHA-256 digests of the tokens are kept, and a presented token is
// compared with every one of them in constant time (crypto/subtle), so
// neither the comparison's timing nor its early exit tells which bytes or
// which token matched.
type Tokens struct {
	sums [][sha256.Size]byte
}

// MinTokenBytes is the shortest token accepted in a token file.
const MinTokenBytes = 16

// LoadTokens reads a token file (see ParseTokens).
func LoadTokens(path string) (*Tokens, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("token file: %w", err)
	}
	defer func() { _ = f.Close() }()
	t, err := ParseTokens(f)
	if err != nil {
		return nil, fmt.Errorf("token file %s: %w", path, err)
	}
	return t, nil
}

// ParseTokens reads one token per line. Blank lines and lines starting
// with # are ignored, surrounding spaces are trimmed; a token is at least
// MinTokenBytes long and has no inner white space. At least one token is
// needed. Errors name the line, never the token.
func ParseTokens(r io.Reader) (*Tokens, error) {
	t := &Tokens{}
	sc := bufio.NewScanner(r)
	for n := 1; sc.Scan(); n++ {
		line := strings.TrimSpace(sc.Text())
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		if strings.ContainsAny(line, " \t\v\f\r") {
			return nil, fmt.Errorf("line %d: a token has no white space inside", n)
		}
		if len(line) < MinTokenBytes {
			return nil, fmt.Errorf("line %d: token of %d bytes, want at least %d", n, len(line), MinTokenBytes)
		}
		t.sums = append(t.sums, sha256.Sum256([]byte(line)))
	}
	if err := sc.Err(); err != nil {
		return nil, err
	}
	if len(t.sums) == 0 {
		return nil, errors.New("no tokens (one per line; # starts a comment)")
	}
	return t, nil
}

// Valid reports whether token is one of the set, in time independent of
// which token (if any) it matches.
func (t *Tokens) Valid(token string) bool {
	sum := sha256.Sum256([]byte(token))
	ok := 0
	for i := range t.sums {
		ok |= subtle.ConstantTimeCompare(sum[:], t.sums[i][:])
	}
	return ok == 1
}

// healthPrefix is the method prefix of the health service, left open.
const healthPrefix = "/grpc.health.v1.Health/"

// check returns nil when the call may proceed, else UNAUTHENTICATED.
func (t *Tokens) check(ctx context.Context, method string) error {
	if strings.HasPrefix(method, healthPrefix) {
		return nil
	}
	md, _ := metadata.FromIncomingContext(ctx)
	vals := md.Get("authorization")
	if len(vals) == 0 {
		return status.Error(codes.Unauthenticated, `missing credentials: send metadata "authorization: Bearer <token>"`)
	}
	const scheme = "bearer "
	v := vals[0]
	if len(v) < len(scheme) || !strings.EqualFold(v[:len(scheme)], scheme) {
		return status.Error(codes.Unauthenticated, `metadata "authorization" must be "Bearer <token>"`)
	}
	if len(vals) > 1 || !t.Valid(strings.TrimSpace(v[len(scheme):])) {
		return status.Error(codes.Unauthenticated, "invalid bearer token")
	}
	return nil
}

// UnaryInterceptor checks the token of unary calls.
func (t *Tokens) UnaryInterceptor() grpc.UnaryServerInterceptor {
	return func(ctx context.Context, req any, info *grpc.UnaryServerInfo, h grpc.UnaryHandler) (any, error) {
		if err := t.check(ctx, info.FullMethod); err != nil {
			return nil, err
		}
		return h(ctx, req)
	}
}

// StreamInterceptor checks the token of streaming calls.
func (t *Tokens) StreamInterceptor() grpc.StreamServerInterceptor {
	return func(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, h grpc.StreamHandler) error {
		if err := t.check(ss.Context(), info.FullMethod); err != nil {
			return err
		}
		return h(srv, ss)
	}
}

// ServerOptions returns both interceptors as gRPC options (add them to
// Options.GRPCOptions; they run after the server's own recovery).
func (t *Tokens) ServerOptions() []grpc.ServerOption {
	return []grpc.ServerOption{
		grpc.ChainUnaryInterceptor(t.UnaryInterceptor()),
		grpc.ChainStreamInterceptor(t.StreamInterceptor()),
	}
}

// NewSessionID returns a fresh session id: 128 bits from crypto/rand, as
// 32 lowercase hex digits. Ids are unguessable, so knowing one session's
// id tells nothing about another's.
func NewSessionID() string { return random128() }

// NewSessionToken returns a fresh per-session secret (128 bits from
// crypto/rand, 32 hex digits) that a client presents to resume or attach
// to its session. Compare presented tokens with SessionTokenEqual.
func NewSessionToken() string { return random128() }

// SessionTokenEqual reports whether a presented session token equals the
// issued one, in time independent of where they differ.
func SessionTokenEqual(presented, issued string) bool {
	a, b := sha256.Sum256([]byte(presented)), sha256.Sum256([]byte(issued))
	return subtle.ConstantTimeCompare(a[:], b[:]) == 1 && issued != ""
}

func random128() string {
	var b [16]byte
	_, _ = rand.Read(b[:]) // crypto/rand.Read never fails (Go ≥ 1.24): it aborts the program instead
	return hex.EncodeToString(b[:])
}
