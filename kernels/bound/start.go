package bound

import "math"

// The start of a TV guarantee. The TV theorem (TVBound) holds for chains
// started from N(θ*, M⁻¹I), θ* the mode, which nobody knows. sluice
// offers it honestly: it first finds a point θ̂ by gradient steps, with a
// certified radius r ≥ ‖θ̂ − θ*‖, starts the chains from N(θ̂, M⁻¹I), and
// adds the shift term ShiftTV(r, M) ≥ TV(N(θ̂, M⁻¹I), N(θ*, M⁻¹I)) to
// the bound (docs/methods.md, section 2.5). The helpers below are that
// rule's arithmetic; the engine runs the search.

// TVShiftShare is the share of a TV target ε the shift term may take: the
// mode search runs until ShiftTV(r, M) ≤ TVShiftShare·ε, and the step and
// iterations are planned by TVRule for (1 − TVShiftShare)·ε, so the sum
// stays within ε. A tenth keeps the planned run close to the rule's own
// (its cost grows like 1/ε²: about 1.23 times the steps) while the
// search's cost grows only like log(1/ε).
const TVShiftShare = 0.1

// ShiftTV returns the total variation distance between N(a, M⁻¹I) and
// N(b, M⁻¹I) for ‖a − b‖ = r, in any dimension (derived here; docs/methods.md,
// section 2.5):
//
//	TV = 2Φ(r√M/2) − 1 = erf(r√M/(2√2)) ≤ r√M/√(2π),
//
// Φ the standard normal distribution function. The distance is increasing
// in r, so for ‖a − b‖ ≤ r it is at most ShiftTV(r, M). It panics on a
// negative or NaN r or a non-positive M (the engine validates them first).
func ShiftTV(r, M float64) float64 {
	if !(r >= 0) || !(M > 0) {
		panic("bound: ShiftTV needs r ≥ 0 and M > 0")
	}
	return math.Erf(r * math.Sqrt(M) / (2 * math.Sqrt2))
}

// ShiftRadius returns the largest r with ShiftTV(r, M) ≤ tv, for tv in
// (0, 1): r = 2√2·erf⁻¹(tv)/√M, less a relative 1e-12 so that rounding
// never lets ShiftTV(ShiftRadius(tv, M), M) exceed tv. It panics outside
// that range.
func ShiftRadius(tv, M float64) float64 {
	if !(tv > 0 && tv < 1) || !(M > 0) || math.IsInf(M, 0) {
		panic("bound: ShiftRadius needs tv in (0, 1) and a finite M > 0")
	}
	return 2 * math.Sqrt2 * math.Erfinv(tv) / math.Sqrt(M) * (1 - 1e-12)
}

// ModeSearchStep is the step of the mode search, 2/(m+M): gradient
// descent on an m-strongly convex, M-smooth f with that step contracts
// the distance to the minimiser θ* by q = (M − m)/(M + m) per iteration,
//
//	‖θ_k − θ*‖ ≤ q^k·‖θ₀ − θ*‖
//
// (Nesterov 2004, Introductory Lectures on Convex Optimization,
// Theorem 2.1.15, from memory; the iteration's linear map on a quadratic
// has exactly that contraction, which the tests check).
func ModeSearchStep(m, M float64) float64 { return 2 / (m + M) }

// ModeSearchIterations returns the number of gradient steps of size
// ModeSearchStep(m, M) after which the certified radius ‖∇f(θ_k)‖/m is at
// most r, starting from a point whose certified radius is r0 = ‖∇f(θ₀)‖/m,
// under m-strong convexity and M-smoothness (0 when r0 ≤ r already):
// ‖θ₀ − θ*‖ ≤ r0 (strong convexity), ‖θ_k − θ*‖ ≤ q^k·r0 (Nesterov 2004,
// Theorem 2.1.15) and ‖∇f(θ_k)‖ ≤ M·‖θ_k − θ*‖ (smoothness), so
// ‖∇f(θ_k)‖/m ≤ κ·q^k·r0, which is ≤ r for
//
//	k ≥ log(κ·r0/r)/log(1/q),   κ = M/m;
//
// with m = M (q = 0) one step lands on θ*. The count is the smallest
// such integer, or −1 when it exceeds 2^31 (or m, M, r0, r are not
// positive and finite with m ≤ M).
func ModeSearchIterations(m, M, r0, r float64) int {
	if !(m > 0) || !(M >= m) || math.IsInf(M, 0) || !(r > 0) || !(r0 >= 0) || math.IsInf(r0, 0) {
		return -1
	}
	if r0 <= r {
		return 0
	}
	q := (M - m) / (M + m)
	if q == 0 {
		return 1
	}
	k := math.Ceil(math.Log(M/m*r0/r) / -math.Log(q))
	if !(k <= math.MaxInt32) {
		return -1
	}
	return max(1, int(k))
}
