package client

import (
	"crypto/tls"
	"fmt"
	"net"
	"strings"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"
)

// DialMaxMessageBytes is the send and receive limit of a connection made
// by Dial unless WithMaxMessageBytes says otherwise. It is set on purpose
// rather than left at gRPC's 4 MiB: a Follow frame can be as large as the
// server's own limit (`sluice serve --max-message-bytes`, 16 MiB by
// default), and a session lowers it per call to its Spec.MaxMessageBytes.
const DialMaxMessageBytes = 64 << 20

// DialOption adjusts Dial.
type DialOption func(*dialConfig)

type dialConfig struct {
	maxMessageBytes int
	tls             *tls.Config
	insecure        bool
	grpcOpts        []grpc.DialOption
}

// WithMaxMessageBytes sets the connection's send and receive limits.
func WithMaxMessageBytes(n int) DialOption { return func(c *dialConfig) { c.maxMessageBytes = n } }

// WithTLS encrypts the connection with cfg (nil: the system's roots).
func WithTLS(cfg *tls.Config) DialOption {
	return func(c *dialConfig) {
		if cfg == nil {
			cfg = &tls.Config{MinVersion: tls.VersionTLS12}
		}
		c.tls = cfg
	}
}

// WithInsecure allows a plain-text connection to a host that is not
// loopback (a trusted network). Without it Dial refuses one.
func WithInsecure() DialOption { return func(c *dialConfig) { c.insecure = true } }

// WithGRPCOptions adds gRPC dial options (a context dialer, interceptors,
// keepalive); they are applied after Dial's own.
func WithGRPCOptions(o ...grpc.DialOption) DialOption {
	return func(c *dialConfig) { c.grpcOpts = append(c.grpcOpts, o...) }
}

// Dial returns a connection to a sluice server at target ("host:port", or
// any gRPC target such as "unix:///path"), for Run, Follow and Plan; close
// it when done. The connection is plain text only to loopback hosts
// (127.0.0.0/8, ::1, localhost) and Unix sockets, unless WithInsecure is
// given; use WithTLS otherwise. Its message limits are
// DialMaxMessageBytes (WithMaxMessageBytes to change). Dial does not wait
// for the server: the first call connects.
func Dial(target string, opts ...DialOption) (*grpc.ClientConn, error) {
	cfg := dialConfig{maxMessageBytes: DialMaxMessageBytes}
	for _, o := range opts {
		o(&cfg)
	}
	if cfg.maxMessageBytes <= 0 {
		return nil, fmt.Errorf("client: message limit %d bytes; want > 0", cfg.maxMessageBytes)
	}
	var creds credentials.TransportCredentials
	switch {
	case cfg.tls != nil:
		creds = credentials.NewTLS(cfg.tls)
	case cfg.insecure || isLocal(target):
		creds = insecure.NewCredentials()
	default:
		return nil, fmt.Errorf("client: refusing a plain-text connection to %q, which is not a loopback address: "+
			"use WithTLS, or WithInsecure on a trusted network", target)
	}
	dopts := append([]grpc.DialOption{
		grpc.WithTransportCredentials(creds),
		grpc.WithDefaultCallOptions(grpc.MaxCallRecvMsgSize(cfg.maxMessageBytes), grpc.MaxCallSendMsgSize(cfg.maxMessageBytes)),
		// The server's flow-control windows (server.StreamWindowBytes,
		// server.ConnWindowBytes, which says why): a lock-step session has
		// at most about two frames in flight each way, and 4 MiB, the
		// default message limit, lets one go out whole.
		grpc.WithInitialWindowSize(4 << 20), grpc.WithInitialConnWindowSize(16 << 20),
	}, cfg.grpcOpts...)
	return grpc.NewClient(target, dopts...)
}

// isLocal reports whether target names a Unix socket or a loopback host.
func isLocal(target string) bool {
	if strings.HasPrefix(target, "unix:") || strings.HasPrefix(target, "unix-abstract:") {
		return true
	}
	// Strip a scheme and authority ("dns:///host:port", "passthrough:///x").
	if i := strings.Index(target, ":///"); i >= 0 {
		target = target[i+4:]
	} else if strings.HasPrefix(target, "dns://") {
		target = target[strings.LastIndex(target, "/")+1:]
	}
	host := target
	if h, _, err := net.SplitHostPort(target); err == nil {
		host = h
	}
	if strings.EqualFold(host, "localhost") {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}
