package main

import (
	"context"
	"errors"
	"fmt"
	"runtime"
	"strings"
	"testing"
	"time"

	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
)

// sluice version prints the link-time version when set, else "dev" (tests
// run from the module, whose recorded version is "(devel)"), the Go
// version of this very binary, and the main module's path.
func TestVersion(t *testing.T) {
	ctx := context.Background()
	code, stdout, stderr := runCmd(t, ctx, "version")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	lines := strings.Split(stdout, "\n")
	if lines[0] != "sluice dev" {
		t.Errorf("first line %q, want %q", lines[0], "sluice dev")
	}
	if !strings.Contains(stdout, "built with "+runtime.Version()+" for "+runtime.GOOS+"/"+runtime.GOARCH) {
		t.Errorf("no Go version %s in:\n%s", runtime.Version(), stdout)
	}
	buildVersion = "1.2.3-test"
	defer func() { buildVersion = "" }()
	if _, stdout, _ := runCmd(t, ctx, "version"); !strings.HasPrefix(stdout, "sluice 1.2.3-test\n") {
		t.Errorf("with a link-time version: %q", stdout)
	}
	if code, _, _ := runCmd(t, ctx, "version", "extra"); code != 2 {
		t.Errorf("version extra: exit %d, want 2", code)
	}
}

// Each command's -h describes it, gives examples and lists every kernel
// name the engine knows.
func TestHelpDescribesAndListsKernels(t *testing.T) {
	ctx := context.Background()
	for _, cmd := range []string{"serve", "demo", "plan", "version"} {
		code, stdout, stderr := runCmd(t, ctx, cmd, "-h")
		if code != 0 || stdout != "" {
			t.Errorf("%s -h: exit %d, stdout %q", cmd, code, stdout)
		}
		for _, want := range []string{"Usage: sluice " + cmd, "Examples:\n  sluice " + cmd} {
			if !strings.Contains(stderr, want) {
				t.Errorf("%s -h lacks %q:\n%s", cmd, want, stderr)
			}
		}
		if cmd == "version" {
			continue
		}
		// The names appear as a comma-separated list, wrapped at spaces.
		list := strings.Join(strings.Fields(stderr), " ")
		for _, k := range kernelNames() {
			if !strings.Contains(list, " "+k+",") && !strings.Contains(list, " "+k+".") {
				t.Errorf("%s -h does not list kernel %q:\n%s", cmd, k, stderr)
			}
		}
		if !strings.Contains(stderr, "Flags:\n  -") {
			t.Errorf("%s -h lists no flags:\n%s", cmd, stderr)
		}
	}
}

// A server's refusal reads as its message, the code in words and the
// field, without gRPC's "rpc error: code = … desc = …" wrapping; also when
// the status is wrapped in another error.
func TestServerErrorsAreReadable(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	code, _, stderr := runCmd(t, ctx, "demo", "--kernel", "nonsense", "--quiet", "--draws", "10")
	if code != 1 || !strings.Contains(stderr, `unknown kernel "nonsense"`) || !strings.Contains(stderr, "(invalid input; field register.kernel)") ||
		strings.Contains(stderr, "rpc error") || strings.Contains(stderr, "desc =") {
		t.Errorf("demo --kernel nonsense: exit %d, stderr %q", code, stderr)
	}
	code, _, stderr = runCmd(t, ctx, "plan", "--m", "1", "--M", "4", "--dim", "2", "--eps", "0.9", "--metric", "tv")
	if code != 2 || !strings.Contains(stderr, "field eps") || strings.Contains(stderr, "rpc error") {
		t.Errorf("plan --eps 0.9: exit %d, stderr %q", code, stderr)
	}

	st, err := status.New(codes.InvalidArgument, "evaluations.gradients (chain 1, coordinate 1): value NaN is not finite").
		WithDetails(&errdetails.BadRequest{FieldViolations: []*errdetails.BadRequest_FieldViolation{{Field: "evaluations.gradients"}}})
	if err != nil {
		t.Fatal(err)
	}
	want := "evaluations.gradients (chain 1, coordinate 1): value NaN is not finite (invalid input; field evaluations.gradients)"
	for _, e := range []error{st.Err(), fmt.Errorf("session: %w", st.Err())} {
		if got := describeError(e); got != want {
			t.Errorf("describeError(%v) = %q, want %q", e, got, want)
		}
	}
	if got := describeError(status.Error(codes.Unavailable, "connection refused")); got != "connection refused (server unavailable)" {
		t.Errorf("unavailable: %q", got)
	}
	if got := describeError(errors.New("plain")); got != "plain" {
		t.Errorf("plain error: %q", got)
	}
}

// sluice plan without the flags it needs names each missing one; a
// convex TV plan may give --second-moment instead of --m.
func TestPlanNamesMissingFlags(t *testing.T) {
	ctx := context.Background()
	for _, c := range []struct {
		args []string
		want string
	}{
		{nil, "missing --m, --M, --dim, --eps"},
		{[]string{"--m", "1", "--M", "4"}, "missing --dim, --eps"},
		{[]string{"--m", "1", "--dim", "2", "--eps", "0.1", "--metric", "w2"}, "missing --M"},
		{[]string{"--M", "4", "--dim", "2", "--eps", "0.1", "--metric", "w2", "--second-moment", "10"}, "missing --m"},
	} {
		code, _, stderr := runCmd(t, ctx, append([]string{"plan"}, c.args...)...)
		if code != 2 || !strings.Contains(stderr, c.want+" ") {
			t.Errorf("plan %v: exit %d, stderr %q, want %q", c.args, code, stderr, c.want)
		}
	}
	if code, _, stderr := runCmd(t, ctx, "plan", "--M", "4", "--dim", "2", "--eps", "0.1", "--second-moment", "10"); code != 0 {
		t.Errorf("convex TV plan without --m: exit %d: %s", code, stderr)
	}
}

// --interval must be a level in (0, 1); the table shows it as a
// percentage.
func TestDemoIntervalFlag(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	for _, bad := range []string{"0", "1", "-0.5", "90"} {
		if code, _, stderr := runCmd(t, ctx, "demo", "--interval", bad); code != 2 || !strings.Contains(stderr, "--interval") {
			t.Errorf("--interval %s: exit %d, %q", bad, code, stderr)
		}
	}
	code, stdout, stderr := runCmd(t, ctx, "demo", "--seed", "4", "--chains", "2", "--draws", "50", "--burn-in", "50", "--interval", "0.95", "--quiet")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	for _, want := range []string{"mean ± MC error", "spread", "median", "95% interval", "R-hat", "ESS bulk", "ESS tail",
		"(95% interval "} {
		if !strings.Contains(stdout, want) {
			t.Errorf("table lacks %q:\n%s", want, stdout)
		}
	}
	for _, l := range strings.Split(stdout, "\n") {
		if strings.HasPrefix(l, "intercept ") && (!strings.Contains(l, " ± ") || !strings.Contains(l, "[")) {
			t.Errorf("row %q: want mean ± error and [low, high]", l)
		}
	}
	for _, lvl := range []struct {
		v    float64
		want string
	}{{0.9, "90%"}, {0.95, "95%"}, {0.995, "99.5%"}, {0.5, "50%"}} {
		if got := levelPercent(lvl.v); got != lvl.want {
			t.Errorf("levelPercent(%v) = %q, want %q", lvl.v, got, lvl.want)
		}
	}
}
