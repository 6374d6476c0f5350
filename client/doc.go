// Package client is the Go client library of sluice: it opens a sampling
// session on any grpc.ClientConnInterface with a Spec and a batch
// evaluation function, answers the server's requests for points, and
// delivers draws and progress through callbacks, then a Summary.
//
//	sum, err := client.Run(ctx, conn, spec, func(ctx context.Context, b *client.Batch) error {
//		for r := range b.Rows { /* fill b.Grad[r*b.Dim:(r+1)*b.Dim] with ∇log π at b.Point(r) */ }
//		return nil
//	}, client.OnDraws(func(d *client.Draws) { /* consume */ }))
//
// The client never runs sampler logic: the server drives, the client
// evaluates. It depends only on the wire API (package sluicev1).
package client
