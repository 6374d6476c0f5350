package session

import (
	"math"
	"os"
	"regexp"
	"slices"
	"strings"
	"testing"

	"sluice/kernels"
)

// registrySpec is a small valid spec for kernel name, on the standard
// normal target of gaussianAnswer.
func registrySpec(t *testing.T, name string) Spec {
	t.Helper()
	e, ok := lookupKernel(name)
	if !ok {
		t.Fatalf("no registry entry for %q", name)
	}
	spec := Spec{Dim: 2, Chains: 3, Kernel: name, Start: []float64{0.3, -0.2}, StartRows: 1, Step: 0.1, Seed: 7, BurnIn: 5}
	if e.noStep {
		spec.Step = 0
	}
	if e.envelope {
		// q = N(0, s²I) in dimension p: π̃/q = (2πs²)^{p/2}·exp(−‖x‖²(1 − 1/s²)/2)
		// ≤ (2πs²)^{p/2} for s ≥ 1 (derived here), so log M = (p/2)·log(2πs²).
		spec.Envelope = &Envelope{Mean: []float64{0, 0}, Scale: 1.5, LogBound: math.Log(2 * math.Pi * 1.5 * 1.5)}
	}
	return spec
}

// gaussianAnswer answers req for the standard normal: log π = −‖x‖²/2,
// ∇log π = −x, ∇²log π = −I (closed forms).
func gaussianAnswer(req *kernels.Request, a *kernels.Answer, dim int) {
	a.Reserve(req.Need, req.Rows, dim)
	for r := range req.Rows {
		x := req.Points[r*dim : (r+1)*dim]
		var sq float64
		for i, v := range x {
			sq += v * v
			a.Grad[r*dim+i] = -v
			if req.Need.Has(kernels.NeedHessian) {
				for j := range dim {
					a.Hessian[r*dim*dim+i*dim+j] = 0
				}
				a.Hessian[r*dim*dim+i*dim+i] = -1
			}
			if req.Need.Has(kernels.NeedHessianVector) {
				a.HessVec[r*dim+i] = -req.Vectors[r*dim+i]
			}
		}
		a.LogDensity[r] = -sq / 2
	}
}

// Every request a registered kernel sends is one its entry declares, with
// no more rows than declared: the shapes registration sizes messages by
// are the shapes that travel. The entry's accounting (a start cost, a
// periodic cost) matches the rows counted for kernels whose cost is fixed,
// and the optional interfaces match what the entry says.
func TestRegistryMatchesKernels(t *testing.T) {
	const steps = 20
	names := KernelNames()
	if len(names) != len(registry) {
		t.Fatalf("KernelNames has %d names, the registry %d entries", len(names), len(registry))
	}
	for _, name := range names {
		t.Run(name, func(t *testing.T) {
			e, _ := lookupKernel(name)
			spec := registrySpec(t, name)
			s, err := New("r", spec, Limits{})
			if err != nil {
				t.Fatal(err)
			}
			k, chains := s.kernel, spec.Chains
			a := &kernels.Answer{}
			rows := 0
			for range 100000 {
				if k.Steps() >= steps {
					break
				}
				req := k.Next()
				i := slices.IndexFunc(e.requests, func(r requestShape) bool { return r.need == req.Need })
				if i < 0 {
					t.Fatalf("request needing %b is not declared (declared: %+v)", req.Need, e.requests)
				}
				if max := e.requests[i].rowsPerChain * chains; req.Rows > max {
					t.Fatalf("request needing %b has %d rows, declared at most %d", req.Need, req.Rows, max)
				}
				gaussianAnswer(req, a, spec.Dim)
				rows += req.Rows
				k.Tell(a)
			}
			if k.Steps() < steps {
				t.Fatalf("%d steps after the loop bound", k.Steps())
			}
			if !e.randomCost {
				want := e.setupRows*chains + steps*k.EvaluationsPerStep()
				if e.periodicRows != nil {
					want += e.periodicRows(&s.spec, steps) * chains
				}
				if rows != want {
					t.Errorf("%d rows for %d steps, the registry accounts for %d", rows, steps, want)
				}
			}
			if _, ok := k.(kernels.CostMeter); ok && !e.randomCost {
				t.Error("kernel measures a random cost, but its entry says the cost is fixed")
			}
			if _, ok := k.(kernels.Faulter); ok != (e.faultField != "") {
				t.Errorf("Faulter %v, but fault field %q", ok, e.faultField)
			}
			if _, ok := k.(kernels.StepSetter); e.guaranteed && !ok {
				t.Error("a kernel under guaranteed bounds must let the engine plan its step again (StepSetter)")
			}
			if _, ok := k.(kernels.Checkpointer); !ok {
				t.Error("kernel is not a Checkpointer")
			}
			if _, ok := k.(kernels.Stepper); ok == e.noStep {
				t.Errorf("Stepper %v, but noStep %v", ok, e.noStep)
			}
		})
	}
}

