package kernels

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas64"
	"gonum.org/v1/gonum/mat"
)

// MaxDenseMetricDim is the largest dimension for which a dense metric is
// built; above it the metric (and the covariance estimate) is diagonal.
//
// Why 1000: a dense metric costs two p×p matrix-vector products per chain
// per step (C·∇log π and L·ξ), about 2p² flops, and 2p² stored values.
// At p = 1000 that is 2·10⁶ flops (about a millisecond) and 16 MB, the
// same order as one gradient of a model with a thousand parameters and
// a few thousand data; beyond it the step's own cost grows quadratically
// while most gradients grow linearly. Estimating p(p+1)/2 covariances
// well also needs many more than p draws, which adaptation windows of
// practical length do not give for larger p. Building the metric costs a
// Cholesky factorisation and a symmetric eigendecomposition, O(p³), once
// per update.
const MaxDenseMetricDim = 1000

// MetricKind says how a Metric is stored.
type MetricKind uint8

const (
	// IdentityMetric is C = I: the kernels' plain steps.
	IdentityMetric MetricKind = iota
	// DiagonalMetric is a positive diagonal C.
	DiagonalMetric
	// DenseMetric is a symmetric positive-definite C with its Cholesky
	// factor, for p ≤ MaxDenseMetricDim.
	DenseMetric
)

// String names the kind.
func (k MetricKind) String() string {
	switch k {
	case IdentityMetric:
		return "identity"
	case DiagonalMetric:
		return "diagonal"
	case DenseMetric:
		return "dense"
	}
	return fmt.Sprintf("MetricKind(%d)", uint8(k))
}

// Metric is a fixed positive-definite preconditioner C = L·Lᵀ (L lower
// triangular) for the Langevin kernels. With it the overdamped step is
//
//	x ← x + h·C·∇log π(x) + √(2h)·L·ξ,   ξ ~ N(0, I_p),
//
// which is the plain step on y = L⁻¹x, whose target π(Ly) has Hessian
// Lᵀ∇²log π L; choosing C near the target's covariance makes that
// Hessian near −I, so one step size suits every direction. Its
// stationary law is the same π as the plain step's (Roberts and Stramer
// 2002 for MALA; derived here for the others by that change of variables).
// A Metric is immutable once built and safe for concurrent reads.
type Metric struct {
	kind MetricKind
	dim  int
	c    []float64 // diagonal: p values; dense: p×p row-major, symmetric
	l    []float64 // diagonal: √c; dense: lower Cholesky factor, p×p row-major
	cond float64
}

// NewIdentityMetric returns C = I in dimension dim.
func NewIdentityMetric(dim int) *Metric {
	if dim < 1 {
		panic(fmt.Sprintf("kernels: identity metric in dimension %d", dim))
	}
	return &Metric{kind: IdentityMetric, dim: dim, cond: 1}
}

// NewDiagonalMetric returns the diagonal metric C = diag(d). Every d[i]
// must be positive and finite.
func NewDiagonalMetric(d []float64) (*Metric, error) {
	if len(d) == 0 {
		return nil, errors.New("kernels: diagonal metric with no values")
	}
	m := &Metric{kind: DiagonalMetric, dim: len(d), c: append([]float64(nil), d...), l: make([]float64, len(d))}
	lo, hi := math.Inf(1), 0.0
	for i, v := range d {
		if !positive(v) {
			return nil, fmt.Errorf("kernels: diagonal metric value %d is %v, want positive and finite", i, v)
		}
		m.l[i] = math.Sqrt(v)
		lo, hi = math.Min(lo, v), math.Max(hi, v)
	}
	m.cond = hi / lo
	return m, nil
}

