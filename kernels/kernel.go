package kernels

import (
	"encoding"
	"math/rand/v2"
)

// Need is a set of quantities a kernel needs at each requested point.
type Need uint8

const (
	// NeedGradient asks for the gradient of log π (dim values per point).
	NeedGradient Need = 1 << iota
	// NeedLogDensity asks for log π up to an additive constant (one value
	// per point).
	NeedLogDensity
	// NeedHessian asks for the Hessian of log π (dim×dim per point,
	// symmetric, row-major).
	NeedHessian
	// NeedHessianVector asks for the product of the Hessian of log π at
	// each point with that row's vector in Request.Vectors (dim values
	// per point).
	NeedHessianVector
	// NeedFullData asks a client with stochastic (minibatch) gradients
	// for the exact gradient over its whole data set at these points, as
	// control-variate anchors need. Clients with exact gradients ignore
	// it.
	NeedFullData
)

// Has reports whether n includes q.
func (n Need) Has(q Need) bool { return n&q == q }

// Request is what a kernel needs evaluated next. Its slices belong to the
// kernel and stay valid until the next call to Tell.
type Request struct {
	// Need says what to evaluate at every point.
	Need Need
	// Rows is the number of points.
	Rows int
	// Points holds Rows points, row-major, Rows×Dim values.
	Points []float64
	// Chain gives the chain each row belongs to.
	Chain []int
	// Vectors holds one vector per row (Rows×Dim) when Need includes
	// NeedHessianVector.
	Vectors []float64
	// Group, when not nil, holds a minibatch group per row: rows with the
	// same group ≥ 0 must be evaluated on the same minibatch (common
	// random numbers), as control variates and curvature probes need;
	// −1 means no constraint.
	Group []int
}

// Answer holds the evaluations for one Request, in its row order.
type Answer struct {
	// Grad holds ∇log π at each point, Rows×Dim values, when the request
	// asked for NeedGradient.
	Grad []float64
	// LogDensity holds log π at each point, Rows values, when the request
	// asked for NeedLogDensity.
	LogDensity []float64
	// Hessian holds the Hessian of log π at each point, Rows×Dim×Dim
	// values, when the request asked for NeedHessian.
	Hessian []float64
	// HessVec holds the Hessian of log π at each point times the row's
	// vector, Rows×Dim values, when the request asked for
	// NeedHessianVector.
	HessVec []float64
}

// NewAnswer returns an Answer with room for gradients and log densities
// of any request of up to rows points in dimension dim. Kernels that ask
// for Hessians document the room they need (see Answer.Reserve).
func NewAnswer(rows, dim int) *Answer {
	return &Answer{Grad: make([]float64, rows*dim), LogDensity: make([]float64, rows)}
}

// Reserve makes room in a for the quantities in need for rows points in
// dimension dim, reusing its slices when large enough.
func (a *Answer) Reserve(need Need, rows, dim int) {
	grow := func(s []float64, n int) []float64 {
		if cap(s) < n {
			return make([]float64, n)
		}
		return s[:n]
	}
	a.Grad = grow(a.Grad, rows*dim)
	a.LogDensity = grow(a.LogDensity, rows)
	if need.Has(NeedHessian) {
		a.Hessian = grow(a.Hessian, rows*dim*dim)
	}
	if need.Has(NeedHessianVector) {
		a.HessVec = grow(a.HessVec, rows*dim)
	}
}

// Kernel is one sampling method over a batch of chains, driven by ask
// (Next) and tell (Tell). A Kernel is not safe for concurrent use.
type Kernel interface {
	// Dim is the dimension of each chain's state.
	Dim() int
	// Chains is the number of chains.
	Chains() int
	// Next returns the request for the current phase. Calling Next again
	// before Tell returns the same request.
	Next() *Request
	// Tell gives the kernel the evaluations for the request last returned
	// by Next. The answer must have the request's shape (the caller
	// validates data from outside; a wrong shape here is a programming
	// error and panics). Tell reports whether the call completed one step
	// of every chain. The answer is not retained.
	Tell(a *Answer) (stepDone bool)
	// Steps is the number of completed steps per chain.
	Steps() int
	// Positions returns the current state of every chain, Chains×Dim
	// values, row-major. The slice belongs to the kernel: read it before
	// the next Tell.
	Positions() []float64
	// EvaluationsPerStep is the number of points evaluated per completed
	// step over all chains. It is exact for kernels whose cost is fixed.
	// For kernels whose cost is random or found by a search it is a
	// ceiling or an estimate, as each kernel documents; those that measure
	// their mean cost implement CostMeter.
	EvaluationsPerStep() int
}

