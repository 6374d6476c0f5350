package server

import (
	"context"
	"errors"
	"math"
	"net"
	"runtime/debug"
	"sync"
	"time"

	"go.uber.org/zap"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/experimental"
	"google.golang.org/grpc/health"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/keepalive"
	"google.golang.org/grpc/mem"
	"google.golang.org/grpc/reflection"
	"google.golang.org/grpc/status"

	"sluice/internal/codec"
	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/metrics"
	"sluice/server/session"
)

// Options configure a Server. The zero value is usable.
type Options struct {
	// Limits apply to every session (see session.Limits for defaults).
	// Limits.MaxMessageBytes is also the gRPC receive and send limit.
	Limits session.Limits
	// MaxSessions caps concurrent registered sessions; more are refused
	// with RESOURCE_EXHAUSTED. 0 means DefaultMaxSessions.
	MaxSessions int
	// Logger receives the server's log; nil means no logging.
	Logger *zap.Logger
	// GRPCOptions are added to the server's own options.
	GRPCOptions []grpc.ServerOption
	// FollowRetention is how long a finished session's draws stay
	// available to followers (default 10 minutes; negative: not kept
	// after the session ends). Set Limits.FollowBuffer to serve followers.
	// A finished session's ring stays reserved in the memory budget until
	// then, and is released on time.
	FollowRetention time.Duration
	// State configures checkpoints and Resume (resume.go); the zero value
	// keeps no state.
	State StateOptions
	// MaxMemoryBytes is the memory budget of all sessions together: each
	// reserves its worst case (session.Budget) at registration, and one
	// that does not fit what is left is refused with RESOURCE_EXHAUSTED.
	// 0 means DefaultMaxMemory().
	MaxMemoryBytes int64
	// RegisterTimeout is how long a new stream may take to send its
	// Register frame (0: DefaultRegisterTimeout).
	RegisterTimeout time.Duration
	// MaxRegistering caps the streams waiting for their Register frame;
	// they hold no session slot (0: DefaultMaxRegistering).
	MaxRegistering int
	// Metrics, when set, receives what the server itself measures: the
	// memory budget in use, every checkpoint written (time and size) and
	// the sessions suspended and waiting for a resume. The counts seen on
	// the wire come from MetricsOptions(m), added to GRPCOptions.
	Metrics *metrics.Metrics
}

// Defaults of Options.
const (
	// DefaultMaxSessions: the memory budget, not this count, is what
	// protects the server; the count bounds goroutines and scheduling.
	DefaultMaxSessions = 256
	// DefaultRegisterTimeout: a client registers in its first frame,
	// right after opening the stream.
	DefaultRegisterTimeout = 10 * time.Second
	// DefaultMaxRegistering: streams waiting to register cost a goroutine
	// and a few KiB each.
	DefaultMaxRegistering = 1024
)

// Server serves the sluice API, health and reflection on one gRPC server.
type Server struct {
	sluicev1.UnimplementedSluiceServiceServer

	opts   Options
	log    *zap.Logger
	grpc   *grpc.Server
	health *health.Server
	slots  chan struct{}
	// registering holds a token per stream waiting for its Register
	// frame; quit is closed when Shutdown begins.
	registering chan struct{}
	quit        chan struct{}
	quitOnce    sync.Once
	mem         memoryPool
	idleTimer   *time.Timer // see maybeIdle; guarded by mu

	mu       sync.Mutex
	draining bool
	active   map[string]chan<- session.Message
	pools    map[string]attachable // running sessions workers may attach to (attach.go)
	logs     map[string]*followed
	live     map[string]*liveSession // resume.go
	// suspended: sessions this server suspended (suspend.go)
	suspended map[string]*suspension
	sweeper   chan struct{} // closed to stop the sweep loop
}