// NewDenseMetric returns the dense metric C given row-major as dim×dim
// values. C must be symmetric (to 1e-12 relative to its largest entry; it
// is then symmetrised), positive definite with a finite condition number
// and dim ≤ MaxDenseMetricDim.
func NewDenseMetric(dim int, c []float64) (*Metric, error) {
	switch {
	case dim < 1 || len(c) != dim*dim:
		return nil, fmt.Errorf("kernels: dense metric of %d values for dimension %d", len(c), dim)
	case dim > MaxDenseMetricDim:
		return nil, fmt.Errorf("kernels: dense metric in dimension %d, above the limit %d", dim, MaxDenseMetricDim)
	}
	var big float64
	for _, v := range c {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return nil, errors.New("kernels: dense metric with a non-finite value")
		}
		big = math.Max(big, math.Abs(v))
	}
	sym := mat.NewSymDense(dim, nil)
	for i := range dim {
		for j := i; j < dim; j++ {
			a, b := c[i*dim+j], c[j*dim+i]
			if math.Abs(a-b) > 1e-12*big {
				return nil, fmt.Errorf("kernels: dense metric not symmetric at (%d, %d)", i, j)
			}
			sym.SetSym(i, j, (a+b)/2)
		}
	}
	var ch mat.Cholesky
	if !ch.Factorize(sym) {
		return nil, errors.New("kernels: dense metric not positive definite")
	}
	var eig mat.EigenSym
	if !eig.Factorize(sym, false) {
		return nil, errors.New("kernels: dense metric eigendecomposition failed")
	}
	ev := eig.Values(nil)
	if !(ev[0] > 0) {
		return nil, errors.New("kernels: dense metric not positive definite")
	}
	m := &Metric{kind: DenseMetric, dim: dim, c: make([]float64, dim*dim), l: make([]float64, dim*dim), cond: ev[dim-1] / ev[0]}
	if math.IsInf(m.cond, 0) {
		return nil, errors.New("kernels: dense metric with an infinite condition number")
	}
	var lt mat.TriDense
	ch.LTo(&lt)
	for i := range dim {
		for j := range dim {
			m.c[i*dim+j] = sym.At(i, j)
			if j <= i {
				m.l[i*dim+j] = lt.At(i, j)
			}
		}
	}
	return m, nil
}

// Kind says how the metric is stored.
func (m *Metric) Kind() MetricKind { return m.kind }

// Dim is the dimension p.
func (m *Metric) Dim() int { return m.dim }

// Condition returns the condition number of C, the ratio of its largest
// to its smallest eigenvalue (1 for the identity).
func (m *Metric) Condition() float64 { return m.cond }

// Matrix returns a new dim×dim row-major copy of C.
func (m *Metric) Matrix() []float64 {
	p := m.dim
	out := make([]float64, p*p)
	switch m.kind {
	case IdentityMetric:
		for i := range p {
			out[i*p+i] = 1
		}
	case DiagonalMetric:
		for i, v := range m.c {
			out[i*p+i] = v
		}
	default:
		copy(out, m.c)
	}
	return out
}

// Apply sets dst = C·v. dst and v have Dim values and must not overlap
// (unless C is the identity or diagonal). It allocates nothing.
func (m *Metric) Apply(dst, v []float64) {
	m.check(dst, v)
	switch m.kind {
	case IdentityMetric:
		copy(dst, v)
	case DiagonalMetric:
		for i, c := range m.c {
			dst[i] = c * v[i]
		}
	default:
		p := m.dim
		// C is stored whole, so a general product reads contiguous rows.
		blas64.Gemv(blas.NoTrans, 1, blas64.General{Rows: p, Cols: p, Stride: p, Data: m.c},
			blas64.Vector{N: p, Inc: 1, Data: v}, 0, blas64.Vector{N: p, Inc: 1, Data: dst})
	}
}

// ApplyFactor sets dst = L·xi, so that L·ξ ~ N(0, C) for ξ ~ N(0, I). dst
// may be xi. It allocates nothing.
func (m *Metric) ApplyFactor(dst, xi []float64) {
	m.check(dst, xi)
	switch m.kind {
	case IdentityMetric:
		copy(dst, xi)
	case DiagonalMetric:
		for i, l := range m.l {
			dst[i] = l * xi[i]
		}
	default:
		copy(dst, xi)
		p := m.dim
		blas64.Trmv(blas.NoTrans, blas64.Triangular{N: p, Stride: p, Data: m.l, Uplo: blas.Lower, Diag: blas.NonUnit},
			blas64.Vector{N: p, Inc: 1, Data: dst})
	}
}

