package server

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"io"
	"math"
	"math/bits"
	"net"
	"runtime/debug"
	"sync"
	"sync/atomic"
	"time"

	"go.uber.org/zap"
	"google.golang.org/grpc"
	"google.golang.org/grpc/experimental"
	"google.golang.org/grpc/health"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/keepalive"
	"google.golang.org/grpc/mem"
	"google.golang.org/grpc/reflection"
	"google.golang.org/protobuf/proto"

	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server/session"
)

// Options configure a Server. The zero value is usable.
type Options struct {
	// Limits apply to every session (see session.Limits for defaults).
	// Limits.MaxMessageBytes is also the gRPC receive and send limit.
	Limits session.Limits
	// MaxSessions caps concurrent sessions; more are refused with
	// RESOURCE_EXHAUSTED. 0 means 64.
	MaxSessions int
	// Logger receives the server's log; nil means no logging.
	Logger *zap.Logger
	// GRPCOptions are added to the server's own options.
	GRPCOptions []grpc.ServerOption
	// FollowRetention is how long a finished session's draws stay
	// available to followers (default 10 minutes; negative: not kept
	// after the session ends). Set Limits.FollowBuffer to serve followers.
	FollowRetention time.Duration
}

// Server serves the sluice API, health and reflection on one gRPC server.
type Server struct {
	sluicev1.UnimplementedSluiceServiceServer

	opts   Options
	log    *zap.Logger
	grpc   *grpc.Server
	health *health.Server
	slots  chan struct{}
	nextID atomic.Uint64
	prefix string

	mu       sync.Mutex
	draining bool
	active   map[string]chan<- session.Message
	logs     map[string]*followed
}

// followed is a session's draw log as followers see it.
type followed struct {
	log      *session.DrawLog
	dim      int
	limit    int64     // the server's message limit, for batching rows
	finished time.Time // zero while the session runs
}

// inboxSize is the capacity of a session's queue of received messages.
const inboxSize = 16

// ServiceName is the health-check name of the sampling service.
const ServiceName = "sluice.v1.SluiceService"

// New builds a Server with its gRPC server, health and reflection
// services registered.
func New(o Options) *Server {
	if o.MaxSessions <= 0 {
		o.MaxSessions = 64
	}
	if o.Limits.MaxMessageBytes <= 0 {
		o.Limits.MaxMessageBytes = 4 << 20
	}
	if o.Logger == nil {
		o.Logger = zap.NewNop()
	}
	if o.FollowRetention == 0 {
		o.FollowRetention = 10 * time.Minute
	}
	var b [4]byte
	_, _ = rand.Read(b[:])
	s := &Server{opts: o, log: o.Logger, slots: make(chan struct{}, o.MaxSessions),
		prefix: hex.EncodeToString(b[:]), active: map[string]chan<- session.Message{},
		logs: map[string]*followed{}}
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
	}, o.GRPCOptions...)
	s.grpc = grpc.NewServer(gopts...)
	sluicev1.RegisterSluiceServiceServer(s.grpc, s)
	s.health = health.NewServer()
	s.health.SetServingStatus("", healthpb.HealthCheckResponse_SERVING)
	s.health.SetServingStatus(ServiceName, healthpb.HealthCheckResponse_SERVING)
	healthpb.RegisterHealthServer(s.grpc, s.health)
	reflection.Register(s.grpc)
	return s
}

// BufferPool returns gRPC buffers in power-of-two sizes from 256 B to
// 64 MiB, without clearing them. gRPC's default pool jumps from 32 KiB to
// 1 MiB and clears the whole buffer it hands out, so a 51 KB message (64
// chains × 100 float64) cleared 1 MiB per frame; measured, clearing was a
// sixth of a session's CPU time. gRPC fills every buffer it gets before
// reading it (a received message is read in full, an encoded one written
// in full), which is why it keeps such dirty pools itself for its framer;
// TestTransportIsTransparent checks bit-identical draws through this pool
// at several message sizes. Clients dialling sluice benefit from the same
// pool (experimental.WithBufferPool(server.BufferPool())).
func BufferPool() mem.BufferPool { return bufferPool }

var bufferPool = newPowerPool(8, 26)

// powerPool keeps one sync.Pool per power-of-two capacity.
type powerPool struct {
	lo, hi uint
	pools  []sync.Pool
}

func newPowerPool(lo, hi uint) *powerPool {
	return &powerPool{lo: lo, hi: hi, pools: make([]sync.Pool, hi-lo+1)}
}

// tier returns the index of the smallest tier holding n bytes, or -1.
func (p *powerPool) tier(n int) int {
	e := uint(bits.Len(uint(max(n, 1) - 1)))
	if e < p.lo {
		e = p.lo
	}
	if e > p.hi {
		return -1
	}
	return int(e - p.lo)
}

