package session

import (
	"fmt"
	"math"

	"sluice/internal/wire"
	"sluice/kernels"
)

// The memory budget: at registration, the engine works out from the
// kernel registry the most memory a session can need over every request
// its kernel may send, and refuses a session whose worst case exceeds
// Limits.MaxSessionBytes. Transports that run many sessions reserve the
// same figure from a server-wide pool before building the session (Need),
// and release it when the session ends.
//
// The figures are upper bounds on the session's own buffers, counted in
// float64 values (8 bytes), derived here from the allocations of the
// engine, the kernels and the diagnostics; the garbage collector's
// headroom is not included (the server-wide pool's default leaves it).

// DefaultMaxSessionBytes is the per-session limit when
// Limits.MaxSessionBytes is 0: 1 GiB.
const DefaultMaxSessionBytes = 1 << 30

// stateCopies bounds the chains×dim arrays a session holds at once: the
// kernel's positions and its working arrays (the midpoint kernels keep
// five), the request's points, the answer's gradients, and the monitor's
// last points, last gradients and kept positions.
const stateCopies = 10

// sessionOverhead is counted once per session for what does not scale
// with its size: goroutines, frames, maps, progress reports.
const sessionOverhead = 256 << 10

// Budget is the memory a session may need at worst, item by item.
type Budget struct {
	// Total is the sum of the items, in bytes.
	Total int64
	// Items lists what the total is made of.
	Items []BudgetItem
}

// BudgetItem is one line of a Budget.
type BudgetItem struct {
	// Field is the registration field that drives the item (the one to
	// lower to shrink it), such as "register.chains".
	Field string
	// What says what the memory holds, in words for a person.
	What string
	// Bytes is the item's worst case.
	Bytes int64
}

// Largest returns the largest item (the zero item for an empty budget).
func (b Budget) Largest() BudgetItem {
	var big BudgetItem
	for _, it := range b.Items {
		if it.Bytes > big.Bytes {
			big = it
		}
	}
	return big
}

// Need validates spec against lim as New does and returns the session's
// budget, without building anything: transports call it to reserve memory
// before New allocates. Its errors are New's (a *Error naming a field),
// including the refusal of a budget over Limits.MaxSessionBytes.
func Need(spec Spec, lim Limits) (Budget, error) {
	lim = lim.withDefaults()
	entry, err := spec.validate(lim)
	if err != nil {
		return Budget{}, err
	}
	b := budgetOf(&spec, entry, lim)
	return b, checkBudget(b, lim)
}

// checkBudget refuses a budget over the per-session limit, naming the
// field of its largest item.
func checkBudget(b Budget, lim Limits) error {
	if b.Total <= lim.MaxSessionBytes {
		return nil
	}
	big := b.Largest()
	return &Error{Kind: TooLarge, Field: big.Field, Chain: -1, Coord: -1,
		Reason: fmt.Sprintf("this session needs %s at worst (%s); the per-session limit is %s",
			Bytes(b.Total), big.What, Bytes(lim.MaxSessionBytes))}
}

// Bytes formats n bytes for people: "512 B", "3.5 KiB", "34.4 GiB".
func Bytes(n int64) string {
	const units = "KMGTPE"
	if n < 1024 {
		return fmt.Sprintf("%d B", n)
	}
	v, i := float64(n)/1024, 0
	for v >= 1024 && i < len(units)-1 {
		v /= 1024
		i++
	}
	return fmt.Sprintf("%.3g %ciB", v, units[i])
}