// ApplyFactorT sets dst = Lᵀ·v: a score ∇log π(x) mapped to the
// coordinates y = L⁻¹x, where it is Lᵀ∇log π(Ly). dst may be v. It
// allocates nothing.
func (m *Metric) ApplyFactorT(dst, v []float64) {
	m.check(dst, v)
	switch m.kind {
	case IdentityMetric:
		copy(dst, v)
	case DiagonalMetric:
		for i, l := range m.l {
			dst[i] = l * v[i]
		}
	default:
		copy(dst, v)
		p := m.dim
		blas64.Trmv(blas.Trans, blas64.Triangular{N: p, Stride: p, Data: m.l, Uplo: blas.Lower, Diag: blas.NonUnit},
			blas64.Vector{N: p, Inc: 1, Data: dst})
	}
}

// SolveFactor sets dst = L⁻¹·v (so ‖L⁻¹v‖² = vᵀC⁻¹v). dst may be v. It
// allocates nothing.
func (m *Metric) SolveFactor(dst, v []float64) {
	m.check(dst, v)
	switch m.kind {
	case IdentityMetric:
		copy(dst, v)
	case DiagonalMetric:
		for i, l := range m.l {
			dst[i] = v[i] / l
		}
	default:
		copy(dst, v)
		p := m.dim
		blas64.Trsv(blas.NoTrans, blas64.Triangular{N: p, Stride: p, Data: m.l, Uplo: blas.Lower, Diag: blas.NonUnit},
			blas64.Vector{N: p, Inc: 1, Data: dst})
	}
}

func (m *Metric) check(dst, v []float64) {
	if len(dst) != m.dim || len(v) != m.dim {
		panic(fmt.Sprintf("kernels: metric of dimension %d applied to %d values into %d", m.dim, len(v), len(dst)))
	}
}

// identity reports whether m is nil or the identity.
func (m *Metric) identity() bool { return m == nil || m.kind == IdentityMetric }

// move sets x += h·C·g + s·L·z for one chain (p values each), with tmp
// (at least 2p values) as scratch. Callers keep their own loop for the
// identity, so that the plain step's arithmetic is unchanged.
func (m *Metric) move(x, g, z []float64, h, s float64, tmp []float64) {
	p := m.dim
	if m.kind == DiagonalMetric {
		for i, c := range m.c {
			x[i] += h*(c*g[i]) + s*(m.l[i]*z[i])
		}
		return
	}
	cg, lz := tmp[:p], tmp[p:2*p]
	m.Apply(cg, g)
	m.ApplyFactor(lz, z)
	for i := range x {
		x[i] += h*cg[i] + s*lz[i]
	}
}

// MetricUser is implemented by the kernels that accept a preconditioner
// (lmc, kinetic, baoab, midpoint, midpoint-overdamped, mala, sgld, sgld-cv
// and svrg). SetMetric takes effect at the next step: the single-request
// kernels use it from the next Tell; the midpoint kernels, given it
// between the two requests of a step, finish that step with the old one;
// MALA keeps the old one for the proposals already out (and their
// acceptance ratio) and uses the new one from the next proposal. A nil
// metric means the identity, whose draws are bit for bit those of the
// kernel without a metric. The metric is part of the kernel's
// checkpointed state. A driver that changes the metric should re-choose
// the step size after it (the step suited to the old geometry is not the
// one suited to the new). SetMetric panics if the metric's dimension is
// not the kernel's.
type MetricUser interface {
	SetMetric(m *Metric)
	// Metric returns the metric in use (the identity if none was set).
	Metric() *Metric
}

// checkMetric returns m, or nil for the identity, after checking its
// dimension against dim.
func checkMetric(kind string, m *Metric, dim int) *Metric {
	if m == nil {
		return nil
	}
	if m.dim != dim {
		panic(fmt.Sprintf("kernels: %s of dimension %d given a metric of dimension %d", kind, dim, m.dim))
	}
	if m.kind == IdentityMetric {
		return nil
	}
	return m
}

// orIdentity returns m, or the identity in dimension dim when m is nil.
func orIdentity(m *Metric, dim int) *Metric {
	if m == nil {
		return NewIdentityMetric(dim)
	}
	return m
}

// writeMetric adds a metric to a state record as the fields name.kind
// and name.c (nothing for the identity).
func writeMetric(w *stateWriter, name string, m *Metric) {
	if m.identity() {
		return
	}
	w.ints(name+".kind", int(m.kind))
	w.floats(name+".c", m.c...)
}

