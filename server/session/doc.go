// Package session owns one sampling session, independent of any transport:
// it validates what the client sent, builds the kernel from its entry in
// the kernel registry (registry.go, the only place kernels are named),
// runs the phases that come before sampling (phase.go), asks for every
// chain's points in one request per step (split into parts when a message
// would be too large), validates each answer, counts evaluations exactly,
// enforces the budget (evaluations and wall time), keeps draws after
// burn-in with thinning, numbers them, reports progress at the cadence the
// client asked for, and finishes with a reason.
//
// The engine is the one owner of concurrency in a session: Run reads the
// client's messages from a channel and calls send for every frame from its
// own goroutine, so a transport needs one reader goroutine and no locks.
// It also owns the sharing of each request's rows among the session's
// evaluators — the owner's stream and workers attached with
// Session.Attach — and the reissue of a lost or late evaluator's rows
// (pool.go); a transport gives each worker stream its own writer.
// Nothing here imports gRPC, protobuf or a logger; the server package
// translates frames to and from the wire and maps errors to status codes.
package session