// followed is a session's draw log as followers see it.
type followed struct {
	log     *session.DrawLog
	dim     int
	limit   int64  // the server's message limit, for batching rows
	token   string // the session's token, which Follow must present
	resumed bool   // restored from a checkpoint: followers may be ahead
	// reserved is the memory budget the retained ring holds once the
	// session has finished.
	reserved int64
}

// inboxSize is the capacity of a session's queue of received messages.
const inboxSize = 16

// ServiceName is the health-check name of the sampling service.
const ServiceName = "sluice.v1.SluiceService"

// New builds a Server with its gRPC server, health and reflection
// services registered.
func New(o Options) *Server {
	if o.MaxSessions <= 0 {
		o.MaxSessions = DefaultMaxSessions
	}
	if o.MaxMemoryBytes <= 0 {
		o.MaxMemoryBytes = DefaultMaxMemory()
	}
	if o.RegisterTimeout <= 0 {
		o.RegisterTimeout = DefaultRegisterTimeout
	}
	if o.MaxRegistering <= 0 {
		o.MaxRegistering = DefaultMaxRegistering
	}
	// Streams hold up to inboxSize received answers, one in hand, and a
	// ring of decoded ones: the budget counts them.
	o.Limits.InflightAnswers = inboxSize + 2
	if o.Limits.MaxMessageBytes <= 0 {
		o.Limits.MaxMessageBytes = 4 << 20
	}
	if o.Logger == nil {
		o.Logger = zap.NewNop()
	}
	if o.FollowRetention == 0 {
		o.FollowRetention = 10 * time.Minute
	}
	s := &Server{opts: o, log: o.Logger, slots: make(chan struct{}, o.MaxSessions),
		active: map[string]chan<- session.Message{},
		logs:   map[string]*followed{}, live: map[string]*liveSession{}, sweeper: make(chan struct{}),
		registering: make(chan struct{}, o.MaxRegistering), quit: make(chan struct{}),
		mem: memoryPool{total: o.MaxMemoryBytes, metrics: o.Metrics}, pools: map[string]attachable{},
		suspended: map[string]*suspension{}}
	// The engine sizes its frames within Limits.MaxMessageBytes, and the
	// reader refuses larger client frames with a status naming the frame.
	// The transport's own cap sits at four times that, as a backstop
	// against memory exhaustion (its refusal carries no field detail).
	size := int(min(4*o.Limits.MaxMessageBytes, math.MaxInt32))
	gopts := append([]grpc.ServerOption{
		grpc.MaxRecvMsgSize(size),
		grpc.MaxSendMsgSize(size),
		grpc.KeepaliveEnforcementPolicy(keepalive.EnforcementPolicy{MinTime: 10 * time.Second, PermitWithoutStream: true}),
		grpc.KeepaliveParams(keepalive.ServerParameters{Time: 30 * time.Second, Timeout: 20 * time.Second}),
		grpc.ChainUnaryInterceptor(s.recoverUnary),
		grpc.ChainStreamInterceptor(s.recoverStream),
		experimental.BufferPool(BufferPool()),
		// Every message through the codec: a session's hot frames by
		// hand, everything else (health and reflection included) by the
		// standard proto codec (internal/codec).
		grpc.ForceServerCodecV2(codec.New(BufferPool())),
		grpc.InitialWindowSize(StreamWindowBytes), grpc.InitialConnWindowSize(ConnWindowBytes),
	}, o.GRPCOptions...)
	s.grpc = grpc.NewServer(gopts...)
	sluicev1.RegisterSluiceServiceServer(s.grpc, s)
	s.health = health.NewServer()
	s.health.SetServingStatus("", healthpb.HealthCheckResponse_SERVING)
	s.health.SetServingStatus(ServiceName, healthpb.HealthCheckResponse_SERVING)
	healthpb.RegisterHealthServer(s.grpc, s.health)
	reflection.Register(s.grpc)
	s.startSweep()
	return s
}