// readMetric reads the metric name of a state record in dimension dim: nil
// (the identity) when the record has none. The factor is recomputed from
// C by the same arithmetic, so it is bit for bit the one saved.
func readMetric(r *stateRecord, name string, dim int) *Metric {
	if r.err != nil || !r.has(name+".kind") {
		return nil
	}
	var m *Metric
	var err error
	switch kind := MetricKind(r.integer(name + ".kind")); kind {
	case DiagonalMetric:
		c := r.floats(name+".c", dim)
		if c == nil {
			return nil
		}
		m, err = NewDiagonalMetric(c)
	case DenseMetric:
		if dim > MaxDenseMetricDim {
			r.fail("dense metric in dimension %d", dim)
			return nil
		}
		c := r.floats(name+".c", dim*dim)
		if c == nil {
			return nil
		}
		m, err = NewDenseMetric(dim, c)
	default:
		r.fail("metric kind %d", kind)
		return nil
	}
	if err != nil {
		r.fail("%v", err)
		return nil
	}
	return m
}

// Covariance pools draws from every chain into a running mean and
// covariance (Welford's update, one draw at a time), from which Shrunk
// builds a metric. Reset starts a new adaptation window. Up to
// MaxDenseMetricDim it keeps the full co-moment matrix and the sums the
// shrinkage needs; above it only the variances. It is not safe for
// concurrent use.
type Covariance struct {
	dim   int
	dense bool
	n     int
	mean  []float64
	m2    []float64 // dense: Σ(x−x̄)(x−x̄)ᵀ, p×p; diagonal: its diagonal
	// Sums of the shifted draws y = x − shift (shift = the window's first
	// draw), for Σ‖x − x̄‖⁴ in the shrinkage intensity: Σ‖y‖², Σ‖y‖⁴
	// and Σ‖y‖²·y.
	shift        []float64
	sumA, sumA2  float64
	sumAY, delta []float64
}

// NewCovariance returns an empty accumulator for draws of dimension dim.
func NewCovariance(dim int) *Covariance {
	if dim < 1 {
		panic(fmt.Sprintf("kernels: covariance in dimension %d", dim))
	}
	a := &Covariance{dim: dim, dense: dim <= MaxDenseMetricDim, mean: make([]float64, dim), delta: make([]float64, dim)}
	if a.dense {
		a.m2 = make([]float64, dim*dim)
		a.shift, a.sumAY = make([]float64, dim), make([]float64, dim)
	} else {
		a.m2 = make([]float64, dim)
	}
	return a
}

// Dim is the dimension of the draws.
func (a *Covariance) Dim() int { return a.dim }

// Count is the number of draws added since the last Reset.
func (a *Covariance) Count() int { return a.n }

// Reset forgets every draw.
func (a *Covariance) Reset() {
	a.n, a.sumA, a.sumA2 = 0, 0, 0
	clear(a.mean)
	clear(a.m2)
	clear(a.sumAY)
}

// Add pools the draws in rows (a multiple of Dim values, one draw per
// row, for example every chain's Positions after a step). It allocates
// nothing and panics on a length that is not a multiple of Dim.
func (a *Covariance) Add(rows []float64) {
	p := a.dim
	if len(rows)%p != 0 {
		panic(fmt.Sprintf("kernels: covariance of dimension %d given %d values", p, len(rows)))
	}
	for r := 0; r < len(rows); r += p {
		a.add(rows[r : r+p])
	}
}

func (a *Covariance) add(x []float64) {
	p := a.dim
	if a.n == 0 && a.dense {
		copy(a.shift, x)
	}
	a.n++
	inv := 1 / float64(a.n)
	d := a.delta
	for i, v := range x {
		d[i] = v - a.mean[i] // δ = x − x̄_{n−1}
		a.mean[i] += d[i] * inv
	}
	if !a.dense {
		for i, v := range x {
			a.m2[i] += d[i] * (v - a.mean[i])
		}
		return
	}
	// M2 += δ·(x − x̄_n)ᵀ, which is symmetric: (x − x̄_n) = (1 − 1/n)δ.
	for i := range p {
		di := d[i]
		row := a.m2[i*p : (i+1)*p]
		for j, v := range x {
			row[j] += di * (v - a.mean[j])
		}
	}
	var sq float64
	for i, v := range x {
		y := v - a.shift[i]
		sq += y * y
	}
	a.sumA += sq
	a.sumA2 += sq * sq
	for i, v := range x {
		a.sumAY[i] += sq * (v - a.shift[i])
	}
}

