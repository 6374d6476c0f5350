package server_test

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/experimental"
	"google.golang.org/grpc/status"

	sluicev1 "sluice/proto/sluice/v1"
	"sluice/server"
	"sluice/server/session"
)

// floorMessageBytes is the message limit of every transport benchmark,
// on both ends, for the session and the floor alike.
const floorMessageBytes = 64 << 20

// echoService is a stand-in SluiceService with no engine behind it: its
// Session answers each client frame with down frames of a fixed payload
// until the client closes its side, then ends the stream. With down = 1
// this is the transport floor of a session step: one message of rows×dim
// float64 each way, the least a step can cost on this stream type. The
// client decides the number of round trips; maxRounds bounds it.
type echoService struct {
	sluicev1.UnimplementedSluiceServiceServer
	maxRounds int    // round trips allowed per stream
	down      int    // frames sent back per round (>= 1)
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

// serveLoopback serves on a fresh 127.0.0.1:0 listener and returns a
// client connection to it. Teardown (connection, server, serving
// goroutine) happens at b's cleanup.
func serveLoopback(b *testing.B, serve func(net.Listener) error, stop func()) *grpc.ClientConn {
	b.Helper()
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		b.Fatal(err)
	}
	done := make(chan struct{})
	go func() { _ = serve(lis); close(done) }()
	conn, err := grpc.NewClient(lis.Addr().String(), grpc.WithTransportCredentials(insecure.NewCredentials()),
		experimental.WithBufferPool(server.BufferPool()))
	if err != nil {
		stop()
		<-done
		b.Fatal(err)
	}
	b.Cleanup(func() {
		_ = conn.Close()
		stop()
		<-done
	})
	return conn
}

// startFloor serves an echoService of up to rounds round trips per
// stream, payload bytes each way, down frames back per round.
func startFloor(b *testing.B, rounds, down int, payload []byte) *grpc.ClientConn {
	b.Helper()
	gs := grpc.NewServer(grpc.MaxRecvMsgSize(floorMessageBytes), grpc.MaxSendMsgSize(floorMessageBytes),
		experimental.BufferPool(server.BufferPool())) // the same buffers as the session's server
	sluicev1.RegisterSluiceServiceServer(gs, &echoService{maxRounds: rounds, down: down, payload: payload})
	return serveLoopback(b, gs.Serve, gs.Stop)
}

// runFloor plays the client side of one echoService stream: rounds times
// it sends an Evaluations frame carrying payload as gradients and waits
// for the down frames of the reply. It ends with the stream's clean end.
func runFloor(ctx context.Context, conn *grpc.ClientConn, rounds, down int, payload []byte) error {
	ctx, cancel := context.WithCancel(ctx)
	defer cancel()
	st, err := sluicev1.NewSluiceServiceClient(conn).Session(ctx,
		grpc.MaxCallRecvMsgSize(floorMessageBytes), grpc.MaxCallSendMsgSize(floorMessageBytes))
	if err != nil {
		return err
	}
	req := &sluicev1.SessionRequest{Frame: &sluicev1.SessionRequest_Evaluations{Evaluations: &sluicev1.Evaluations{
		Rows: 1, Dim: int32(len(payload) / 8), Gradients: payload}}}
	for i := range rounds {
		if err := st.Send(req); err != nil {
			return fmt.Errorf("round %d: send: %w", i, err)
		}
		for range down {
			resp, err := st.Recv()
			if err != nil {
				return fmt.Errorf("round %d: recv: %w", i, err)
			}
			if n := len(resp.GetPoints().GetPoints()); n != len(payload) {
				return fmt.Errorf("round %d: reply of %d bytes, want %d", i, n, len(payload))
			}
		}
	}
	if err := st.CloseSend(); err != nil {
		return err
	}
	if _, err := st.Recv(); !errors.Is(err, io.EOF) {
		return fmt.Errorf("after %d rounds: want the end of the stream, got %v", rounds, err)
	}
	return nil
}

// BenchmarkFloorWithDraws is the floor of a session step as the protocol
// shapes it: one rows×dim message up (the gradients) and two down (the
// Points of the next step and the Draws of the step just made), against
// the one-each-way floor of BenchmarkTransport. The gap between the two is
// what sending draws costs on the wire, before any engine work.
func BenchmarkFloorWithDraws(b *testing.B) {
	for _, c := range transportCases {
		b.Run(c.name(), func(b *testing.B) {
			payload := make([]byte, 8*c.dim*c.chains)
			conn1 := startFloor(b, c.steps, 1, payload)
			conn2 := startFloor(b, c.steps, 2, payload)
			ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
			defer cancel()
			warm := min(c.steps, warmSteps)
			if err := runFloor(ctx, conn1, warm, 1, payload); err != nil {
				b.Fatal(err)
			}
			if err := runFloor(ctx, conn2, warm, 2, payload); err != nil {
				b.Fatal(err)
			}
			b.ReportAllocs()
			var one, two time.Duration
			iters := 0
			for b.Loop() {
				t0 := time.Now()
				if err := runFloor(ctx, conn1, c.steps, 1, payload); err != nil {
					b.Fatal(err)
				}
				one += time.Since(t0)
				t0 = time.Now()
				if err := runFloor(ctx, conn2, c.steps, 2, payload); err != nil {
					b.Fatal(err)
				}
				two += time.Since(t0)
				iters++
			}
			rounds := float64(c.steps * iters)
			b.ReportMetric(one.Seconds()*1e6/rounds, "us/rtt-1down")
			b.ReportMetric(two.Seconds()*1e6/rounds, "us/rtt-2down")
			b.ReportMetric(float64(two)/float64(one), "2down/1down")
		})
	}
}

// BenchmarkSessionLoopback runs the TCP mode of BenchmarkTransport alone
// (a real server on loopback, the same target, kernel and seed), so that a
// CPU profile of it shows only the session's costs.
func BenchmarkSessionLoopback(b *testing.B) {
	for _, c := range transportCases {
		b.Run(c.name(), func(b *testing.B) {
			tg := benchTarget(b, c.dim, c.chains)
			start := make([]float64, c.dim)
			srv := server.New(server.Options{Limits: session.Limits{MaxMessageBytes: floorMessageBytes}})
			conn := serveLoopback(b, srv.Serve, srv.Stop)
			ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
			defer cancel()
			if _, _, _, err := runSession(ctx, conn, tg, c, min(c.steps, warmSteps), start); err != nil {
				b.Fatal(err)
			}
			b.ReportAllocs()
			var total time.Duration
			iters := 0
			for b.Loop() {
				t0 := time.Now()
				sum, _, _, err := runSession(ctx, conn, tg, c, c.steps, start)
				total += time.Since(t0)
				if err != nil {
					b.Fatal(err)
				}
				if sum.DrawsReceived != int64(c.chains*c.steps) {
					b.Fatalf("%d draws received, want %d", sum.DrawsReceived, c.chains*c.steps)
				}
				iters++
			}
			b.ReportMetric(total.Seconds()*1e6/float64(c.steps*iters), "us/step")
		})
	}
}
