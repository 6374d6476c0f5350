package bound

import (
	"errors"
	"math"
	"regexp"
	"strings"
	"testing"
)

// TestPlanTVVector: a TV plan for the worked example of Dalalyan's (2017) rule (m = 1, M = 4,
// p = 2, ε = 0.1) has its step and iterations, and the cost is K
// evaluations per chain (LMC asks one gradient per chain per step).
func TestPlanTVVector(t *testing.T) {
	p, err := NewPlan(Spec{
		Setting: Setting{Convexity: 1, Smoothness: 4, Dim: 2, Source: Declared},
		Metric:  TV, Eps: 0.1, Chains: 4, Rate: 1e5,
	})
	if err != nil {
		t.Fatal(err)
	}
	if !relClose(p.Step, 5.215753135864595e-05, 1e-12) || !relClose(p.Horizon, 5.991464547107983, 1e-12) || p.Iterations != 114873 {
		t.Errorf("plan h = %.17g, T = %.17g, K = %d; reference 5.215753135864595e-05, 5.991464547107983, 114873",
			p.Step, p.Horizon, p.Iterations)
	}
	if p.EvaluationsPerChain != 114873 || p.Evaluations != 4*114873 || p.Chains != 4 {
		t.Errorf("evaluations %d per chain, %d in all over %d chains", p.EvaluationsPerChain, p.Evaluations, p.Chains)
	}
	if !relClose(p.Seconds, 4*114873/1e5, 1e-15) {
		t.Errorf("wall time %v s, want %v", p.Seconds, 4*114873/1e5)
	}
	if p.Final.Steps != p.Iterations || !(p.Final.Total <= 0.1) || p.Final.Source != Declared || p.Source != Declared || !p.Recalled {
		t.Errorf("final bound %+v, source %v, recalled %v", p.Final, p.Source, p.Recalled)
	}
	if got := p.Bound(1000); got.Steps != 1000 || !(got.Total > p.Final.Total) {
		t.Errorf("bound after 1000 steps %+v, final %v", got, p.Final.Total)
	}
	wantAssumptions(t, p, "Dalalyan (2017)", "recalled from the paper, checked by sluice only on Gaussian targets",
		"N(θ*, I/M)", "exact gradients", "h ≤ 1/M", "(declared)", "one gradient per chain per step")
}

// TestPlanConvexVector: m = 0 gives the composed rule derived here
// (λ = 0.01, h = 6.485863342871117e-08, K ≈ 1.848e10), the penalty bias
// ε/2 in the final bound, and no wall time without a rate.
func TestPlanConvexVector(t *testing.T) {
	p, err := NewPlan(Spec{Setting: Setting{Smoothness: 4, Dim: 2, SecondMoment: 10}, Metric: TV, Eps: 0.1})
	if err != nil {
		t.Fatal(err)
	}
	if !relClose(p.Penalty, 0.01, 1e-15) || !relClose(p.Step, 6.485863342871117e-08, 1e-12) ||
		math.Abs(float64(p.Iterations)/1.848e10-1) > 0.0005/1.848 {
		t.Errorf("λ = %v, h = %v, K = %d", p.Penalty, p.Step, p.Iterations)
	}
	if !relClose(p.Final.Bias, 0.05, 1e-15) || !(p.Final.Total <= 0.1*(1+1e-12)) || p.Seconds != 0 || p.Chains != 1 {
		t.Errorf("final %+v, seconds %v, chains %d", p.Final, p.Seconds, p.Chains)
	}
	if p.Source != Estimated || p.Final.Source != Estimated {
		t.Errorf("source %v, want the zero value Estimated", p.Source)
	}
	wantAssumptions(t, p, "derived for sluice", "Dalalyan (2017)", "recalled from the paper", "π_λ", "(estimated)")
}

// TestPlanW2Vector: a W2 plan for the W2 rule's worked example (ε = 0.5 from
// θ*) has h = 7.174012855831038e-04, K = 2416 and final bound 0.499751.
func TestPlanW2Vector(t *testing.T) {
	p, err := NewPlan(Spec{Setting: Setting{Convexity: 1, Smoothness: 4, Dim: 2, Source: Declared}, Metric: W2, Eps: 0.5, Rate: 2416})
	if err != nil {
		t.Fatal(err)
	}
	if !relClose(p.Step, 7.174012855831038e-04, 1e-12) || p.Iterations != 2416 || !roundsTo(p.Final.Total, 0.499751, 5e-7) || p.Seconds != 1 {
		t.Errorf("plan %+v", p)
	}
	wantAssumptions(t, p, "Dalalyan and Karagulyan (2019)", "recalled from the paper", "derived for sluice", "θ*", "exact gradients", "2/(m+M)")

	noisy, err := NewPlan(Spec{Setting: Setting{Convexity: 1, Smoothness: 4, Dim: 2, Bias: 0.1, Noise: 2, StartDistance: 3}, Metric: W2, Eps: 1})
	if err != nil {
		t.Fatal(err)
	}
	if !(noisy.Final.Noise > 0) || !(noisy.Final.Bias > 0) || !(noisy.Final.Total <= 1*(1+1e-12)) {
		t.Errorf("noisy final bound %+v", noisy.Final)
	}
	wantAssumptions(t, noisy, "δ = 0.1", "σ = 2", "W0 = 3", "inaccurate gradients")
}

