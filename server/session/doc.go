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
// With step 0 it chooses the step itself (and the kinetic kernels'
// friction and inverse mass) from a curvature probe in the metric's
// units (tune.go: the largest step whose stationary variance on every
// Gaussian direction seen is within 10 % of the target's), and adapts a
// preconditioner during burn-in on a schedule counted in steps, frozen
// when burn-in ends (adapt.go).
//
// The engine adapts a preconditioner C (kernels.Metric) from the chains'
// own positions, all chains pooled, on a schedule counted in steps per
// chain, never in wall time, so that the same seed and the same answers
// give the same draws whatever the client's speed. For a burn-in of B
// steps (B ≥ minAdaptBurnIn):
//
//   - the first B/10 steps (at least 10) collect nothing: the chains are
//     still leaving their start, and a covariance of draws on that way
//     would measure the path, not the target;
//   - a first short window of w = B/20 steps (at least 10) gives a
//     diagonal metric: scales can differ by orders of magnitude, a
//     variance needs few draws, and correcting the scales first lets the
//     later windows' chains mix enough to estimate correlations;
//   - then windows of 2w, 4w, 8w, … steps, each estimating the metric
//     afresh from its own draws alone (the earlier draws came from a
//     worse-tuned kernel and may carry the transient): the dense
//     Ledoit–Wolf estimate (kernels.Covariance.Shrunk) up to
//     kernels.MaxDenseMetricDim, the pooled variances above it (or with
//     metric_form diagonal). Each window is twice the last because its
//     chains mix better, and the estimate's error falls as its length
//     grows; a window that would not fit is merged into the one before;
//   - the last window ends B/10 steps (at least 20) before burn-in ends,
//     so that the chains (and MALA's acceptance-rate adaptation) settle
//     under the final metric and step before anything is kept;
//   - the metric is frozen when burn-in ends: every kept draw comes from
//     one fixed Markov kernel.
//
// The dense windows pool the positions in the units of the metric in use
// (L⁻¹x), so the Ledoit–Wolf shrinkage pulls toward that metric rather
// than toward a multiple of the identity whose scales may be far off.
//
// After every update the engine, when it chooses the step itself (step
// 0), probes the curvature in the new metric at chain 0's position and
// chooses the step (and friction, inverse mass) again (tune.go): a step
// suited to the old geometry is not the one suited to the new. An update
// under which the probe sees a condition number more than 1.5 times the
// previous one is undone (its window's chains had not spread yet). While
// windows remain, the steps allow a 50 % variance error instead of 10 %:
// those draws are never kept, and the chains must travel for each window
// to see the target's spread. A step the client gave is kept and read in
// the metric's units.
//
// The adapter's state is plain fields (counts, steps, the last choices,
// the metric's matrix and the window's accumulator), so a checkpoint can
// encode it.
//
// The engine is the one owner of concurrency in a session: Run reads the
// client's messages from a channel and calls send for every frame from its
// own goroutine, so a transport needs one reader goroutine and no locks.
// It also owns the sharing of each request's rows among the session's
// evaluators — the owner's stream and workers attached with
// Session.Attach — and the reissue of a lost or late evaluator's rows
// (pool.go); a transport gives each worker stream its own writer. After
// burn-in it may step the chains in pipelined groups, each with a request
// out, so the client always has points waiting (groups.go); the draws are
// those of stepping every chain together.
// Nothing here imports gRPC, protobuf or a logger; the server package
// translates frames to and from the wire and maps errors to status codes.
package session
