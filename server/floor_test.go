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
	// later, when not nil, is sent instead of the payload for every frame
	// of a round after the first (draws sent by reference).
	later *sluicev1.SessionResponse
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
		for j := range e.down {
			r := resp
			if j > 0 && e.later != nil {
				r = e.later
			}
			if err := st.Send(r); err != nil {
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
		experimental.WithBufferPool(server.BufferPool()), // as the server, and client.Dial's windows
		grpc.WithInitialWindowSize(server.StreamWindowBytes), grpc.WithInitialConnWindowSize(server.ConnWindowBytes))
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
	return startEcho(b, &echoService{maxRounds: rounds, down: down, payload: payload})
}

// startFloorRefs is startFloor with two frames back per round: the
// payload, then a Draws frame naming chains rows of it, as a session
// sends the draws of a step whose next request asks at them.
func startFloorRefs(b *testing.B, rounds, chains int, payload []byte) *grpc.ClientConn {
	d := &sluicev1.Draws{Rows: int32(chains), Dim: int32(len(payload) / 8 / chains), FromRequestId: 1}
	for c := range chains {
		d.Chains = append(d.Chains, int32(c))
		d.Iterations = append(d.Iterations, 1)
		d.PointRows = append(d.PointRows, int32(c))
	}
	return startEcho(b, &echoService{maxRounds: rounds, down: 2, payload: payload,
		later: &sluicev1.SessionResponse{Frame: &sluicev1.SessionResponse_Draws{Draws: d}}})
}

func startEcho(b *testing.B, e *echoService) *grpc.ClientConn {
	b.Helper()
	gs := grpc.NewServer(grpc.MaxRecvMsgSize(floorMessageBytes), grpc.MaxSendMsgSize(floorMessageBytes),
		// the same buffers and windows as the session's server
		experimental.BufferPool(server.BufferPool()),
		grpc.InitialWindowSize(server.StreamWindowBytes), grpc.InitialConnWindowSize(server.ConnWindowBytes))
	sluicev1.RegisterSluiceServiceServer(gs, e)
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
		for j := range down {
			resp, err := st.Recv()
			if err != nil {
				return fmt.Errorf("round %d: recv: %w", i, err)
			}
			if resp.GetDraws() != nil && j > 0 {
				continue // a draws frame by reference (startFloorRefs)
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
// what sending draws costs on the wire, before any engine work; 2down-ref
// is the same with the Draws frame naming the points just sent
// (Draws.point_rows), as a session does for a client that accepts
// references.
func BenchmarkFloorWithDraws(b *testing.B) {
	for _, c := range transportCases {
		b.Run(c.name(), func(b *testing.B) {
			payload := make([]byte, 8*c.dim*c.chains)
			conn1 := startFloor(b, c.steps, 1, payload)
			conn2 := startFloor(b, c.steps, 2, payload)
			connRef := startFloorRefs(b, c.steps, c.chains, payload)
			ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
			defer cancel()
			warm := min(c.steps, warmSteps)
			if err := runFloor(ctx, conn1, warm, 1, payload); err != nil {
				b.Fatal(err)
			}
			if err := runFloor(ctx, conn2, warm, 2, payload); err != nil {
				b.Fatal(err)
			}
			if err := runFloor(ctx, connRef, warm, 2, payload); err != nil {
				b.Fatal(err)
			}
			b.ReportAllocs()
			var one, two, ref, oneC, twoC, refC time.Duration
			iters := 0
			for b.Loop() {
				for _, m := range []struct {
					conn      *grpc.ClientConn
					down      int
					wall, cpu *time.Duration
				}{{conn1, 1, &one, &oneC}, {conn2, 2, &two, &twoC}, {connRef, 2, &ref, &refC}} {
					t0, c0 := time.Now(), cpuTime()
					if err := runFloor(ctx, m.conn, c.steps, m.down, payload); err != nil {
						b.Fatal(err)
					}
					*m.wall += time.Since(t0)
					*m.cpu += cpuTime() - c0
				}
				iters++
			}
			rounds := float64(c.steps * iters)
			b.ReportMetric(one.Seconds()*1e6/rounds, "us/rtt-1down")
			b.ReportMetric(two.Seconds()*1e6/rounds, "us/rtt-2down")
			b.ReportMetric(float64(two)/float64(one), "2down/1down")
			b.ReportMetric(float64(ref)/float64(one), "2down-ref/1down")
			b.ReportMetric(float64(twoC)/float64(oneC), "cpu-2down/1down")
			b.ReportMetric(float64(refC)/float64(oneC), "cpu-2down-ref/1down")
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
			if _, _, _, _, err := runSession(ctx, conn, tg, c, min(c.steps, warmSteps), start, false); err != nil {
				b.Fatal(err)
			}
			b.ReportAllocs()
			var total time.Duration
			iters := 0
			for b.Loop() {
				t0 := time.Now()
				sum, _, _, _, err := runSession(ctx, conn, tg, c, c.steps, start, false)
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
