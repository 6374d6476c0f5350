package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"net"
	"net/http"
	"time"

	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"
	"google.golang.org/grpc"
	"google.golang.org/grpc/health"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"

	"sluice/server"
	"sluice/server/metrics"
	"sluice/server/session"
)

// serveFlags are the server's limits, shared by serve and demo.
type serveFlags struct {
	maxMessageBytes int64
	maxSessions     int
	maxChains       int
	maxDim          int
	maxTime         time.Duration
	answerTimeout   time.Duration
	followBuffer    int
	followRetention time.Duration
	maxSessionBytes int64
	maxMemoryBytes  int64
	registerTimeout time.Duration
	maxRegistering  int
}

func (f *serveFlags) register(fs *flag.FlagSet) {
	fs.Int64Var(&f.maxMessageBytes, "max-message-bytes", 16<<20, "largest gRPC message sent or accepted, in bytes; larger batches are split")
	fs.IntVar(&f.maxSessions, "max-sessions", server.DefaultMaxSessions, "concurrent registered sessions; more are refused (memory is guarded by --max-memory-bytes)")
	fs.IntVar(&f.maxChains, "max-chains", 1<<16, "most chains one session may run")
	fs.IntVar(&f.maxDim, "max-dim", 1<<20, "largest dimension one session may have")
	fs.DurationVar(&f.maxTime, "max-session-time", 0, "wall-time cap on every session (0: none)")
	fs.DurationVar(&f.answerTimeout, "answer-timeout", session.DefaultAnswerTimeout, "how long to wait for a client's answer to one request; a silent client's session then frees its slot: suspended, resumable for --suspend-grace, with --state-dir or --state-postgres; else ended, FAILED")
	fs.IntVar(&f.followBuffer, "follow-buffer", 100000, "latest draws (rows) each session keeps for followers, at most 64 MiB (0: no following)")
	fs.DurationVar(&f.followRetention, "follow-retention", 10*time.Minute, "how long a finished session stays followable; its draws' memory is released then")
	fs.Int64Var(&f.maxSessionBytes, "max-session-bytes", session.DefaultMaxSessionBytes, "most memory one session may need at worst (Hessians, answers, replicates, follow ring, diagnostics); larger sessions are refused at registration")
	fs.Int64Var(&f.maxMemoryBytes, "max-memory-bytes", 0, "memory budget of all sessions together, each counted at its worst case (0: half of physical memory, or 4 GiB when unknown)")
	fs.DurationVar(&f.registerTimeout, "register-timeout", server.DefaultRegisterTimeout, "how long a new stream may take to send Register; waiting streams hold no session slot")
	fs.IntVar(&f.maxRegistering, "max-registering", server.DefaultMaxRegistering, "streams that may wait for their Register frame at once; more are refused")
}

func (f *serveFlags) options(log *zap.Logger) (server.Options, error) {
	if f.maxMessageBytes < 64<<10 {
		return server.Options{}, usagef("--max-message-bytes must be at least 65536")
	}
	if f.maxSessions < 1 || f.maxChains < 1 || f.maxDim < 1 || f.maxTime < 0 || f.answerTimeout <= 0 || f.followBuffer < 0 || f.followRetention <= 0 ||
		f.maxSessionBytes < 1 || f.maxMemoryBytes < 0 || f.registerTimeout <= 0 || f.maxRegistering < 1 {
		return server.Options{}, usagef("limits must be positive")
	}
	return server.Options{
		Limits: session.Limits{MaxDim: f.maxDim, MaxChains: f.maxChains, MaxMessageBytes: f.maxMessageBytes,
			MaxTime: f.maxTime, AnswerTimeout: f.answerTimeout, FollowBuffer: f.followBuffer, MaxSessionBytes: f.maxSessionBytes},
		MaxSessions:     f.maxSessions,
		Logger:          log,
		FollowRetention: f.followRetention,
		MaxMemoryBytes:  f.maxMemoryBytes,
		RegisterTimeout: f.registerTimeout,
		MaxRegistering:  f.maxRegistering,
	}, nil
}

func newLogger(level string, w io.Writer) (*zap.Logger, error) {
	var lvl zapcore.Level
	if err := lvl.UnmarshalText([]byte(level)); err != nil {
		return nil, usagef("--log-level %q: want debug, info, warn or error", level)
	}
	enc := zap.NewProductionEncoderConfig()
	enc.EncodeTime = zapcore.ISO8601TimeEncoder
	// Locked: handlers on many goroutines log through one writer.
	core := zapcore.NewCore(zapcore.NewJSONEncoder(enc), zapcore.Lock(zapcore.AddSync(w)), lvl)
	return zap.New(core), nil
}