// The interfaces below are optional: a kernel implements those that apply
// to it, and a driver finds them with a type assertion on the interface
// (never on a concrete kernel type), as database/sql does with its
// drivers' optional interfaces.

// Checkpointer is implemented by kernels whose whole state, random stream
// included, can be saved and restored, so that a run resumes bit for bit.
// UnmarshalBinary must reject a state of another kernel, size or version
// with an error, never a panic.
type Checkpointer interface {
	encoding.BinaryMarshaler
	encoding.BinaryUnmarshaler
}

// Stepper is implemented by kernels that have a step size.
type Stepper interface {
	// Step returns the step size of the coming step.
	Step() float64
}

// StepSetter is implemented by kernels whose step size a driver may change
// between steps (a tuning hook: the engine plans the step again once it
// has measured the gradient noise). SetStep panics on a step that is not
// finite and positive; the driver checks first.
type StepSetter interface {
	Stepper
	SetStep(h float64)
}

// CostMeter is implemented by kernels whose cost per step is random and
// measured as they run; their EvaluationsPerStep is only a ceiling or an
// estimate.
type CostMeter interface {
	// MeanEvaluationsPerStep returns the points evaluated per completed
	// step over all chains, averaged over the steps so far.
	MeanEvaluationsPerStep() float64
}

// Faulter is implemented by kernels that can find out, from the answers,
// that an assumption declared when they were built does not hold (the
// rejection kernel's envelope bound). Once Fault returns an error, the
// draws are no longer exact and the driver must stop.
type Faulter interface {
	Fault() error
}

// Report holds what a kernel says of itself beyond its positions; the
// zero value means "nothing to report" except where a field says so.
type Report struct {
	// Adapting is set while the kernel still tunes itself (MALA during
	// burn-in).
	Adapting bool
	// AcceptanceRates holds one acceptance rate per chain (MALA).
	AcceptanceRates []float64
	// AcceptanceRate is the acceptance rate over all chains (rejection);
	// NaN before anything was proposed.
	AcceptanceRate float64
	// Krylov describes the last step's Lanczos iterations (ozaki-krylov).
	Krylov KrylovStats
}

// Reporter is implemented by kernels that have figures of their own to
// report. Report fills the fields that apply and leaves the others alone.
type Reporter interface {
	Report(r *Report)
}

// Preparer is implemented by kernels that can do part of the coming Tell's
// work while the answers are being computed elsewhere (LMC draws its noise).
// A driver may call Prepare once between Next and Tell; the draws must be
// the same whether or not it does, and a state checkpointed after Prepare
// must resume exactly as one checkpointed before it.
type Preparer interface {
	Prepare()
}

// Scorer is implemented by kernels that know ∇log π at their current
// positions once a step completes (MALA keeps it from the accepted point).
// Drivers use it for diagnostics that need scores at the draws; for other
// kernels they pair draws with the gradients asked at them next.
type Scorer interface {
	// Scores returns Chains×Dim values, valid until the next Tell.
	Scores() []float64
}

// NewSource returns the random stream every kernel built from seed uses.
// Fixing this map from seed to stream is what makes a session over any
// transport reproduce an in-process run bit for bit.
func NewSource(seed uint64) *rand.PCG {
	return rand.NewPCG(seed, seed^0x9e3779b97f4a7c15)
}

// Massive is implemented by kernels with a velocity: their inverse mass u
// (a scalar multiplying the metric, when one is set).
type Massive interface {
	InverseMass() float64
}

// Damped is implemented by kernels with a settable friction γ as well.
type Damped interface {
	Massive
	Friction() float64
}
