package session

import (
	"fmt"
	"math"
	"time"
)

// Spec is a session as the client asked for it. Zero values are documented
// per field; New validates everything.
type Spec struct {
	Dim, Chains int
	// Kernel names the method; "" means "lmc".
	Kernel string
	// Start holds StartRows×Dim values; StartRows is 1 (shared by every
	// chain) or Chains.
	Start     []float64
	StartRows int
	// Step is the step size h > 0.
	Step float64
	// BurnIn steps per chain are discarded; then every KeepEvery-th step
	// is kept (0 means 1).
	BurnIn, KeepEvery int64
	// DrawsPerChain ends the session once every chain has that many kept
	// draws; 0 means no limit.
	DrawsPerChain int64
	// MaxEvaluations caps evaluated points; 0 means no limit.
	MaxEvaluations int64
	// MaxTime caps wall time; 0 means no limit (Limits.MaxTime may still
	// apply).
	MaxTime time.Duration
	// ProgressEverySteps, when > 0, sends Progress every that many steps;
	// otherwise ProgressInterval sets the cadence (0 means
	// Limits.ProgressInterval).
	ProgressEverySteps int64
	ProgressInterval   time.Duration
	// Seed of the random stream; 0 means the server picks one.
	Seed uint64
	// Names of the Dim parameters; empty means theta[0], theta[1], ...
	Names []string
	// MaxMessageBytes is the client's receive limit; 0 means 4 MiB.
	MaxMessageBytes int64
}

// Limits are the server's caps, applied to every session. Zero values mean
// the defaults given per field.
type Limits struct {
	// MaxDim caps Spec.Dim (default 1<<20).
	MaxDim int
	// MaxChains caps Spec.Chains (default 1<<16).
	MaxChains int
	// MaxValues caps Dim×Chains, the size of the state (default 1<<26,
	// 512 MiB of positions).
	MaxValues int
	// MaxMessageBytes is the server's own message limit (default 4 MiB);
	// the session uses the smaller of it and the client's.
	MaxMessageBytes int64
	// MaxTime caps every session's wall time (default: none).
	MaxTime time.Duration
	// AnswerTimeout is how long the server waits for the answer to one
	// Points frame before it fails the session (default 10 minutes).
	AnswerTimeout time.Duration
	// ProgressInterval is the default Progress cadence (default 1 s).
	ProgressInterval time.Duration
	// FollowBuffer is how many of its latest draws (rows) each session
	// keeps for followers, capped at 64 MiB of values per session; 0 means
	// followers are not served.
	FollowBuffer int
}

const maxFollowBytes = 64 << 20

const defaultMessageBytes = 4 << 20

func (l Limits) withDefaults() Limits {
	if l.MaxDim <= 0 {
		l.MaxDim = 1 << 20
	}
	if l.MaxChains <= 0 {
		l.MaxChains = 1 << 16
	}
	if l.MaxValues <= 0 {
		l.MaxValues = 1 << 26
	}
	if l.MaxMessageBytes <= 0 {
		l.MaxMessageBytes = defaultMessageBytes
	}
	if l.AnswerTimeout <= 0 {
		l.AnswerTimeout = 10 * time.Minute
	}
	if l.ProgressInterval <= 0 {
		l.ProgressInterval = time.Second
	}
	return l
}

// Kernels lists the kernel names a Spec may ask for.
var Kernels = []string{"lmc"}

func (s *Spec) validate(l Limits) error {
	bad := func(field, format string, args ...any) error { return BadField("register."+field, format, args...) }
	switch {
	case s.Dim < 1:
		return bad("dim", "must be at least 1, got %d", s.Dim)
	case s.Dim > l.MaxDim:
		return &Error{Kind: TooLarge, Field: "register.dim", Chain: -1, Coord: -1, Reason: fmt.Sprintf("%d exceeds the server's limit of %d", s.Dim, l.MaxDim)}
	case s.Chains < 1:
		return bad("chains", "must be at least 1, got %d", s.Chains)
	case s.Chains > l.MaxChains:
		return &Error{Kind: TooLarge, Field: "register.chains", Chain: -1, Coord: -1, Reason: fmt.Sprintf("%d exceeds the server's limit of %d", s.Chains, l.MaxChains)}
	case s.Dim*s.Chains > l.MaxValues:
		return &Error{Kind: TooLarge, Field: "register.chains", Chain: -1, Coord: -1, Reason: fmt.Sprintf("chains × dim = %d exceeds the server's limit of %d values", s.Dim*s.Chains, l.MaxValues)}
	}
	if s.Kernel == "" {
		s.Kernel = "lmc"
	}
	known := false
	for _, k := range Kernels {
		known = known || k == s.Kernel
	}
	if !known {
		return bad("kernel", "unknown kernel %q (known: %v)", s.Kernel, Kernels)
	}
	if s.StartRows != 1 && s.StartRows != s.Chains {
		return bad("start_rows", "must be 1 or chains (%d), got %d", s.Chains, s.StartRows)
	}
	if len(s.Start) != s.StartRows*s.Dim {
		return bad("start", "has %d values, want start_rows × dim = %d", len(s.Start), s.StartRows*s.Dim)
	}
	for i, v := range s.Start {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			chain := i / s.Dim
			if s.StartRows == 1 {
				chain = -1
			}
			return badValue("register.start", chain, i%s.Dim, "value %v is not finite", v)
		}
	}
	if !(s.Step > 0) || math.IsInf(s.Step, 0) {
		return bad("step", "must be a finite number > 0, got %v", s.Step)
	}
	for _, f := range []struct {
		name string
		v    int64
	}{{"burn_in", s.BurnIn}, {"keep_every", s.KeepEvery}, {"draws_per_chain", s.DrawsPerChain},
		{"max_evaluations", s.MaxEvaluations}, {"progress_every_steps", s.ProgressEverySteps}, {"max_message_bytes", s.MaxMessageBytes}} {
		if f.v < 0 {
			return bad(f.name, "must be >= 0, got %d", f.v)
		}
	}
	if s.MaxTime < 0 {
		return bad("max_seconds", "must be >= 0, got %v", s.MaxTime.Seconds())
	}
	if s.ProgressInterval < 0 {
		return bad("progress_interval_seconds", "must be >= 0, got %v", s.ProgressInterval.Seconds())
	}
	if s.KeepEvery == 0 {
		s.KeepEvery = 1
	}
	if len(s.Names) != 0 && len(s.Names) != s.Dim {
		return bad("names", "has %d names, want 0 or dim = %d", len(s.Names), s.Dim)
	}
	seen := make(map[string]bool, len(s.Names))
	for i, n := range s.Names {
		if n == "" {
			return bad("names", "name %d is empty", i)
		}
		if seen[n] {
			return bad("names", "name %q appears twice", n)
		}
		seen[n] = true
	}
	if len(s.Names) == 0 {
		s.Names = make([]string, s.Dim)
		for i := range s.Names {
			s.Names[i] = fmt.Sprintf("theta[%d]", i)
		}
	}
	return nil
}

// ParseSeconds converts a wire duration in seconds to a time.Duration,
// rejecting negative, NaN, infinite and absurdly long values.
func ParseSeconds(field string, sec float64) (time.Duration, error) {
	if math.IsNaN(sec) || sec < 0 || sec > 1e9 {
		return 0, BadField(field, "must be between 0 and 1e9 seconds, got %v", sec)
	}
	return time.Duration(sec * float64(time.Second)), nil
}