func serve(ctx context.Context, args []string, stderr io.Writer) error {
	fs := flag.NewFlagSet("serve", flag.ContinueOnError)
	fs.SetOutput(stderr)
	addr := fs.String("addr", "127.0.0.1:7070", "address to listen on")
	level := fs.String("log-level", "info", "log level: debug, info, warn, error")
	grace := fs.Duration("grace", 15*time.Second, "on SIGINT/SIGTERM, how long running sessions get to finish")
	healthAddr := fs.String("health-addr", "", "also serve grpc.health.v1.Health alone on this address, in plain text and without tokens, for probes that speak neither (empty: off)")
	var sf serveFlags
	sf.register(fs)
	var sec securityFlags
	sec.register(fs)
	var stf stateFlags
	stf.register(fs)
	setHelp(fs, help{
		usage: "sluice serve [flags]",
		about: "Serves the sluice gRPC API (sluice.v1.SluiceService: the Session stream, Follow and Plan) on --addr, " +
			"with the standard health service and server reflection, so any gRPC tool can list and call it. A client " +
			"registers a target on a Session stream; the server runs the chains, asks the client for gradients in one " +
			"batch per step, and streams back draws, progress and a summary. The flags below set the server's limits; " +
			"a session asking for more is refused with a message naming the field. Logs are JSON lines on standard " +
			"error. SIGINT or SIGTERM stops it gracefully: running sessions get --grace to finish and still deliver " +
			"their last draws and summary; with --state-dir or --state-postgres they are checkpointed instead, and " +
			"their clients resume them once the server is back.",
		examples: []string{
			"sluice serve",
			"sluice serve --addr 127.0.0.1:7070 --log-level info",
			"sluice serve --addr 0.0.0.0:7070 --tls-cert server.pem --tls-key server-key.pem --token-file tokens.txt",
			"sluice serve --addr 0.0.0.0:7070 --health-addr 0.0.0.0:7071 --tls-cert server.pem --tls-key server-key.pem --token-file tokens.txt",
			"sluice serve --max-sessions 8 --max-message-bytes 67108864 --answer-timeout 2m --metrics-addr 127.0.0.1:9090",
			"sluice serve --state-dir /var/lib/sluice --checkpoint-every 1m --retention 72h",
		},
		kernels: "Kernels a session may ask for (Register.kernel):",
	})
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	log, err := newLogger(*level, stderr)
	if err != nil {
		return err
	}
	defer func() { _ = log.Sync() }()
	opts, err := sf.options(log)
	if err != nil {
		return err
	}
	m, secOpts, err := sec.options(*addr)
	if err != nil {
		return err
	}
	opts.GRPCOptions = append(opts.GRPCOptions, secOpts...)
	opts.Metrics = m
	if opts.State, err = stf.open(ctx); err != nil {
		return err
	}
	if st := opts.State.Store; st != nil {
		defer func() { _ = st.Close() }()
	}
	lis, err := net.Listen("tcp", *addr)
	if err != nil {
		return err
	}
	var mlis net.Listener
	if sec.metricsAddr != "" {
		if mlis, err = net.Listen("tcp", sec.metricsAddr); err != nil {
			_ = lis.Close()
			return fmt.Errorf("--metrics-addr: %w", err)
		}
	}
	var hlis net.Listener
	if *healthAddr != "" {
		if hlis, err = net.Listen("tcp", *healthAddr); err != nil {
			_ = lis.Close()
			if mlis != nil {
				_ = mlis.Close()
			}
			return fmt.Errorf("--health-addr: %w", err)
		}
	}
	srv := server.New(opts)
	log.Info("serving", zap.String("addr", lis.Addr().String()), zap.Int64("max_message_bytes", sf.maxMessageBytes),
		zap.Int64("max_memory_bytes", srv.MemoryLimit()), zap.Int64("max_session_bytes", sf.maxSessionBytes),
		zap.Bool("tls", sec.tls.Enabled()), zap.Bool("mutual_tls", sec.tls.ClientCAFile != ""), zap.Bool("tokens", sec.tokenFile != ""),
		zap.Bool("checkpoints", opts.State.Store != nil))
	errc := make(chan error, 3)
	go func() { errc <- srv.Serve(lis) }()
	var probes *healthOnly
	if hlis != nil {
		probes = newHealthOnly()
		log.Info("health", zap.String("addr", hlis.Addr().String()))
		go func() {
			if err := probes.grpc.Serve(hlis); err != nil {
				errc <- fmt.Errorf("health: %w", err)
			}
		}()
	}
	var hsrv *http.Server
	if mlis != nil {
		hsrv = &http.Server{Handler: m.Handler(sec.pprof), ReadHeaderTimeout: 30 * time.Second}
		log.Info("metrics", zap.String("addr", mlis.Addr().String()), zap.Bool("pprof", sec.pprof))
		go func() {
			if err := hsrv.Serve(mlis); !errors.Is(err, http.ErrServerClosed) {
				errc <- fmt.Errorf("metrics: %w", err)
			}
		}()
	}
	var failed error
	select {
	case err := <-errc:
		failed = fmt.Errorf("serve: %w", err)
	case <-ctx.Done():
		log.Info("shutting down", zap.Duration("grace", *grace))
	}
	sctx, cancel := context.WithTimeout(context.Background(), *grace)
	defer cancel()
	if probes != nil {
		probes.health.Shutdown() // NOT_SERVING while sessions drain
	}
	srv.Shutdown(sctx)
	if probes != nil {
		probes.grpc.Stop()
	}
	if hsrv != nil {
		_ = hsrv.Shutdown(sctx)
	}
	if failed != nil {
		return failed
	}
	log.Info("stopped")
	return nil
}