// internalTag matches a bracketed upper-case status tag or a section sign.
var internalTag = regexp.MustCompile(`\[[A-Z]{3}|\x{00a7}`)

func wantAssumptions(t *testing.T, p Plan, subs ...string) {
	t.Helper()
	all := strings.Join(p.Assumptions, "\n")
	// Users read these: sources in words, no bracketed status tags and no
	// section signs (U+00A7) pointing at documents they do not have.
	if internalTag.MatchString(all) {
		t.Errorf("assumptions carry a bracketed tag or a section sign:\n%s", all)
	}
	for _, s := range subs {
		if !strings.Contains(all, s) {
			t.Errorf("assumptions do not mention %q:\n%s", s, all)
		}
	}
}

// TestPlanErrors: invalid inputs from users are errors naming the input,
// never panics.
func TestPlanErrors(t *testing.T) {
	good := Setting{Convexity: 1, Smoothness: 4, Dim: 2}
	with := func(f func(*Setting)) Setting { s := good; f(&s); return s }
	nan, inf := math.NaN(), math.Inf(1)
	for _, c := range []struct {
		name  string
		spec  Spec
		input string
	}{
		{"m above M", Spec{Setting: with(func(s *Setting) { s.Convexity = 5 }), Metric: TV, Eps: 0.1}, "m"},
		{"m negative", Spec{Setting: with(func(s *Setting) { s.Convexity = -1 }), Metric: TV, Eps: 0.1}, "m"},
		{"m NaN", Spec{Setting: with(func(s *Setting) { s.Convexity = nan }), Metric: W2, Eps: 0.1}, "m"},
		{"M zero", Spec{Setting: with(func(s *Setting) { s.Smoothness = 0 }), Metric: TV, Eps: 0.1}, "M"},
		{"M Inf", Spec{Setting: with(func(s *Setting) { s.Smoothness = inf }), Metric: W2, Eps: 0.1}, "M"},
		{"p zero", Spec{Setting: with(func(s *Setting) { s.Dim = 0 }), Metric: TV, Eps: 0.1}, "p"},
		{"p negative", Spec{Setting: with(func(s *Setting) { s.Dim = -2 }), Metric: W2, Eps: 0.1}, "p"},
		{"TV eps 1/2", Spec{Setting: good, Metric: TV, Eps: 0.5}, "eps"},
		{"TV eps 0", Spec{Setting: good, Metric: TV, Eps: 0}, "eps"},
		{"TV eps NaN", Spec{Setting: good, Metric: TV, Eps: nan}, "eps"},
		{"TV eps too small", Spec{Setting: good, Metric: TV, Eps: 1e-9}, "eps"},
		{"W2 eps negative", Spec{Setting: good, Metric: W2, Eps: -0.1}, "eps"},
		{"W2 eps Inf", Spec{Setting: good, Metric: W2, Eps: inf}, "eps"},
		{"metric unset", Spec{Setting: good, Eps: 0.1}, "metric"},
		{"metric unknown", Spec{Setting: good, Metric: 7, Eps: 0.1}, "metric"},
		{"chains negative", Spec{Setting: good, Metric: TV, Eps: 0.1, Chains: -1}, "chains"},
		{"evaluations beyond 2^53", Spec{Setting: good, Metric: TV, Eps: 0.1, Chains: 1 << 40}, "eps"},
		{"rate negative", Spec{Setting: good, Metric: TV, Eps: 0.1, Rate: -1}, "rate"},
		{"rate NaN", Spec{Setting: good, Metric: TV, Eps: 0.1, Rate: nan}, "rate"},
		{"TV with noise", Spec{Setting: with(func(s *Setting) { s.Noise = 1 }), Metric: TV, Eps: 0.1}, "sigma"},
		{"TV with bias", Spec{Setting: with(func(s *Setting) { s.Bias = 1 }), Metric: TV, Eps: 0.1}, "delta"},
		{"TV with w0", Spec{Setting: with(func(s *Setting) { s.StartDistance = 1 }), Metric: TV, Eps: 0.1}, "w0"},
		{"TV convex without mu2", Spec{Setting: with(func(s *Setting) { s.Convexity = 0 }), Metric: TV, Eps: 0.1}, "mu2"},
		{"mu2 NaN", Spec{Setting: with(func(s *Setting) { s.Convexity, s.SecondMoment = 0, nan }), Metric: TV, Eps: 0.1}, "mu2"},
		{"W2 convex", Spec{Setting: with(func(s *Setting) { s.Convexity = 0 }), Metric: W2, Eps: 0.1}, "m"},
		{"W2 bias too large", Spec{Setting: with(func(s *Setting) { s.Bias = 1 }), Metric: W2, Eps: 0.1}, "delta"},
		{"W2 sigma Inf", Spec{Setting: with(func(s *Setting) { s.Noise = inf }), Metric: W2, Eps: 0.1}, "sigma"},
		{"W2 w0 negative", Spec{Setting: with(func(s *Setting) { s.StartDistance = -1 }), Metric: W2, Eps: 0.1}, "w0"},
	} {
		_, err := NewPlan(c.spec)
		checkInputErr(t, c.name, err, c.input)
	}
}

