package client

import (
	"context"
	"net"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/test/bufconn"

	sluicev1 "sluice/proto/sluice/v1"
)

// fakeServer is a scripted sluice server for the client's tests: each rpc
// runs the function given (Unimplemented when nil).
type fakeServer struct {
	sluicev1.UnimplementedSluiceServiceServer
	session func(grpc.BidiStreamingServer[sluicev1.SessionRequest, sluicev1.SessionResponse]) error
	follow  func(*sluicev1.FollowRequest, grpc.ServerStreamingServer[sluicev1.FollowResponse]) error
	plan    func(context.Context, *sluicev1.PlanRequest) (*sluicev1.PlanResponse, error)
}

func (f *fakeServer) Session(s grpc.BidiStreamingServer[sluicev1.SessionRequest, sluicev1.SessionResponse]) error {
	if f.session == nil {
		return f.UnimplementedSluiceServiceServer.Session(s)
	}
	return f.session(s)
}

func (f *fakeServer) Follow(r *sluicev1.FollowRequest, s grpc.ServerStreamingServer[sluicev1.FollowResponse]) error {
	if f.follow == nil {
		return f.UnimplementedSluiceServiceServer.Follow(r, s)
	}
	return f.follow(r, s)
}

func (f *fakeServer) Plan(ctx context.Context, r *sluicev1.PlanRequest) (*sluicev1.PlanResponse, error) {
	if f.plan == nil {
		return f.UnimplementedSluiceServiceServer.Plan(ctx, r)
	}
	return f.plan(ctx, r)
}

// startFake serves f over an in-memory listener and returns a connection
// made by Dial (plain text to a non-loopback name, so WithInsecure).
func startFake(t *testing.T, f *fakeServer) *grpc.ClientConn {
	t.Helper()
	lis := bufconn.Listen(1 << 20)
	srv := grpc.NewServer()
	sluicev1.RegisterSluiceServiceServer(srv, f)
	go func() { _ = srv.Serve(lis) }()
	t.Cleanup(srv.Stop)
	cc, err := Dial("passthrough:///bufnet", WithInsecure(), WithGRPCOptions(grpc.WithContextDialer(
		func(ctx context.Context, _ string) (net.Conn, error) { return lis.DialContext(ctx) })))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = cc.Close() })
	return cc
}
