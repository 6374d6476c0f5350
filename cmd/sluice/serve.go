package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"net"
	"time"

	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"

	"sluice/server"
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
}

func (f *serveFlags) register(fs *flag.FlagSet) {
	fs.Int64Var(&f.maxMessageBytes, "max-message-bytes", 16<<20, "largest gRPC message sent or accepted, in bytes; larger batches are split")
	fs.IntVar(&f.maxSessions, "max-sessions", 64, "concurrent sessions; more are refused")
	fs.IntVar(&f.maxChains, "max-chains", 1<<16, "most chains one session may run")
	fs.IntVar(&f.maxDim, "max-dim", 1<<20, "largest dimension one session may have")
	fs.DurationVar(&f.maxTime, "max-session-time", 0, "wall-time cap on every session (0: none)")
	fs.DurationVar(&f.answerTimeout, "answer-timeout", 10*time.Minute, "how long to wait for a client's answer to one request")
	fs.IntVar(&f.followBuffer, "follow-buffer", 100000, "latest draws (rows) each session keeps for followers, at most 64 MiB (0: no following)")
	fs.DurationVar(&f.followRetention, "follow-retention", 10*time.Minute, "how long a finished session stays followable")
}

func (f *serveFlags) options(log *zap.Logger) (server.Options, error) {
	if f.maxMessageBytes < 64<<10 {
		return server.Options{}, usagef("--max-message-bytes must be at least 65536")
	}
	if f.maxSessions < 1 || f.maxChains < 1 || f.maxDim < 1 || f.maxTime < 0 || f.answerTimeout <= 0 || f.followBuffer < 0 || f.followRetention <= 0 {
		return server.Options{}, usagef("limits must be positive")
	}
	return server.Options{
		Limits: session.Limits{MaxDim: f.maxDim, MaxChains: f.maxChains, MaxMessageBytes: f.maxMessageBytes,
			MaxTime: f.maxTime, AnswerTimeout: f.answerTimeout, FollowBuffer: f.followBuffer},
		MaxSessions:     f.maxSessions,
		Logger:          log,
		FollowRetention: f.followRetention,
	}, nil
}

func newLogger(level string, w io.Writer) (*zap.Logger, error) {
	var lvl zapcore.Level
	if err := lvl.UnmarshalText([]byte(level)); err != nil {
		return nil, usagef("--log-level %q: want debug, info, warn or error", level)
	}
	enc := zap.NewProductionEncoderConfig()
	enc.EncodeTime = zapcore.ISO8601TimeEncoder
	core := zapcore.NewCore(zapcore.NewJSONEncoder(enc), zapcore.AddSync(w), lvl)
	return zap.New(core), nil
}

func serve(ctx context.Context, args []string, stderr io.Writer) error {
	fs := flag.NewFlagSet("serve", flag.ContinueOnError)
	fs.SetOutput(stderr)
	addr := fs.String("addr", "127.0.0.1:7070", "address to listen on")
	level := fs.String("log-level", "info", "log level: debug, info, warn, error")
	grace := fs.Duration("grace", 15*time.Second, "on SIGINT/SIGTERM, how long running sessions get to finish")
	var sf serveFlags
	sf.register(fs)
	setHelp(fs, help{
		usage: "sluice serve [flags]",
		about: "Serves the sluice gRPC API (sluice.v1.SluiceService: the Session stream, Follow and Plan) on --addr, " +
			"with the standard health service and server reflection, so any gRPC tool can list and call it. A client " +
			"registers a target on a Session stream; the server runs the chains, asks the client for gradients in one " +
			"batch per step, and streams back draws, progress and a summary. The flags below set the server's limits; " +
			"a session asking for more is refused with a message naming the field. Logs are JSON lines on standard " +
			"error. SIGINT or SIGTERM stops it gracefully: running sessions get --grace to finish and still deliver " +
			"their last draws and summary.",
		examples: []string{
			"sluice serve",
			"sluice serve --addr 127.0.0.1:7070 --log-level info",
			"sluice serve --addr 0.0.0.0:7070 --max-sessions 8 --max-message-bytes 67108864 --answer-timeout 2m",
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
	lis, err := net.Listen("tcp", *addr)
	if err != nil {
		return err
	}
	srv := server.New(opts)
	log.Info("serving", zap.String("addr", lis.Addr().String()), zap.Int64("max_message_bytes", sf.maxMessageBytes))
	errc := make(chan error, 1)
	go func() { errc <- srv.Serve(lis) }()
	select {
	case err := <-errc:
		return fmt.Errorf("serve: %w", err)
	case <-ctx.Done():
	}
	log.Info("shutting down", zap.Duration("grace", *grace))
	sctx, cancel := context.WithTimeout(context.Background(), *grace)
	defer cancel()
	srv.Shutdown(sctx)
	<-errc
	log.Info("stopped")
	return nil
}
