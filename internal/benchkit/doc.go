// Package benchkit measures how close sluice comes to its floors, each
// figure side by side with the floor it is compared to, in one process on
// loopback. It owns the pieces shared by the `sluice bench` command and the
// `go test -bench` benchmarks of the server:
//
//   - a session step over loopback TCP against a bare gRPC echo of the same
//     bytes on the same stream type, one message each way per step
//     (Transport);
//   - the lmc kernel driven in-process against a plain fused Go loop doing
//     the same arithmetic, x ← x + h·∇log π(x) + √(2h)·ξ, with the same
//     random stream in the same order (Kernel);
//   - the Python client against a numpy loop doing the same arithmetic in
//     its own process, measured by client/python/bench.py (PythonClient);
//   - the live heap of one long session, sampled while it runs (Memory).
//
// Compared runs alternate (A, B, A, B, …) and every figure is the median
// of several rounds; a ratio is the median of the rounds' own ratios, so
// that load which changes during the run weighs on both sides alike.
//
// The target of the Go comparisons is a Gaussian with a diagonal
// precision (DiagGaussian): its gradient costs O(dim) per point, small
// next to the transport, so the comparisons see the transport and the
// engine rather than the target.
package benchkit
