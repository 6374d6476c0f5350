package benchkit

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/experimental"
	"google.golang.org/grpc/status"

	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server"
	"sluice/server/session"
)

// MessageBytes is the message limit of every transport comparison, on
// both ends, for the session and the echo alike: large enough that no
// batch is split.
const MessageBytes = 64 << 20

// FollowBuffer is the follow buffer of the benchmarked server, in rows:
// the default of `sluice serve`, so a session costs here what it costs
// there.
const FollowBuffer = 100000

// Loopback is a gRPC server on a fresh 127.0.0.1 port and one client
// connection to it.
type Loopback struct {
	conn *grpc.ClientConn
	addr string
	stop func()
	done chan struct{}
}

// Conn is the client connection.
func (l *Loopback) Conn() *grpc.ClientConn { return l.conn }

// Addr is the address the server listens on.
func (l *Loopback) Addr() string { return l.addr }

// Close closes the connection, stops the server and waits for its serving
// goroutine.
func (l *Loopback) Close() {
	_ = l.conn.Close()
	l.stop()
	<-l.done
}

func serveLoopback(serve func(net.Listener) error, stop func()) (*Loopback, error) {
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return nil, err
	}
	l := &Loopback{addr: lis.Addr().String(), stop: stop, done: make(chan struct{})}
	go func() { _ = serve(lis); close(l.done) }()
	l.conn, err = grpc.NewClient(l.addr, grpc.WithTransportCredentials(insecure.NewCredentials()),
		experimental.WithBufferPool(server.BufferPool()))
	if err != nil {
		stop()
		<-l.done
		return nil, err
	}
	return l, nil
}

// ServeSluice starts a sluice server with the message limit MessageBytes
// and the follow buffer FollowBuffer.
func ServeSluice() (*Loopback, error) {
	srv := server.New(server.Options{Limits: session.Limits{MaxMessageBytes: MessageBytes, FollowBuffer: FollowBuffer}})
	return serveLoopback(srv.Serve, srv.Stop)
}

// ServeEcho starts an echo server (see RunEcho) answering each up frame
// with down frames of payload bytes, for at most maxRounds round trips
// per stream. It uses the sluice server's buffer pool, so both sides of a
// comparison allocate alike.
func ServeEcho(payload, down, maxRounds int) (*Loopback, error) {
	if payload < 8 || payload%8 != 0 || down < 1 || maxRounds < 1 {
		panic(fmt.Sprintf("benchkit: ServeEcho(%d, %d, %d)", payload, down, maxRounds))
	}
	gs := grpc.NewServer(grpc.MaxRecvMsgSize(MessageBytes), grpc.MaxSendMsgSize(MessageBytes),
		experimental.BufferPool(server.BufferPool()))
	sluicev1.RegisterSluiceServiceServer(gs, &echoService{maxRounds: maxRounds, down: down, payload: make([]byte, payload)})
	return serveLoopback(gs.Serve, gs.Stop)
}

// echoService is a stand-in SluiceService with no engine behind it: its
// Session answers each client frame with down frames of a fixed payload
// until the client closes its side. With down = 1 this is the transport
// floor of a session step: one message of rows×dim float64 each way, the
// least a step can cost on this stream type.
type echoService struct {
	sluicev1.UnimplementedSluiceServiceServer
	maxRounds int    // round trips allowed per stream
	down      int    // frames sent back per round (≥ 1)
	payload   []byte // the bytes of every frame sent back, and the size expected up
}

func (e *echoService) Session(st sluicev1.SluiceService_SessionServer) error {
	resp := &sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Points{Points: &sluicev1.Points{
		Rows: 1, Dim: int32(len(e.payload) / 8), Points: e.payload}}}
	for i := range e.maxRounds + 1 { // the last Recv is the client's close
		req, err := st.Recv()
		if errors.Is(err, io.EOF) {
			return nil
		}
		if err != nil {
			return err
		}
		if i == e.maxRounds {
			break
		}
		if n := len(req.GetEvaluations().GetGradients()); n != len(e.payload) {
			return status.Errorf(codes.InvalidArgument, "gradients of %d bytes, want %d", n, len(e.payload))
		}
		for range e.down {
			if err := st.Send(resp); err != nil {
				return err
			}
		}
	}
	return status.Errorf(codes.ResourceExhausted, "more than %d round trips", e.maxRounds)
}

// RunEcho plays the client side of one stream of an echo server: rounds
// times it sends an Evaluations frame carrying payload bytes as gradients
// and waits for the down frames of the reply, then closes the stream and
// waits for its clean end.
func RunEcho(ctx context.Context, conn grpc.ClientConnInterface, rounds, down int, payload []byte) error {
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	st, err := sluicev1.NewSluiceServiceClient(conn).Session(ctx,
		grpc.MaxCallRecvMsgSize(MessageBytes), grpc.MaxCallSendMsgSize(MessageBytes))
	if err != nil {
		return err
	}
	req := &sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{Evaluations: &sluicev1.Evaluations{
		Rows: 1, Dim: int32(len(payload) / 8), Gradients: payload}}}
	for i := range rounds {
		if err := st.Send(req); err != nil {
			return fmt.Errorf("echo round %d: send: %w", i, err)
		}
		for range down {
			resp, err := st.Recv()
			if err != nil {
				return fmt.Errorf("echo round %d: recv: %w", i, err)
			}
			if n := len(resp.GetPoints().GetPoints()); n != len(payload) {
				return fmt.Errorf("echo round %d: reply of %d bytes, want %d", i, n, len(payload))
			}
		}
	}
	if err := st.CloseSend(); err != nil {
		return err
	}
	if _, err := st.Recv(); !errors.Is(err, io.EOF) {
		return fmt.Errorf("echo after %d rounds: want the end of the stream, got %v", rounds, err)
	}
	return nil
}