// securityFlags are serve's transport security, authentication and
// observability settings.
type securityFlags struct {
	tls         server.TLSFiles
	tokenFile   string
	insecure    bool
	metricsAddr string
	pprof       bool
}

func (f *securityFlags) register(fs *flag.FlagSet) {
	fs.StringVar(&f.tls.CertFile, "tls-cert", "", "PEM file of the server's TLS certificate chain (with --tls-key)")
	fs.StringVar(&f.tls.KeyFile, "tls-key", "", "PEM file of the key of --tls-cert")
	fs.StringVar(&f.tls.ClientCAFile, "client-ca", "", "PEM file of the authorities whose client certificates are accepted; makes client certificates required (mutual TLS)")
	fs.StringVar(&f.tokenFile, "token-file", "", "file of accepted bearer tokens, one per line (# comments), each at least 16 characters; every call but health checks must send one as \"authorization: Bearer <token>\"")
	fs.BoolVar(&f.insecure, "insecure", false, "allow plaintext on addresses other than loopback (for --addr and --metrics-addr)")
	fs.StringVar(&f.metricsAddr, "metrics-addr", "", "serve Prometheus metrics over HTTP at /metrics on this address (empty: off)")
	fs.BoolVar(&f.pprof, "pprof", false, "also serve the Go runtime's profiles under /debug/pprof/ on --metrics-addr")
}

// options checks the settings against the listen address and returns the
// metrics (nil when off) and the gRPC options installing them: metrics
// first, so that authentication refusals are counted, then TLS and
// tokens.
func (f *securityFlags) options(addr string) (*metrics.Metrics, []grpc.ServerOption, error) {
	var opts []grpc.ServerOption
	if err := server.CheckListenSecurity(addr, f.tls.Enabled(), f.insecure); err != nil {
		return nil, nil, usagef("--addr: %v; give --tls-cert and --tls-key, or --insecure", err)
	}
	if f.pprof && f.metricsAddr == "" {
		return nil, nil, usagef("--pprof needs --metrics-addr")
	}
	var m *metrics.Metrics
	if f.metricsAddr != "" {
		if err := server.CheckListenSecurity(f.metricsAddr, false, f.insecure); err != nil {
			return nil, nil, usagef("--metrics-addr: %v (metrics are served over plain HTTP); keep them on loopback, or give --insecure", err)
		}
		m = metrics.New()
		opts = append(opts, server.MetricsOptions(m)...)
	}
	if f.tls.Enabled() {
		o, err := f.tls.ServerOption()
		if err != nil {
			return nil, nil, usagef("%v", err)
		}
		opts = append(opts, o)
	}
	if f.tokenFile != "" {
		t, err := server.LoadTokens(f.tokenFile)
		if err != nil {
			return nil, nil, usagef("--token-file: %v", err)
		}
		opts = append(opts, t.ServerOptions()...)
	}
	return m, opts, nil
}

// healthOnly is the --health-addr server: grpc.health.v1.Health and
// nothing else, plain text, no tokens, reporting SERVING for "" and the
// sampling service until shutdown starts. It lets an orchestrator's gRPC
// probe, which speaks neither TLS nor tokens, check a server whose main
// port needs both; it answers no other rpc.
type healthOnly struct {
	grpc   *grpc.Server
	health *health.Server
}

func newHealthOnly() *healthOnly {
	h := &healthOnly{grpc: grpc.NewServer(), health: health.NewServer()}
	h.health.SetServingStatus("", healthpb.HealthCheckResponse_SERVING)
	h.health.SetServingStatus(server.ServiceName, healthpb.HealthCheckResponse_SERVING)
	healthpb.RegisterHealthServer(h.grpc, h.health)
	return h
}