// Flow-control windows, set on both ends (client.Dial uses the same). A
// session is lock-step: per step the server sends a Points frame (and
// the Draws frame, a Progress frame now and then) and waits for one
// Evaluations frame, so no more than about two frames are in flight per
// direction. A stream window of 4 MiB, the default message limit, lets
// a frame of that size go out whole, with no wait for a window update
// half-way; the connection window holds four such streams. Fixed windows
// also turn off gRPC's bandwidth-delay estimation, whose ping rides on
// every round trip of a lock-step stream. The windows are credit, not
// memory: a receiver buffers up to them only when its reader stalls, and
// the session's reader never does for longer than its inbox allows.
const (
	StreamWindowBytes = 4 << 20
	ConnWindowBytes   = 16 << 20
)

// BufferPool returns the buffer pool the server gives gRPC: power-of-two
// sizes from 256 B to 64 MiB, not cleared (codec.Pool says why). Clients dialling sluice
// benefit from the same pool (experimental.WithBufferPool(server.BufferPool())).
func BufferPool() mem.BufferPool { return codec.Pool() }

// Serve accepts connections on lis until Shutdown or Stop.
func (s *Server) Serve(lis net.Listener) error { return s.grpc.Serve(lis) }

// GRPCServer exposes the underlying server, for callers that register
// more services.
func (s *Server) GRPCServer() *grpc.Server { return s.grpc }

// Shutdown stops the server gracefully: health turns NOT_SERVING, new
// sessions are refused, every running session is asked to finish (reason
// FINISH_REASON_SHUTDOWN, so its client still gets its Finished frame),
// and in-flight calls drain. When ctx ends first, remaining connections
// are closed hard.
func (s *Server) Shutdown(ctx context.Context) {
	s.health.Shutdown()
	s.quitOnce.Do(func() { close(s.quit) }) // streams not yet registered end now
	s.mu.Lock()
	s.stopSweep()
	s.stopSuspensionsLocked()
	s.draining = true
	for _, in := range s.active {
		select {
		case in <- session.Message{Stop: true, Shutdown: true, StopReason: "server shutting down"}:
		default: // its queue is full; the hard stop below ends it
		}
	}
	s.mu.Unlock()
	done := make(chan struct{})
	go func() { s.grpc.GracefulStop(); close(done) }()
	select {
	case <-done:
	case <-ctx.Done():
		s.grpc.Stop()
		<-done
	}
}

// Stop closes every connection at once.
func (s *Server) Stop() {
	s.mu.Lock()
	s.stopSweep()
	s.stopSuspensionsLocked()
	s.mu.Unlock()
	s.grpc.Stop()
}

// Session implements the bidirectional Session rpc. The handler's
// goroutine runs the engine and is the only sender; one reader goroutine,
// owned by this handler, feeds the engine and exits when the stream ends
// or the handler returns.
func (s *Server) Session(stream sluicev1.SluiceService_SessionServer) error {
	first, err := s.awaitRegister(stream)
	if err != nil {
		return err
	}
	select {
	case s.slots <- struct{}{}:
		defer func() { <-s.slots }()
	default:
		s.log.Info("session refused: every slot taken", zap.Int("max_sessions", cap(s.slots)))
		return problem(busy, "", "server busy: %d sessions running", cap(s.slots))
	}
	if res := first.GetResume(); res != nil {
		return s.resume(stream, res)
	}
	reg := first.GetRegister()
	if reg == nil {
		return toStatus(session.BadField("register", "the first frame must be register (or resume)"))
	}
	spec, err := specFromWire(reg)
	if err != nil {
		s.log.Info("registration refused", zap.Error(err))
		return toStatus(err)
	}
	budget, err := session.Need(spec, s.opts.Limits)
	if err != nil {
		s.log.Info("registration refused", zap.Error(err))
		return toStatus(err)
	}
	if !s.mem.reserve(budget.Total) {
		return s.memoryRefusal(budget)
	}
	reserved := budget.Total // what is left to release when the handler returns
	defer func() { s.mem.release(reserved) }()
	id := NewSessionID()
	sess, err := session.New(id, spec, s.opts.Limits)
	if err != nil {
		s.log.Info("registration refused", zap.Error(err))
		return toStatus(err)
	}
	sess.SetToken(NewSessionToken())
	return s.serveSession(stream, sess, nil, &reserved)
}

