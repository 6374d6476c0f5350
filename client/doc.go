// Package client is the Go client library of sluice: it opens a sampling
// session on any grpc.ClientConnInterface with a Spec and a batch
// evaluation function, answers the server's requests for points, and
// delivers draws and progress through callbacks, then a Summary. It also
// plans a guaranteed accuracy before sampling (Plan) and follows another
// session's draws (Follow).
//
//	cc, err := client.Dial("127.0.0.1:7070") // plain text to loopback only; WithTLS otherwise
//	defer cc.Close()
//	sum, err := client.Run(ctx, cc, spec, func(ctx context.Context, b *client.Batch) error {
//		for r := range b.Rows { /* fill b.Grad[r*b.Dim:(r+1)*b.Dim] with ∇log π at b.Point(r) */ }
//		return nil
//	}, client.OnDraws(func(d *client.Draws) { /* consume */ }), client.KeepDraws())
//
// When a session fails, Run returns the error together with what was
// received (the draws, with KeepDraws, and the last progress). The client
// never runs sampler logic: the server drives, the client evaluates. It
// depends only on the wire API (package sluicev1).
package client