func TestKernelNamesIsACopy(t *testing.T) {
	n := KernelNames()
	n[0] = "changed"
	if KernelNames()[0] == "changed" {
		t.Fatal("KernelNames shares its slice with the registry")
	}
	seen := map[string]bool{}
	for _, name := range KernelNames() {
		if seen[name] {
			t.Fatalf("kernel %q registered twice", name)
		}
		seen[name] = true
	}
	if !seen[defaultKernel] {
		t.Fatalf("the default kernel %q is not registered", defaultKernel)
	}
}

// A kernel whose entry says it needs exact gradients refuses stochastic
// ones at registration, naming the field; the others accept them.
func TestRegistryExactGradients(t *testing.T) {
	for _, name := range KernelNames() {
		e, _ := lookupKernel(name)
		spec := registrySpec(t, name)
		spec.Noise = Noise{Stochastic: true}
		_, err := New("r", spec, Limits{})
		if e.exactGradients {
			if ae, ok := AsError(err); !ok || ae.Field != "register.noise.kind" {
				t.Errorf("%s: stochastic gradients gave %v, want an error on register.noise.kind", name, err)
			}
		} else if err != nil {
			t.Errorf("%s: stochastic gradients refused: %v", name, err)
		}
	}
}

// An error on one coordinate of an array shared by every chain keeps the
// coordinate in its message.
func TestErrorFormatKeepsCoordinate(t *testing.T) {
	for _, c := range []struct {
		e    *Error
		want string
	}{
		{badValue("register.envelope.mean", -1, 2, "value NaN is not finite"), "register.envelope.mean (coordinate 2): value NaN is not finite"},
		{badValue("evaluations.gradients", 1, 0, "bad"), "evaluations.gradients (chain 1, coordinate 0): bad"},
		{badValue("evaluations.log_densities", 4, -1, "bad"), "evaluations.log_densities (chain 4): bad"},
		{BadField("register.dim", "bad"), "register.dim: bad"},
	} {
		if got := c.e.Error(); got != c.want {
			t.Errorf("got %q, want %q", got, c.want)
		}
	}
}

// A request the registry did not size is refused as too large for the
// client's limit, naming the limit's field, never as the server's fault.
func TestUnsizedRequestIsTooLarge(t *testing.T) {
	k := newAskAll(40, 1) // asks for a 40×40 Hessian with everything else
	s := sessionWith(t, k, 4096)
	var last Frame
	res, err := s.Run(t.Context(), make(chan Message), func(f Frame) error { last = f; return nil })
	if f, ok := last.(*Finished); !ok || f.Reason != Failed || res.Finished.Reason != Failed {
		t.Fatalf("last frame %T %+v, want Finished with reason Failed", last, last)
	}
	e, ok := AsError(err)
	if !ok || e.Kind != TooLarge || e.Field != "register.max_message_bytes" || !strings.Contains(e.Reason, "message limit") {
		t.Fatalf("got %v, want a too-large error on register.max_message_bytes", err)
	}
}

// The user-facing docs list exactly the registered kernels: the README's
// kernel table and the proto's Register.kernel comment, and the README's
// list of kernels that refuse stochastic gradients matches the registry.
func TestDocsListRegisteredKernels(t *testing.T) {
	readme, err := os.ReadFile("../../README.md")
	if err != nil {
		t.Fatal(err)
	}
	proto, err := os.ReadFile("../../proto/sluice/v1/sluice.proto")
	if err != nil {
		t.Fatal(err)
	}
	tableRow := regexp.MustCompile("(?m)^\\s*\\| `([a-z-]+)` \\|")
	var table []string
	// The kernel table is in the section on sessions; other tables (the
	// demo's summary keys) come before it.
	sessions := string(readme)
	if i := strings.Index(sessions, "## What a session gives you"); i >= 0 {
		sessions = sessions[i:]
	}
	for _, m := range tableRow.FindAllStringSubmatch(sessions, -1) {
		table = append(table, m[1])
	}
	if !slices.Equal(table, KernelNames()) {
		t.Errorf("README kernel table lists %v, the registry %v", table, KernelNames())
	}
	comment := string(proto)
	start := strings.Index(comment, "message Register")
	end := strings.Index(comment[start:], "string kernel = ")
	if start < 0 || end < 0 {
		t.Fatal("no Register.kernel field in sluice.proto")
	}
	listed := regexp.MustCompile(`(?m)^\s*//\s+"([a-z-]+)"\s`).FindAllStringSubmatch(comment[start:start+end], -1)
	var names []string
	for _, m := range listed {
		names = append(names, m[1])
	}
	if !slices.Equal(names, KernelNames()) {
		t.Errorf("sluice.proto's Register.kernel comment lists %v, the registry %v", names, KernelNames())
	}
	var exact []string
	for _, e := range registry {
		if e.exactGradients {
			exact = append(exact, "`"+e.name+"`")
		}
	}
	sentence := strings.Join(exact[:len(exact)-1], ", ") + " and " + exact[len(exact)-1] + " refuse stochastic gradients"
	if !strings.Contains(strings.Join(strings.Fields(string(readme)), " "), sentence) {
		t.Errorf("README does not say %q", sentence)
	}
}