// Mean returns a new copy of the pooled mean.
func (a *Covariance) Mean() []float64 { return append([]float64(nil), a.mean...) }

// Matrix returns the pooled sample covariance S = (1/n)·Σ(x − x̄)(x − x̄)ᵀ
// (divisor n, as the shrinkage uses), dim×dim row-major up to
// MaxDenseMetricDim and only its diagonal (dim values) above. It panics
// with no draws.
func (a *Covariance) Matrix() []float64 {
	if a.n == 0 {
		panic("kernels: covariance of no draws")
	}
	out := make([]float64, len(a.m2))
	n, p := float64(a.n), a.dim
	if !a.dense {
		for i, v := range a.m2 {
			out[i] = v / n
		}
		return out
	}
	for i := range p {
		for j := range p {
			out[i*p+j] = (a.m2[i*p+j] + a.m2[j*p+i]) / 2 / n // symmetric up to rounding
		}
	}
	return out
}

// Shrunk returns the regularised covariance estimate as a metric, and the
// shrinkage intensity λ used.
//
// Up to MaxDenseMetricDim it is the Ledoit–Wolf (2004) estimate that
// shrinks the sample covariance S toward the scaled identity μI,
//
//	Σ̂ = λ·μ·I + (1 − λ)·S,   λ = min(b̄², d²)/d²,
//
// with the norm ‖A‖² = tr(AAᵀ)/p and, over the n pooled draws x_k
// centred at their mean,
//
//	μ   = tr(S)/p
//	d²  = ‖S − μI‖²
//	b̄²  = (1/n²)·Σ_k ‖x_k x_kᵀ − S‖² = (1/(n²p))·(Σ_k ‖x_k‖⁴ − n·tr(S²))
//
// (Ledoit and Wolf, J. Multivariate Analysis 88 (2004), Lemmas 3.2–3.4 and
// Theorem 3.1, with the sample mean in place of the known zero mean). λ
// tends to 0 when n ≫ p and S is far from a multiple of I, and to 1
// when n is small next to p; λ = 1 when S is already μI. Σ‖x_k‖⁴ comes
// from sums of the draws shifted by the window's first draw (derived here:
// with y = x − shift, a = ‖y‖², d = ȳ, Σ‖x − x̄‖⁴ = Σa² + 4dᵀM₂d + n‖d‖⁴
// − 4dᵀΣ(a·y) + 2‖d‖²Σa, M₂ the co-moment matrix).
//
// Above MaxDenseMetricDim it is the diagonal metric of the pooled
// variances, unshrunk (λ = 0): each variance comes from all n draws.
//
// It fails with fewer than two draws, or when the draws do not spread
// (μ = 0, or a zero variance in the diagonal case).
func (a *Covariance) Shrunk() (*Metric, float64, error) {
	if a.n < 2 {
		return nil, 0, fmt.Errorf("kernels: shrinkage from %d draws, want at least 2", a.n)
	}
	s := a.Matrix()
	p, n := a.dim, float64(a.n)
	if !a.dense {
		m, err := NewDiagonalMetric(s)
		return m, 0, err
	}
	var tr, trS2 float64
	for i := range p {
		tr += s[i*p+i]
	}
	for _, v := range s {
		trS2 += v * v
	}
	mu := tr / float64(p)
	if !(mu > 0) {
		return nil, 0, errors.New("kernels: shrinkage of draws that do not spread")
	}
	d2 := (trS2 - 2*mu*tr + mu*mu*float64(p)) / float64(p) // ‖S − μI‖²
	// Σ‖x_k − x̄‖⁴ from the shifted sums.
	dv := a.delta
	var c, dMd, dAY float64
	for i := range p {
		dv[i] = a.mean[i] - a.shift[i]
		c += dv[i] * dv[i]
		dAY += dv[i] * a.sumAY[i]
	}
	for i := range p {
		var r float64
		for j := range p {
			r += a.m2[i*p+j] * dv[j]
		}
		dMd += dv[i] * r
	}
	fourth := a.sumA2 + 4*dMd + n*c*c - 4*dAY + 2*c*a.sumA
	b2 := math.Max(0, (fourth-n*trS2)/(n*n*float64(p)))
	lambda := 1.0
	if d2 > 0 {
		lambda = math.Min(b2, d2) / d2
	}
	out := make([]float64, p*p)
	for i, v := range s {
		out[i] = (1 - lambda) * v
	}
	for i := range p {
		out[i*p+i] += lambda * mu
	}
	m, err := NewDenseMetric(p, out)
	return m, lambda, err
}