// Get implements mem.BufferPool.
func (p *powerPool) Get(n int) *[]byte {
	t := p.tier(n)
	if t < 0 {
		b := make([]byte, n)
		return &b
	}
	if b, ok := p.pools[t].Get().(*[]byte); ok {
		*b = (*b)[:n]
		return b
	}
	b := make([]byte, n, 1<<(uint(t)+p.lo))
	return &b
}

// Put implements mem.BufferPool: buffers of a tier's exact capacity go
// back to it, others to the collector.
func (p *powerPool) Put(b *[]byte) {
	c := cap(*b)
	if t := p.tier(c); t >= 0 && c == 1<<(uint(t)+p.lo) {
		p.pools[t].Put(b)
	}
}

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
	s.mu.Lock()
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
func (s *Server) Stop() { s.grpc.Stop() }

// Session implements the bidirectional Session rpc. The handler's
// goroutine runs the engine and is the only sender; one reader goroutine,
// owned by this handler, feeds the engine and exits when the stream ends
// or the handler returns.
func (s *Server) Session(stream sluicev1.SluiceService_SessionServer) error {
	select {
	case s.slots <- struct{}{}:
		defer func() { <-s.slots }()
	default:
		return problem(busy, "", "server busy: %d sessions running", cap(s.slots))
	}
	first, err := stream.Recv()
	if errors.Is(err, io.EOF) {
		return problem(badInput, "register", "stream closed before the first frame")
	}
	if err != nil {
		return toStatus(recvError("register", err))
	}
	reg := first.GetRegister()
	if reg == nil {
		return toStatus(session.BadField("register", "the first frame must be register"))
	}
	spec, err := specFromWire(reg)
	if err != nil {
		return toStatus(err)
	}
	id := fmt.Sprintf("%s-%d", s.prefix, s.nextID.Add(1))
	sess, err := session.New(id, spec, s.opts.Limits)
	if err != nil {
		s.log.Debug("registration refused", zap.Error(err))
		return toStatus(err)
	}

	ctx, cancel := context.WithCancel(stream.Context())
	defer cancel()
	in := make(chan session.Message, inboxSize)
	limit := sess.MessageLimit()
	if !s.track(id, in, sess) {
		return problem(draining, "", "server shutting down")
	}
	defer s.untrack(id)
	go func() { // reader: owned by this handler
		// Gradients are decoded into a ring of reused buffers. The engine
		// takes messages in order and has finished with message j (copied
		// its values) before it takes j+1; the reader is at most inboxSize
		// messages ahead of it, plus the one in hand, so a ring of
		// inboxSize+2 buffers is never overwritten while in use.
		var ring [inboxSize + 2][]float64
		for n := 0; ; n++ {
			f, err := stream.Recv()
			var m session.Message
			switch {
			case err != nil:
				m = session.Message{Err: recvError("evaluations", err)}
			case int64(proto.Size(f)) > limit:
				m = session.Message{Err: &session.Error{Kind: session.TooLarge, Field: "evaluations", Chain: -1, Coord: -1,
					Reason: fmt.Sprintf("message of %d bytes exceeds the session's limit of %d bytes", proto.Size(f), limit)}}
			default:
				m = messageFromWire(f, &ring[n%len(ring)])
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
	res, err := sess.Run(ctx, in, func(f session.Frame) error { return stream.Send(enc.frame(f)) })
	f := res.Finished
	fields := []zap.Field{zap.String("reason", f.Reason.String()), zap.Int64("evaluations", f.Progress.EvaluationsUsed),
		zap.Int64("draws", f.Progress.DrawsSent), zap.Duration("elapsed", f.Progress.Elapsed)}
	switch {
	case err == nil:
		log.Info("session finished", fields...)
	case canceled(err):
		log.Debug("client went away", append(fields, zap.Error(err))...)
	default:
		if _, bad := session.AsError(err); bad {
			log.Info("session failed on client input", append(fields, zap.Error(err))...)
		} else {
			log.Warn("session failed", append(fields, zap.Error(err))...)
		}
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
	now := time.Now()
	for k, f := range s.logs { // forget logs past their retention
		if !f.finished.IsZero() && now.Sub(f.finished) > s.opts.FollowRetention {
			delete(s.logs, k)
		}
	}
	if l := sess.DrawLog(); l != nil {
		s.logs[id] = &followed{log: l, dim: sess.Spec().Dim, limit: s.opts.Limits.MaxMessageBytes}
	}
	return true
}

func (s *Server) untrack(id string) {
	s.mu.Lock()
	defer s.mu.Unlock()
	delete(s.active, id)
	if f, ok := s.logs[id]; ok {
		if s.opts.FollowRetention < 0 {
			delete(s.logs, id)
		} else {
			f.finished = time.Now()
		}
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
	}()
	return h(ctx, req)
}

func (s *Server) recoverStream(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, h grpc.StreamHandler) (err error) {
	defer func() {
		if r := recover(); r != nil {
			err = s.recovered(info.FullMethod, r)
		}
	}()
	return h(srv, ss)
}