// serveSession runs a registered or restored session on stream; lv is its
// entry in s.live when it was restored (nil: tracked here). reserved is the
// memory budget the session holds: what its retained follow ring keeps
// after the end moves out of it (see untrack).
func (s *Server) serveSession(stream sluicev1.SluiceService_SessionServer, sess *session.Session, lv *liveSession, reserved *int64) error {
	id := sess.ID()
	ctx, cancel := context.WithCancel(stream.Context())
	defer cancel()
	in := make(chan session.Message, inboxSize)
	limit := sess.MessageLimit()
	lv = s.goLive(id, sess, cancel, lv)
	defer s.leave(id, lv) // after untrack: a Resume waiting for it then finds the id free
	if !s.track(id, in, sess) {
		return problem(draining, "", "server shutting down")
	}
	defer s.untrack(id, reserved)
	l := s.persistTo(ctx, sess, cancel)
	defer l.stop()
	maxGrad, maxFrame, sp0 := sess.MaxGradientValues(), sess.MaxAnswerBytes(), sess.Spec()
	s.openPool(id, sess.Token(), sess)
	defer s.closePool(id)
	go func() { // reader: owned by this handler
		// Gradients are decoded into a ring of reused buffers. The engine
		// takes messages in order and has finished with message j (copied
		// its values) before it takes j+1; the reader is at most inboxSize
		// messages ahead of it, plus the one in hand, so a ring of
		// inboxSize+2 buffers is never overwritten while in use. A frame
		// is received into req, in gRPC's own buffers, and an Evaluations
		// frame is decoded from there (see request); the buffers go back
		// to gRPC before the message goes to the engine.
		var ring [inboxSize + 2][]float64
		var req request
		defer req.Release()
		lim := answerLimits{limit: limit, maxFrame: maxFrame, maxGrad: maxGrad, replicates: sp0.Noise.Replicates}
		for n := 0; ; n++ {
			var m session.Message
			if err := stream.RecvMsg(&req); err != nil {
				m = session.Message{Err: recvError("evaluations", err)}
			} else {
				m = req.message(lim, &ring[n%len(ring)])
				req.Release()
			}
			select {
			case in <- m:
			case <-ctx.Done():
				return
			}
			if m.Err != nil {
				return
			}
		}
	}()

	sp := sess.Spec()
	log := s.log.With(zap.String("session", id))
	log.Info("session started", zap.Int("dim", sp.Dim), zap.Int("chains", sp.Chains),
		zap.String("kernel", sp.Kernel), zap.Float64("step", sp.Step), zap.Uint64("seed", sp.Seed))
	enc := encoder{maxParams: paramCap(limit), maxText: textCap(limit)}
	res, err := sess.Run(ctx, in, func(f session.Frame) error { return stream.SendMsg(enc.message(f)) })
	l.stop() // no renewal after the session stopped
	if e, ok := session.AsError(err); ok && e.Kind == session.Timeout {
		var wasSuspended bool
		if err, wasSuspended = s.onSilent(sess, res, err, l); wasSuspended {
			return err
		}
	}
	f := res.Finished
	fields := []zap.Field{zap.String("reason", f.Reason.String()), zap.Int64("evaluations", f.Progress.EvaluationsUsed),
		zap.Int64("draws", f.Progress.DrawsSent), zap.Duration("elapsed", f.Progress.Elapsed)}
	switch {
	case err == nil:
		log.Info("session finished", fields...)
	case l.isLost():
		log.Info("session stopped: another replica holds it now", fields...)
	case canceled(err):
		log.Info("client went away: session abandoned", append(fields, zap.Bool("resumable", s.opts.State.Store != nil), zap.Error(err))...)
	default:
		if _, bad := session.AsError(err); bad {
			log.Info("session failed on client input", append(fields, zap.Error(err))...)
		} else {
			log.Warn("session failed", append(fields, zap.Error(err))...)
		}
	}
	if l.isLost() {
		return problem(draining, "", "session %s is held by another server replica now (its lease passed or was taken): resume it", id)
	}
	if errors.Is(err, session.ErrSuspended) {
		return problem(draining, "", "server shutting down; session %s was checkpointed: resume it", id)
	}
	return toStatus(err)
}

