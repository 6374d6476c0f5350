package kernels

// This file gives kernels the small methods that let them satisfy the
// optional interfaces of kernel.go (Reporter, Faulter), so that drivers
// never name a concrete kernel type.

// Report implements Reporter: whether the step is still adapted, and the
// acceptance rate of every chain.
func (k *MALA) Report(r *Report) {
	r.Adapting = k.Adapting()
	r.AcceptanceRates = k.AcceptanceRates()
}

// Report implements Reporter: the Lanczos figures of the last step.
func (k *OzakiKrylov) Report(r *Report) { r.Krylov = k.LastStep() }

// Report implements Reporter: the acceptance rate over all chains.
func (k *Rejection) Report(r *Report) { r.AcceptanceRate = k.AcceptanceRate() }

// Fault implements Faulter: the first proposal seen above the declared
// envelope (a *BoundViolation), or nil.
func (k *Rejection) Fault() error { return k.Violation() }

// Interfaces each kernel is known to satisfy, checked at compile time.
var (
	_ Checkpointer = (*LMC)(nil)
	_ Checkpointer = (*Kinetic)(nil)
	_ Checkpointer = (*Midpoint)(nil)
	_ Checkpointer = (*OverdampedMidpoint)(nil)
	_ Checkpointer = (*MALA)(nil)
	_ Checkpointer = (*Ozaki)(nil)
	_ Checkpointer = (*OzakiKrylov)(nil)
	_ Checkpointer = (*SGLD)(nil)
	_ Checkpointer = (*SGLDCV)(nil)
	_ Checkpointer = (*SVRG)(nil)
	_ Checkpointer = (*HitAndRun)(nil)
	_ Checkpointer = (*Rejection)(nil)
	_ Checkpointer = (*BAOAB)(nil)

	_ StepSetter = (*LMC)(nil)
	_ CostMeter  = (*HitAndRun)(nil)
	_ CostMeter  = (*Rejection)(nil)
	_ Reporter   = (*MALA)(nil)
	_ Reporter   = (*OzakiKrylov)(nil)
	_ Reporter   = (*Rejection)(nil)
	_ Faulter    = (*Rejection)(nil)
)