// precond is a kernel's metric (nil: the identity) with the scratch its
// steps need.
type precond struct {
	metric *Metric
	tmp    []float64
}

// set checks m for a kernel of the given kind and dimension and keeps
// scratch of n values.
func (pc *precond) set(kind string, m *Metric, dim, n int) {
	pc.metric = checkMetric(kind, m, dim)
	if pc.metric != nil && len(pc.tmp) < n {
		pc.tmp = make([]float64, n)
	}
}

// MarshalBinary implements encoding.BinaryMarshaler: the dimension, the
// kind and C (the factor is recomputed on reading).
func (m *Metric) MarshalBinary() ([]byte, error) {
	w := newStateWriter("Metric")
	w.ints("dim", m.dim)
	w.ints("kind", int(m.kind))
	if !m.identity() {
		w.floats("c", m.c...)
	}
	return w.bytes()
}

// UnmarshalMetric reads a metric written by Metric.MarshalBinary. The
// factor is recomputed from C by the same arithmetic, so the metric is bit
// for bit the one saved; a corrupt record is an error, never a panic.
func UnmarshalMetric(b []byte) (*Metric, error) {
	r, err := readState(b, "Metric")
	if err != nil {
		return nil, err
	}
	dim, kind := r.integer("dim"), MetricKind(r.integer("kind"))
	if err := r.check(dim >= 1, "dimension"); err != nil {
		return nil, err
	}
	switch kind {
	case IdentityMetric:
		return NewIdentityMetric(dim), nil
	case DiagonalMetric:
		c := r.floats("c", dim)
		if r.err != nil {
			return nil, r.err
		}
		return NewDiagonalMetric(c)
	case DenseMetric:
		if err := r.check(dim <= MaxDenseMetricDim, "dense metric dimension"); err != nil {
			return nil, err
		}
		c := r.floats("c", dim*dim)
		if r.err != nil {
			return nil, r.err
		}
		return NewDenseMetric(dim, c)
	}
	return nil, r.check(false, fmt.Sprintf("metric kind %d", kind))
}

// MarshalBinary implements encoding.BinaryMarshaler: the dimension and
// every running sum, so that an accumulator restored mid-window goes on
// bit for bit as the one that never stopped.
func (a *Covariance) MarshalBinary() ([]byte, error) {
	w := newStateWriter("Covariance")
	w.ints("dim", a.dim)
	w.ints("n", a.n)
	w.floats("mean", a.mean...)
	w.floats("m2", a.m2...)
	if a.dense {
		w.floats("shift", a.shift...)
		w.floats("sums", a.sumA, a.sumA2)
		w.floats("sumAY", a.sumAY...)
	}
	return w.bytes()
}

// UnmarshalBinary implements encoding.BinaryUnmarshaler. It restores the
// whole state, dimension included; a corrupt record is an error.
func (a *Covariance) UnmarshalBinary(b []byte) error {
	r, err := readState(b, "Covariance")
	if err != nil {
		return err
	}
	dim, n := r.integer("dim"), r.integer("n")
	// The sums hold dim values (dim² up to MaxDenseMetricDim): a
	// dimension the record cannot hold is refused before allocating.
	fits := dim >= 1 && dim <= r.size/8 && (dim > MaxDenseMetricDim || dim*dim <= r.size/8)
	if err := r.check(fits && n >= 0, "dimension or count"); err != nil {
		return err
	}
	c := NewCovariance(dim)
	r.fill("mean", c.mean)
	r.fill("m2", c.m2)
	if c.dense {
		r.fill("shift", c.shift)
		if s := r.floats("sums", 2); s != nil {
			c.sumA, c.sumA2 = s[0], s[1]
		}
		r.fill("sumAY", c.sumAY)
	}
	if r.err != nil {
		return r.err
	}
	c.n = n
	*a = *c
	return nil
}