// TestSourceAndMetricStrings: the labels shown beside every plan and bound
// (the wording the README and the wire API documentation use) and the
// metric names.
func TestSourceAndMetricStrings(t *testing.T) {
	for _, c := range []struct{ got, want string }{
		{Declared.String(), "guaranteed under the declared assumptions"},
		{Estimated.String(), "estimated, not guaranteed"},
		{Source(9).String(), "Source(9)"},
		{TV.String(), "TV"},
		{W2.String(), "W2"},
		{Metric(0).String(), "Metric(0)"},
	} {
		if c.got != c.want {
			t.Errorf("%q, want %q", c.got, c.want)
		}
	}
	var zero Setting
	if zero.Source != Estimated {
		t.Error("the zero Source must not claim a guarantee")
	}
	b, err := W2Bound(Setting{Convexity: 1, Smoothness: 4, Dim: 2, Source: Declared}, 0.1, 5)
	if err != nil || b.Source != Declared {
		t.Errorf("W2Bound source %v, %v", b.Source, err)
	}
}

// FuzzNewPlan: any input gives either an *InputError or a plan with a
// positive step inside the theorem's range and a final bound ≤ ε (to
// rounding); never a panic.
func FuzzNewPlan(f *testing.F) {
	f.Add(1.0, 4.0, 2, 0.1, 1, 0.0, 0.0, 0.0, 0.0, 1, 0.0)
	f.Add(0.0, 4.0, 2, 0.1, 1, 0.0, 0.0, 0.0, 10.0, 1, 0.0)
	f.Add(1.0, 4.0, 2, 0.5, 2, 0.0, 0.0, 0.0, 0.0, 8, 1e6)
	f.Add(1.0, 4.0, 2, 1.0, 2, 0.1, 2.0, 3.0, 0.0, 0, 0.0)
	f.Add(5.0, 4.0, 2, 0.1, 1, 0.0, 0.0, 0.0, 0.0, 1, 0.0)
	f.Add(1e-300, 1e300, 1, 0.49, 1, 0.0, 0.0, 0.0, 0.0, 1, 0.0)
	// Found by fuzzing: K ≈ 4e9 steps of 1 − mh, mh ≈ 2e-9 (see contraction).
	f.Add(0.3333333333333333, 48.0, 2, 0.05555555555555555, 2, 0.0, 13.0, 174.0, 120.0, 8, 1e6)
	f.Fuzz(func(t *testing.T, m, M float64, p int, eps float64, metric int, delta, sigma, w0, mu2 float64, chains int, rate float64) {
		spec := Spec{
			Setting: Setting{Convexity: m, Smoothness: M, Dim: p, Bias: delta, Noise: sigma, StartDistance: w0, SecondMoment: mu2},
			Metric:  Metric(metric), Eps: eps, Chains: chains, Rate: rate,
		}
		pl, err := NewPlan(spec)
		if err != nil {
			var ie *InputError
			if !errors.As(err, &ie) {
				t.Fatalf("%+v: error %v is not an *InputError", spec, err)
			}
			return
		}
		limit := 1 / (M + pl.Penalty)
		if pl.Metric == W2 {
			limit = 2 / (m + M)
		}
		if !(pl.Step > 0) || !(pl.Step <= limit) || pl.Iterations < 0 || !finite(pl.Final.Total) {
			t.Fatalf("%+v: plan %+v", spec, pl)
		}
		if !(pl.Final.Total <= eps*(1+1e-9)) {
			t.Fatalf("%+v: final bound %v above ε", spec, pl.Final.Total)
		}
	})
}

func BenchmarkNewPlan(b *testing.B) {
	b.ReportAllocs()
	spec := Spec{Setting: Setting{Convexity: 1, Smoothness: 4, Dim: 2, Noise: 1}, Metric: W2, Eps: 0.5}
	for b.Loop() {
		if _, err := NewPlan(spec); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkW2Bound(b *testing.B) {
	b.ReportAllocs()
	s := Setting{Convexity: 1, Smoothness: 4, Dim: 100, Bias: 0.01, Noise: 1}
	for i := 0; b.Loop(); i++ {
		if _, err := W2Bound(s, 1e-3, i); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkTVBound(b *testing.B) {
	b.ReportAllocs()
	s := Setting{Convexity: 1, Smoothness: 4, Dim: 100}
	for i := 0; b.Loop(); i++ {
		if _, err := TVBound(s, 0, 1e-3, i); err != nil {
			b.Fatal(err)
		}
	}
}
