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
	"google.golang.org/protobuf/encoding/protowire"

	"sluice/internal/codec"
	"sluice/internal/wire"

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
// per stream. It uses the sluice server's buffer pool and codec, so both
// sides of a comparison read and write their frames alike.
func ServeEcho(payload, down, maxRounds int) (*Loopback, error) {
	if payload < 8 || payload%8 != 0 || down < 1 || maxRounds < 1 {
		panic(fmt.Sprintf("benchkit: ServeEcho(%d, %d, %d)", payload, down, maxRounds))
	}
	gs := grpc.NewServer(grpc.MaxRecvMsgSize(MessageBytes), grpc.MaxSendMsgSize(MessageBytes),
		experimental.BufferPool(server.BufferPool()), grpc.ForceServerCodecV2(codec.New(nil)))
	sluicev1.RegisterSluiceServiceServer(gs, &echoService{maxRounds: maxRounds, down: down, values: payload / 8})
	return serveLoopback(gs.Serve, gs.Stop)
}

// echoService is a stand-in SluiceService with no engine behind it: its
// Session answers each client frame with down frames carrying the values
// it received, until the client closes its side. With down = 1 this is
// the transport floor of a session step: one message of rows×dim float64
// each way, encoded and decoded as a session's frames are (internal/codec:
// read in gRPC's own buffers, the values decoded straight into a reused
// array, and written straight from one into a pooled buffer), the least a
// step can cost on this stream type. (An echo through the standard
// protobuf codec allocates and copies every bytes field it decodes, about
// 1 MB per round trip at 64 × 1000, and its time then depends on how much
// fresh memory the process's heap has to fault in.)
type echoService struct {
	sluicev1.UnimplementedSluiceServiceServer
	maxRounds int // round trips allowed per stream
	down      int // frames sent back per round (≥ 1)
	values    int // the float64 values expected up and sent back
}

func (e *echoService) Session(st sluicev1.SluiceService_SessionServer) error {
	var in codec.Frame
	defer in.Release()
	out := &floatFrame{field: 2}     // SessionResponse.points
	for i := range e.maxRounds + 1 { // the last Recv is the client's close
		err := st.RecvMsg(&in)
		if errors.Is(err, io.EOF) {
			return nil
		}
		if err != nil {
			return err
		}
		if i == e.maxRounds {
			break
		}
		// SessionRequest.evaluations, Evaluations.gradients.
		out.vals, err = floatsIn(&in, 2, 5, out.vals[:0])
		in.Release()
		if err != nil || len(out.vals) != e.values {
			return status.Errorf(codes.InvalidArgument, "gradients of %d values (%v), want %d", len(out.vals), err, e.values)
		}
		for range e.down {
			if err := st.SendMsg(out); err != nil {
				return err
			}
		}
	}
	return status.Errorf(codes.ResourceExhausted, "more than %d round trips", e.maxRounds)
}

// floatFrame is a session frame of one row of values, written by hand
// (codec.Sender): a SessionRequest holding Evaluations{rows: 1, dim,
// gradients} when field is 2 of the request, or a SessionResponse holding
// Points{rows: 1, dim, points}, whose fields have the same numbers.
type floatFrame struct {
	field protowire.Number
	vals  []float64
}

func (f *floatFrame) inner() int {
	return codec.SizeVarint(3, 1) + codec.SizeVarint(4, uint64(len(f.vals))) + codec.SizeFloats(5, len(f.vals))
}

// WireSize implements codec.Sender.
func (f *floatFrame) WireSize() int { return codec.SizeMessage(f.field, f.inner()) }

// AppendWire implements codec.Sender.
func (f *floatFrame) AppendWire(b []byte) []byte {
	b = codec.AppendMessageHeader(b, f.field, f.inner())
	b = codec.AppendVarint(b, 3, 1)
	b = codec.AppendVarint(b, 4, uint64(len(f.vals)))
	return codec.AppendFloats(b, 5, f.vals)
}

// floatsIn appends to dst the values of the float array field inner of
// the message field outer of the frame f holds.
func floatsIn(f *codec.Frame, outer, inner protowire.Number, dst []float64) ([]float64, error) {
	c := f.Cursor()
	for !c.Done() {
		num, typ, err := c.Tag()
		if err != nil {
			return dst, err
		}
		if num != outer || typ != protowire.BytesType {
			if err := c.Skip(num, typ); err != nil {
				return dst, err
			}
			continue
		}
		sp, err := c.Bytes()
		if err != nil {
			return dst, err
		}
		sub := f.Sub(sp)
		for !sub.Done() {
			n2, t2, err := sub.Tag()
			if err != nil {
				return dst, err
			}
			if n2 == inner && t2 == protowire.BytesType {
				s2, err := sub.Bytes()
				if err != nil {
					return dst, err
				}
				return f.AppendFloats(dst, s2)
			}
			if err := sub.Skip(n2, t2); err != nil {
				return dst, err
			}
		}
	}
	return dst, fmt.Errorf("no field %d in field %d", inner, outer)
}

// RunEcho plays the client side of one stream of an echo server: rounds
// times it sends an Evaluations frame carrying payload's values as
// gradients and waits for the down frames of the reply, decoding their
// values, then closes the stream and waits for its clean end. Its frames
// go through the codec the Go client uses.
func RunEcho(ctx context.Context, conn grpc.ClientConnInterface, rounds, down int, payload []byte) error {
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	st, err := sluicev1.NewSluiceServiceClient(conn).Session(ctx,
		grpc.MaxCallRecvMsgSize(MessageBytes), grpc.MaxCallSendMsgSize(MessageBytes), grpc.ForceCodecV2(codec.New(nil)))
	if err != nil {
		return err
	}
	req := &floatFrame{field: 2} // SessionRequest.evaluations
	if req.vals, err = wire.DecodeFloats(nil, payload); err != nil {
		return err
	}
	var in codec.Frame
	defer in.Release()
	var got []float64
	for i := range rounds {
		if err := st.SendMsg(req); err != nil {
			return fmt.Errorf("echo round %d: send: %w", i, err)
		}
		for range down {
			if err := st.RecvMsg(&in); err != nil {
				return fmt.Errorf("echo round %d: recv: %w", i, err)
			}
			got, err = floatsIn(&in, 2, 5, got[:0]) // SessionResponse.points, Points.points
			in.Release()
			if err != nil || len(got) != len(req.vals) {
				return fmt.Errorf("echo round %d: reply of %d values (%v), want %d", i, len(got), err, len(req.vals))
			}
		}
	}
	if err := st.CloseSend(); err != nil {
		return err
	}
	if err := st.RecvMsg(&in); !errors.Is(err, io.EOF) {
		return fmt.Errorf("echo after %d rounds: want the end of the stream, got %v", rounds, err)
	}
	return nil
}