func (s *Server) track(id string, in chan<- session.Message, sess *session.Session) bool {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.draining {
		return false
	}
	s.active[id] = in
	if l := sess.DrawLog(); l != nil {
		if old := s.logs[id]; old != nil {
			// A resumed session's new log replaces the retained one,
			// whose retention timer then finds nothing to drop.
			s.mem.release(old.reserved)
			old.reserved = 0
		}
		s.logs[id] = &followed{log: l, dim: sess.Spec().Dim, limit: s.opts.Limits.MaxMessageBytes,
			token: sess.Token(), resumed: sess.Resumed()}
	}
	return true
}

// untrack forgets a finished session. Its draw log stays followable for
// the retention, holding its ring's memory (moved from *reserved, the
// session's reservation, to the log); it is dropped, and the memory
// released, when the retention passes.
func (s *Server) untrack(id string, reserved *int64) {
	s.mu.Lock()
	defer s.mu.Unlock()
	delete(s.active, id)
	defer s.maybeIdle()
	f, ok := s.logs[id]
	if !ok {
		return
	}
	if s.opts.FollowRetention < 0 {
		delete(s.logs, id)
		return
	}
	f.reserved = min(f.log.Bytes(), *reserved)
	*reserved -= f.reserved
	time.AfterFunc(s.opts.FollowRetention, func() { s.forget(id, f) })
}

// forget drops a finished session's draw log f and releases its memory,
// unless another log (the session's, resumed) has replaced it.
func (s *Server) forget(id string, f *followed) {
	s.mu.Lock()
	ok := s.logs[id] == f
	if ok {
		delete(s.logs, id)
	}
	s.maybeIdle()
	s.mu.Unlock()
	if ok {
		s.mem.release(f.reserved)
	}
}

func (s *Server) recovered(method string, r any) error {
	s.log.Error("panic in handler", zap.String("method", method), zap.Any("panic", r), zap.ByteString("stack", debug.Stack()))
	return problem(serverFault, "", "internal error in %s", method)
}

func (s *Server) recoverUnary(ctx context.Context, req any, info *grpc.UnaryServerInfo, h grpc.UnaryHandler) (resp any, err error) {
	defer func() {
		if r := recover(); r != nil {
			err = s.recovered(info.FullMethod, r)
		}
		s.logDenied(info.FullMethod, err)
	}()
	return h(ctx, req)
}

func (s *Server) recoverStream(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, h grpc.StreamHandler) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = s.recovered(info.FullMethod, r)
		}
		s.logDenied(info.FullMethod, err)
	}()
	return h(srv, ss)
}

// deniedCodes are the refusals no handler logs: credentials refused by
// the token interceptors (which run inside this server's own), and a
// session id or token that matches nothing. The handlers log their other
// refusals themselves, with their figures.
var deniedCodes = map[codes.Code]bool{codes.Unauthenticated: true, codes.PermissionDenied: true, codes.NotFound: true}

// logDenied logs a call refused for its credentials or its session id, at
// info.
func (s *Server) logDenied(method string, err error) {
	if st, ok := status.FromError(err); ok && deniedCodes[st.Code()] {
		s.log.Info("call refused", zap.String("method", method), zap.String("code", st.Code().String()), zap.String("message", st.Message()))
	}
}