// budgetOf computes the budget of a validated, tuned spec. Products are
// taken in float64 and saturate, so absurd sizes give huge figures, never
// overflow.
func budgetOf(s *Spec, k *kernelEntry, lim Limits) Budget {
	var b Budget
	add := func(field, what string, bytes float64) {
		if bytes <= 0 {
			return
		}
		n := int64(math.MaxInt64 / 2)
		if bytes < float64(n) {
			n = int64(bytes)
		}
		b.Items = append(b.Items, BudgetItem{Field: field, What: what, Bytes: n})
		b.Total = min(b.Total+n, math.MaxInt64/2)
	}
	dim, chains := float64(s.Dim), float64(s.Chains)
	add("register.chains", fmt.Sprintf("chain state of %d chains × %d coordinates", s.Chains, s.Dim), stateCopies*8*chains*dim)
	if k.chainwise {
		// One kernel per chain (about 1 KiB each with its stream and
		// request), the batch's gathered positions and points, and the
		// chain groups' answers (groups.go).
		add("register.chains", fmt.Sprintf("per-chain kernels of %d chains, their gathered positions and the groups' answers", s.Chains),
			1024*chains+3*8*chains*dim)
	}

	// The largest request and its answer, over every kind the kernel (and
	// an opt-in phase) may send.
	shapes := k.requests
	if s.CurvatureProbe > 0 {
		shapes = append(append([]requestShape(nil), probeShapes...), k.requests...)
	}
	msg := negotiate(lim.MaxMessageBytes, s.MaxMessageBytes)
	var hess, answer, part float64
	var hvRows float64
	for _, r := range shapes {
		rows := chains * float64(max(r.rowsPerChain, 1))
		reps := 1
		if s.Noise.Stochastic && !r.need.Has(kernels.NeedFullData) {
			reps = s.Noise.Replicates
		}
		vals := float64(rowValues(r.need, s.Dim, reps))
		if r.need.Has(kernels.NeedHessian) {
			hess = max(hess, rows*dim*dim*8)
		}
		if r.need.Has(kernels.NeedHessianVector) {
			hvRows = max(hvRows, rows)
		}
		answer = max(answer, rows*(vals+1)*8)
		part = max(part, min(float64(msg), rows*float64(wire.RowBytes(int(vals)))+wire.FrameOverhead+stopSlack))
	}
	if hess > 0 {
		add("register.chains", fmt.Sprintf("Hessians of %d×%d for %d chains", s.Dim, s.Dim, s.Chains), hess)
		answer -= hess
	}
	what := fmt.Sprintf("answers of up to %d values per chain", int64(answer/8/chains))
	if s.Noise.Replicates > 1 {
		add("register.noise.replicates", what+fmt.Sprintf(", with %d gradient replicates", s.Noise.Replicates), answer)
	} else {
		add("register.chains", what, answer)
	}
	if hvRows > 0 {
		// Each Lanczos process keeps its basis (up to twice the vectors
		// used, as it grows by doubling); two processes per chain.
		add("register.krylov_max_iterations", fmt.Sprintf("Krylov bases of up to %d vectors for %d chains", s.KrylovMaxIterations, s.Chains),
			2*hvRows*float64(s.KrylovMaxIterations)*dim*8)
	}
	// Answer frames received and not yet taken by the engine: the raw
	// message and its decoded values, each at most one part.
	add("register.max_message_bytes", fmt.Sprintf("%d answer frames in flight", lim.InflightAnswers), 2*float64(lim.InflightAnswers)*part)

	// Diagnostics: the thinned windows of the monitor (see newMonitor).
	ksdRows, _, histChains, histCap := monitorSizes(s.Dim, s.Chains)
	// The Stein window keeps draws and scores; the history keeps draws
	// (diag.NewDrawHistory), and its summaries a scratch of about 11
	// values per kept draw and chain.
	add("register.dim", "diagnostics windows", (2*float64(ksdRows)*dim+float64(histChains*histCap)*(dim+11))*8)
	// A judgement's snapshots of them and the Stein assessment's scratch
	// (judge.go).
	add("register.dim", "diagnostics judgement", judgeScratch(s.Dim, s.Chains)*8)

	// A dense dim×dim metric, for gradient kernels that may adapt one.
	if k.need().Has(kernels.NeedGradient) {
		add("register.dim", fmt.Sprintf("a %d×%d metric", s.Dim, s.Dim), dim*dim*8)
	}
	// The follow ring at its cap (it grows as it fills).
	if rows := followCap(lim.FollowBuffer, s.Dim); rows > 0 {
		add("register.dim", fmt.Sprintf("a follow ring of up to %d draws", rows), float64(rows)*(dim*8+16))
	}
	var names float64
	for _, n := range s.Names {
		names += float64(len(n)) + 16
	}
	if len(s.Names) == 0 {
		names = dim * 32 // "theta[i]"
	}
	add("register.names", "parameter names", names)
	add("register.chains", "per-session overhead", sessionOverhead)
	return b
}

// followCap is the most rows a session's follow ring may hold: the
// configured rows, within maxFollowBytes of values; 0 when followers are
// not served.
func followCap(buffer, dim int) int {
	if buffer <= 0 {
		return 0
	}
	return min(buffer, max(1, maxFollowBytes/(8*dim)))
}

// MaxGradientValues is the most gradient values one answer frame of this
// session may carry: the rows of a part times the replicates declared at
// registration times dim, over every kind of request the session sends.
// Transports refuse larger frames before decoding them.
func (s *Session) MaxGradientValues() int {
	m := 0
	for _, r := range s.shapes() {
		if r.need.Has(kernels.NeedGradient) {
			m = max(m, min(s.partRows(r.need), s.spec.Chains*max(r.rowsPerChain, 1))*s.replicates(r.need)*s.spec.Dim)
		}
	}
	return m
}

// MaxAnswerBytes is the largest client frame this session can need: an
// answer part of its largest request (within the message limit), with
// room for a Stop frame's reason. Transports refuse larger frames before
// decoding them, so that what the client sends stays within what
// registration reserved.
func (s *Session) MaxAnswerBytes() int64 {
	var m int64
	for _, r := range s.shapes() {
		rows := min(s.partRows(r.need), s.spec.Chains*max(r.rowsPerChain, 1))
		m = max(m, int64(rows)*s.rowBytes(r.need))
	}
	return min(m+wire.FrameOverhead+stopSlack, s.msgBytes)
}

// stopSlack is room for a Stop frame's reason (transports cap it at 1 KiB).
const stopSlack = 2048
