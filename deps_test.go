package sluice_test

// This file keeps the import arrows of DEVELOPERS.md ("Import rules") true,
// and checks that every package says in its doc comment what
// it owns. It asks the go command about the packages that exist, so it keeps
// working as packages are added.

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"go/ast"
	"go/parser"
	"go/token"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"slices"
	"strings"
	"testing"
)

// module is the module path: import paths equal to it or under it are the
// project's own packages.
const module = "sluice"

// A layerRule says what the packages matching pkgs may import. Patterns
// follow the go command: "a/b" is that package only, "a/b/..." is a/b and
// every package below it, and "..." is everything.
//
// The allow lists govern a package's own imports (not its tests'): every
// project import must match allowProject, every other non-standard import
// must match allowExternal. forbid governs everything the package is built
// from, however it gets there. forbidDirect governs the package's own
// imports, tests included.
type layerRule struct {
	pkgs          string
	allowProject  []string
	allowExternal []string
	forbid        []string
	forbidDirect  []string
}

// kernelForbid is what nothing under kernels may be built from: the layers
// above it, and the transport.
var kernelForbid = []string{
	"sluice/server/...", "sluice/client/...", "sluice/proto/...", "sluice/cmd/...",
	"google.golang.org/grpc/...", "google.golang.org/protobuf/...", "go.uber.org/zap/...",
}

// layerRules encodes the layering of DEVELOPERS.md, "Import rules":
//
//	cmd/sluice ───────────────▶ server, client, kernels/...
//	server (gRPC adapter) ────▶ server/session, proto, kernels/..., internal/wire, internal/codec   (grpc, zap)
//	server/session (engine) ──▶ kernels, kernels/diag, kernels/bound, internal/wire (no grpc, no proto, no zap)
//	server/store ─────────────▶ std, bbolt, pgx                                  (no grpc, no proto, no zap)
//	kernels/diag, kernels/bound, kernels/targets ─▶ std, gonum
//	kernels ──────────────────▶ std, gonum
//	client ───────────────────▶ proto, internal/wire, internal/codec, client/history (grpc; never server or kernels)
//	internal/wire ────────────▶ std                                 (the wire's array layout and frame sizing)
//	internal/codec ───────────▶ internal/wire                       (grpc, protobuf: the hot frames' codec)
//	deploy ───────────────────▶ nothing of ours                         (Kubernetes API types, yaml)
//	client/history ───────────▶ std                                 (the progress history file)
//	internal/report ──────────▶ client/history, kernels/diag             (gonum, gonum/plot)
//	internal/benchkit ────────▶ server, server/session, client, proto, kernels/..., internal/codec, internal/wire
//
// and the rule that nothing imports grpc's internal packages (they may change
// without notice).
// The proto package is the wire API alone: it imports no other package of
// ours. cmd/sluice is the top and may import any of them.
var layerRules = []layerRule{
	{
		// kernels, kernels/targets, kernels/diag, kernels/bound
		pkgs:          "sluice/kernels/...",
		allowExternal: []string{"gonum.org/v1/gonum/..."},
		forbid:        kernelForbid,
	},
	{
		// shared by client, adapter and engine: the standard library only
		pkgs:   "sluice/internal/wire",
		forbid: []string{"..."},
	},
	{
		// The codec of the hot frames, shared by client and adapter: gRPC
		// and protobuf, the wire's array layout, no message of ours.
		pkgs:          "sluice/internal/codec",
		allowProject:  []string{"sluice/internal/wire"},
		allowExternal: []string{"google.golang.org/grpc/...", "google.golang.org/protobuf/..."},
		forbid:        []string{"sluice/proto/...", "sluice/server/...", "sluice/client/...", "sluice/kernels/...", "sluice/cmd/..."},
	},
	{
		pkgs:          "sluice/server/session/...",
		allowProject:  []string{"sluice/server/session/...", "sluice/kernels/...", "sluice/internal/wire"},
		allowExternal: []string{"..."},
		forbid: []string{
			"google.golang.org/grpc/...", "google.golang.org/protobuf/...", "go.uber.org/zap/...",
			"sluice/proto/...", "sluice/server", "sluice/client/...", "sluice/cmd/...",
		},
	},
	{
		// The checkpoint store: the standard library and its two
		// databases' drivers, nothing of the transport.
		pkgs:          "sluice/server/store/...",
		allowProject:  []string{"sluice/server/store/..."},
		allowExternal: []string{"go.etcd.io/bbolt/...", "github.com/jackc/pgx/v5/..."},
		forbid: []string{
			"google.golang.org/grpc/...", "google.golang.org/protobuf/...", "go.uber.org/zap/...",
			"sluice/proto/...", "sluice/server", "sluice/server/session/...", "sluice/client/...", "sluice/cmd/...",
		},
	},
	{
		pkgs:          "sluice/server",
		allowProject:  []string{"sluice/server/...", "sluice/proto/...", "sluice/kernels/...", "sluice/internal/wire", "sluice/internal/codec"},
		allowExternal: []string{"..."},
		forbid:        []string{"sluice/client/...", "sluice/cmd/..."},
	},
	{
		pkgs:          "sluice/client/...",
		allowProject:  []string{"sluice/client/...", "sluice/proto/...", "sluice/internal/wire", "sluice/internal/codec"},
		allowExternal: []string{"..."},
		forbid:        []string{"sluice/server/...", "sluice/kernels/...", "sluice/cmd/..."},
	},
	{
		// Deployment manifests; only their tests have code.
		pkgs:          "sluice/deploy/...",
		allowExternal: []string{"k8s.io/api/...", "k8s.io/apimachinery/...", "sigs.k8s.io/yaml/..."},
	},
	{
		// The measurements shared by `sluice bench` and the benchmarks:
		// they drive a real server with a real client, so they may import
		// both, but never the command.
		pkgs:          "sluice/internal/benchkit",
		allowProject:  []string{"sluice/server/...", "sluice/client/...", "sluice/proto/...", "sluice/kernels/...", "sluice/internal/codec", "sluice/internal/wire"},
		allowExternal: []string{"..."},
		forbid:        []string{"sluice/cmd/..."},
	},
	{
		pkgs:          "sluice/proto/...",
		allowProject:  []string{"sluice/proto/..."},
		allowExternal: []string{"..."},
		forbid:        []string{"sluice/server/...", "sluice/client/...", "sluice/kernels/...", "sluice/cmd/..."},
	},
	{
		// The progress history file: the standard library only, so any
		// program may write or read it, the client and the report alike.
		pkgs:   "sluice/client/history",
		forbid: []string{"..."},
	},
	{
		// Pictures and the page of a run: std, gonum, gonum/plot, the
		// measured accuracy of kernels/diag and the history file
		// (client/history, the client's one definition of it); never the
		// client itself, the transport or the engine.
		pkgs:          "sluice/internal/report",
		allowProject:  []string{"sluice/client/history", "sluice/kernels/diag"},
		allowExternal: []string{"gonum.org/v1/gonum/...", "gonum.org/v1/plot/..."},
		forbid: []string{
			"sluice/server/...", "sluice/client", "sluice/proto/...", "sluice/cmd/...",
			"google.golang.org/grpc/...", "google.golang.org/protobuf/...", "go.uber.org/zap/...",
		},
	},
	{
		pkgs:          "...",
		allowProject:  []string{"..."},
		allowExternal: []string{"..."},
		forbidDirect:  []string{"google.golang.org/grpc/internal/..."},
	},
}

// matchPattern reports whether the import path matches the pattern (see
// layerRule).
func matchPattern(pattern, path string) bool {
	if pattern == "..." {
		return true
	}
	if base, ok := strings.CutSuffix(pattern, "/..."); ok {
		return path == base || strings.HasPrefix(path, base+"/")
	}
	return path == pattern
}

func matchAny(patterns []string, path string) bool {
	return slices.ContainsFunc(patterns, func(p string) bool { return matchPattern(p, path) })
}

func isProject(path string) bool {
	return path == module || strings.HasPrefix(path, module+"/")
}

// depGraph maps every non-standard package to its non-standard imports.
type depGraph map[string][]string

// paths returns, for every package pkg is built from (pkg excluded), one
// shortest import path from pkg to it, pkg first.
func (g depGraph) paths(pkg string) map[string][]string {
	path := map[string][]string{pkg: {pkg}}
	queue := []string{pkg}
	for len(queue) > 0 {
		p := queue[0]
		queue = queue[1:]
		for _, q := range g[p] {
			if _, seen := path[q]; !seen {
				path[q] = append(slices.Clip(path[p]), q)
				queue = append(queue, q)
			}
		}
	}
	delete(path, pkg)
	return path
}

// layerViolations returns, sorted, every way in which pkg breaks the rules
// that apply to it. g holds the non-standard dependency graph of pkg, and
// testImports the imports of its tests (standard ones may be left in: no
// rule names a standard package). Of the forbidden packages pkg is built
// from, only the first on each import path is reported, not everything
// behind it.
func layerViolations(rules []layerRule, pkg string, g depGraph, testImports []string) []string {
	var bad []string
	paths := g.paths(pkg)
	for _, r := range rules {
		if !matchPattern(r.pkgs, pkg) {
			continue
		}
		for _, imp := range g[pkg] {
			switch {
			case isProject(imp) && !matchAny(r.allowProject, imp):
				bad = append(bad, fmt.Sprintf("%s imports %s: %s may import only %v of this module", pkg, imp, r.pkgs, r.allowProject))
			case !isProject(imp) && !matchAny(r.allowExternal, imp):
				bad = append(bad, fmt.Sprintf("%s imports %s: %s may import only the standard library and %v", pkg, imp, r.pkgs, r.allowExternal))
			}
		}
		for dep, path := range paths {
			forbidden := func(p string) bool { return matchAny(r.forbid, p) }
			if forbidden(dep) && !slices.ContainsFunc(path[1:len(path)-1], forbidden) {
				bad = append(bad, fmt.Sprintf("%s is built from %s (%s): %s may not be built from %v", pkg, dep, strings.Join(path, " → "), r.pkgs, r.forbid))
			}
		}
		for _, imp := range slices.Concat(g[pkg], testImports) {
			if matchAny(r.forbidDirect, imp) {
				bad = append(bad, fmt.Sprintf("%s (or its tests) imports %s: %s may not import %v", pkg, imp, r.pkgs, r.forbidDirect))
			}
		}
	}
	slices.Sort(bad)
	return slices.Compact(bad)
}

// goCommand returns the go command of the toolchain running the test, or
// the one on PATH.
func goCommand(t *testing.T) string {
	t.Helper()
	//lint:ignore SA1019 the toolchain that built this test is the one to ask; PATH is the fallback.
	if goroot := runtime.GOROOT(); goroot != "" {
		exe := filepath.Join(goroot, "bin", "go")
		if runtime.GOOS == "windows" {
			exe += ".exe"
		}
		if _, err := os.Stat(exe); err == nil {
			return exe
		}
	}
	exe, err := exec.LookPath("go")
	if err != nil {
		t.Fatalf("no go command (neither GOROOT/bin/go nor go on PATH): %v", err)
	}
	return exe
}

func goList(t *testing.T, args ...string) []byte {
	t.Helper()
	cmd := exec.Command(goCommand(t), append([]string{"list"}, args...)...)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	out, err := cmd.Output()
	if err != nil {
		t.Fatalf("go list %s: %v\n%s", strings.Join(args, " "), err, stderr.Bytes())
	}
	return out
}

// listedPackage holds the fields of `go list -json` used here.
type listedPackage struct {
	ImportPath   string
	Name         string
	Dir          string
	Doc          string
	GoFiles      []string
	CgoFiles     []string
	TestImports  []string
	XTestImports []string
}

// projectPackages lists every package of the module (`go list ./...`).
func projectPackages(t *testing.T) []listedPackage {
	t.Helper()
	dec := json.NewDecoder(bytes.NewReader(goList(t, "-json", "./...")))
	var pkgs []listedPackage
	for {
		var p listedPackage
		err := dec.Decode(&p)
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatalf("decoding go list -json: %v", err)
		}
		pkgs = append(pkgs, p)
	}
	if len(pkgs) == 0 {
		t.Fatal("go list ./... found no packages")
	}
	return pkgs
}

// dependencyGraph returns the non-standard dependency graph of the given
// packages. `go list -deps` names every package they are built from; the
// template prints only the non-standard ones, each with its imports, so any
// import not printed is a standard package and is dropped.
func dependencyGraph(t *testing.T, pkgs []string) depGraph {
	t.Helper()
	const tmpl = `{{if not .Standard}}{{.ImportPath}}{{range .Imports}} {{.}}{{end}}{{end}}`
	out := goList(t, append([]string{"-deps", "-f", tmpl}, pkgs...)...)
	g := depGraph{}
	for line := range strings.Lines(string(out)) {
		if f := strings.Fields(line); len(f) > 0 {
			g[f[0]] = f[1:]
		}
	}
	for p, imps := range g {
		g[p] = slices.DeleteFunc(imps, func(imp string) bool { _, ok := g[imp]; return !ok })
	}
	return g
}

func TestDepsFollowDesign(t *testing.T) {
	pkgs := projectPackages(t)
	var built []string
	for _, p := range pkgs {
		if len(p.GoFiles)+len(p.CgoFiles) > 0 {
			built = append(built, p.ImportPath)
		}
	}
	g := dependencyGraph(t, built)
	for _, p := range pkgs {
		if _, ok := g[p.ImportPath]; !ok && slices.Contains(built, p.ImportPath) {
			t.Errorf("go list -deps did not report %s", p.ImportPath)
		}
		tests := slices.Concat(p.TestImports, p.XTestImports)
		for _, v := range layerViolations(layerRules, p.ImportPath, g, tests) {
			t.Error(v)
		}
	}
}

func TestDepsRuleMatching(t *testing.T) {
	for _, c := range []struct {
		pattern, path string
		want          bool
	}{
		{"...", "anything/at/all", true},
		{"sluice/server", "sluice/server", true},
		{"sluice/server", "sluice/server/session", false},
		{"sluice/server/...", "sluice/server", true},
		{"sluice/server/...", "sluice/server/session", true},
		{"sluice/server/...", "sluice/serverless", false},
		{"google.golang.org/grpc/...", "google.golang.org/grpc", true},
		{"google.golang.org/grpc/...", "google.golang.org/grpc/internal/transport", true},
		{"google.golang.org/grpc/...", "google.golang.org/grpcx", false},
	} {
		if got := matchPattern(c.pattern, c.path); got != c.want {
			t.Errorf("matchPattern(%q, %q) = %v, want %v", c.pattern, c.path, got, c.want)
		}
	}

	// A fake dependency graph: each entry is a package and its non-standard
	// imports, as dependencyGraph builds it.
	gonum := []string{"gonum.org/v1/gonum/mat"}
	base := depGraph{
		"gonum.org/v1/gonum/mat":                    {"golang.org/x/tools/container/intsets"},
		"golang.org/x/tools/container/intsets":      nil,
		"google.golang.org/grpc":                    {"google.golang.org/grpc/internal/transport", "google.golang.org/protobuf/proto"},
		"google.golang.org/grpc/internal/transport": nil,
		"google.golang.org/protobuf/proto":          nil,
		"go.uber.org/zap":                           nil,
		"github.com/some/other":                     nil,
		"sluice/kernels":                            gonum,
		"sluice/kernels/diag":                       gonum,
		"sluice/kernels/targets":                    gonum,
		"sluice/proto/sluice/v1":                    {"google.golang.org/grpc", "google.golang.org/protobuf/proto"},
		"sluice/server/session":                     {"sluice/kernels", "sluice/kernels/diag"},
		"sluice/server/store":                       {"go.etcd.io/bbolt"},
		"go.etcd.io/bbolt":                          nil,
		"sluice/server":                             {"sluice/server/session", "sluice/proto/sluice/v1", "google.golang.org/grpc", "go.uber.org/zap"},
		"sluice/client":                             {"sluice/proto/sluice/v1", "sluice/internal/wire", "google.golang.org/grpc"},
		"sluice/internal/wire":                      nil,
		"sluice/internal/benchkit":                  {"sluice/server", "sluice/client", "sluice/kernels", "sluice/kernels/targets"},
		"sluice/cmd/sluice":                         {"sluice/server", "sluice/client", "sluice/kernels", "sluice/kernels/targets", "sluice/internal/benchkit"},
	}
	with := func(pkg string, imports ...string) depGraph {
		g := depGraph{}
		for p, imps := range base {
			g[p] = imps
		}
		g[pkg] = imports
		return g
	}

	for _, c := range []struct {
		name        string
		pkg         string
		g           depGraph
		testImports []string
		want        []string // substrings, one per expected violation
	}{
		{name: "layout as designed, kernels", pkg: "sluice/kernels", g: base},
		{name: "layout as designed, targets", pkg: "sluice/kernels/targets", g: base},
		{name: "layout as designed, session", pkg: "sluice/server/session", g: base},
		{name: "layout as designed, server", pkg: "sluice/server", g: base},
		{name: "layout as designed, store", pkg: "sluice/server/store", g: base},
		{
			name: "store imports grpc", pkg: "sluice/server/store", g: with("sluice/server/store", "go.etcd.io/bbolt", "google.golang.org/grpc"),
			want: []string{
				"sluice/server/store imports google.golang.org/grpc",
				"sluice/server/store is built from google.golang.org/grpc",
			},
		},
		{
			name: "store imports the engine", pkg: "sluice/server/store", g: with("sluice/server/store", "sluice/server/session"),
			want: []string{
				"sluice/server/store imports sluice/server/session",
				"sluice/server/store is built from sluice/server/session",
			},
		},
		{name: "layout as designed, client", pkg: "sluice/client", g: base},
		{name: "layout as designed, proto", pkg: "sluice/proto/sluice/v1", g: base},
		{name: "layout as designed, cmd", pkg: "sluice/cmd/sluice", g: base},
		{name: "layout as designed, wire", pkg: "sluice/internal/wire", g: base},
		{
			name: "wire imports gonum", pkg: "sluice/internal/wire", g: with("sluice/internal/wire", "gonum.org/v1/gonum/mat"),
			want: []string{
				"sluice/internal/wire imports gonum.org/v1/gonum/mat",
				"sluice/internal/wire is built from gonum.org/v1/gonum/mat",
			},
		},
		{
			name: "kernels imports wire", pkg: "sluice/kernels", g: with("sluice/kernels", "sluice/internal/wire"),
			want: []string{"sluice/kernels imports sluice/internal/wire"},
		},
		{name: "layout as designed, benchkit", pkg: "sluice/internal/benchkit", g: base},
		{name: "std only", pkg: "sluice/kernels/diag", g: with("sluice/kernels/diag")},
		{name: "session tests may use targets", pkg: "sluice/server/session", g: base, testImports: []string{"sluice/kernels/targets"}},
		{
			name: "kernels imports grpc", pkg: "sluice/kernels", g: with("sluice/kernels", "google.golang.org/grpc"),
			want: []string{
				"sluice/kernels imports google.golang.org/grpc",
				"sluice/kernels is built from google.golang.org/grpc (sluice/kernels → google.golang.org/grpc)",
			},
		},
		{
			name: "kernels imports another module", pkg: "sluice/kernels/targets", g: with("sluice/kernels/targets", "github.com/some/other"),
			want: []string{"sluice/kernels/targets imports github.com/some/other"},
		},
		{
			name: "diag imports kernels", pkg: "sluice/kernels/diag", g: with("sluice/kernels/diag", "sluice/kernels"),
			want: []string{"sluice/kernels/diag imports sluice/kernels:"},
		},
		{
			name: "diag imports the session", pkg: "sluice/kernels/diag", g: with("sluice/kernels/diag", "sluice/server/session"),
			want: []string{
				"sluice/kernels/diag imports sluice/server/session",
				"sluice/kernels/diag is built from sluice/server/session",
			},
		},
		{
			name: "session imports proto", pkg: "sluice/server/session", g: with("sluice/server/session", "sluice/kernels", "sluice/proto/sluice/v1"),
			want: []string{
				"sluice/server/session imports sluice/proto/sluice/v1",
				"sluice/server/session is built from sluice/proto/sluice/v1",
			},
		},
		{
			name: "session imports zap", pkg: "sluice/server/session", g: with("sluice/server/session", "sluice/kernels", "go.uber.org/zap"),
			want: []string{"sluice/server/session is built from go.uber.org/zap"},
		},
		{
			name: "session imports the adapter", pkg: "sluice/server/session", g: with("sluice/server/session", "sluice/server"),
			want: []string{
				"sluice/server/session imports sluice/server:",
				"sluice/server/session is built from sluice/server (",
			},
		},
		{
			name: "grpc reached through a kernel", pkg: "sluice/server/session",
			g:    with("sluice/kernels", "google.golang.org/protobuf/proto"),
			want: []string{"sluice/server/session is built from google.golang.org/protobuf/proto (sluice/server/session → sluice/kernels → google.golang.org/protobuf/proto)"},
		},
		{
			name: "client imports the session", pkg: "sluice/client", g: with("sluice/client", "sluice/proto/sluice/v1", "sluice/server/session"),
			want: []string{
				"sluice/client imports sluice/server/session",
				"sluice/client is built from sluice/server/session",
			},
		},
		{
			name: "client imports targets", pkg: "sluice/client", g: with("sluice/client", "sluice/proto/sluice/v1", "sluice/kernels/targets"),
			want: []string{
				"sluice/client imports sluice/kernels/targets",
				"sluice/client is built from sluice/kernels/targets",
			},
		},
		{
			name: "server imports the client", pkg: "sluice/server", g: with("sluice/server", "sluice/server/session", "sluice/client"),
			want: []string{
				"sluice/server imports sluice/client",
				"sluice/server is built from sluice/client",
			},
		},
		{
			name: "proto imports kernels", pkg: "sluice/proto/sluice/v1", g: with("sluice/proto/sluice/v1", "sluice/kernels"),
			want: []string{
				"sluice/proto/sluice/v1 imports sluice/kernels",
				"sluice/proto/sluice/v1 is built from sluice/kernels",
			},
		},
		{name: "layout as designed, report", pkg: "sluice/internal/report", g: with("sluice/internal/report", "sluice/client/history", "sluice/kernels/diag", "gonum.org/v1/gonum/mat")},
		{
			name: "history imports gonum", pkg: "sluice/client/history", g: with("sluice/client/history", "gonum.org/v1/gonum/mat"),
			want: []string{
				"sluice/client/history imports gonum.org/v1/gonum/mat",
				"sluice/client/history is built from gonum.org/v1/gonum/mat",
			},
		},
		{
			// The client may import client/...; the history file may not
			// (the client imports it).
			name: "history imports the client", pkg: "sluice/client/history", g: with("sluice/client/history", "sluice/client"),
			want: []string{
				"sluice/client/history imports sluice/client",
				"sluice/client/history is built from sluice/client",
			},
		},
		{
			name: "report imports the client", pkg: "sluice/internal/report", g: with("sluice/internal/report", "sluice/client"),
			want: []string{
				"sluice/internal/report imports sluice/client",
				"sluice/internal/report is built from sluice/client",
			},
		},
		{
			name: "benchkit imports the command", pkg: "sluice/internal/benchkit", g: with("sluice/internal/benchkit", "sluice/server", "sluice/cmd/sluice"),
			want: []string{
				"sluice/internal/benchkit imports sluice/cmd/sluice",
				"sluice/internal/benchkit is built from sluice/cmd/sluice",
			},
		},
		{
			name: "server imports benchkit", pkg: "sluice/server", g: with("sluice/server", "sluice/server/session", "sluice/internal/benchkit"),
			want: []string{
				"sluice/server imports sluice/internal/benchkit",
				"sluice/server is built from sluice/client",
			},
		},
		{
			name: "grpc internal imported", pkg: "sluice/server", g: with("sluice/server", "google.golang.org/grpc/internal/transport"),
			want: []string{"sluice/server (or its tests) imports google.golang.org/grpc/internal/transport"},
		},
		{
			name: "grpc internal imported by a test", pkg: "sluice/cmd/sluice", g: base, testImports: []string{"google.golang.org/grpc/internal/transport"},
			want: []string{"sluice/cmd/sluice (or its tests) imports google.golang.org/grpc/internal/transport"},
		},
	} {
		t.Run(c.name, func(t *testing.T) {
			got := layerViolations(layerRules, c.pkg, c.g, c.testImports)
			if len(got) != len(c.want) {
				t.Fatalf("got %d violations, want %d:\n%s", len(got), len(c.want), strings.Join(got, "\n"))
			}
			for i, w := range c.want {
				if !strings.Contains(got[i], w) {
					t.Errorf("violation %d = %q, want it to contain %q", i, got[i], w)
				}
			}
		})
	}
}

// TestPackageDocs checks that every package with Go files, main packages
// included, has a doc comment (each package says what
// it owns). Packages made only of generated files, and the test-only root,
// are left out.
func TestPackageDocs(t *testing.T) {
	for _, p := range projectPackages(t) {
		files := slices.Concat(p.GoFiles, p.CgoFiles)
		if len(files) == 0 {
			continue
		}
		generated := true
		for _, name := range files {
			f, err := parser.ParseFile(token.NewFileSet(), filepath.Join(p.Dir, name), nil, parser.ParseComments|parser.PackageClauseOnly)
			if err != nil {
				t.Fatal(err)
			}
			if !ast.IsGenerated(f) {
				generated = false
				break
			}
		}
		if !generated && strings.TrimSpace(p.Doc) == "" {
			t.Errorf("package %s (%s) has no doc comment saying what it owns", p.ImportPath, p.Dir)
		}
	}
}

// singleThreaded lists the packages scripts/go-tests runs without the race
// detector, to keep the suite's time in bounds: their heavy statistical
// tests are pure arithmetic on one goroutine, where the detector finds
// nothing and costs a factor of five to ten. TestSingleThreadedPackages
// keeps that claim true, and that scripts/go-tests names them.
var singleThreaded = []string{"kernels", "kernels/diag", "kernels/bound"}

// TestSingleThreadedPackages fails when a package run without the race
// detector, or its tests, start a goroutine or import sync: such code must
// run under -race (move the package out of the list, in scripts/go-tests too).
func TestSingleThreadedPackages(t *testing.T) {
	script, err := os.ReadFile("scripts/go-tests")
	if err != nil {
		t.Fatal(err)
	}
	for _, dir := range singleThreaded {
		if !strings.Contains(string(script), "./"+dir+" ") && !strings.Contains(string(script), "./"+dir+")") {
			t.Errorf("scripts/go-tests does not name ./%s among the packages run without -race", dir)
		}
		files, err := filepath.Glob(filepath.Join(dir, "*.go"))
		if err != nil || len(files) == 0 {
			t.Fatalf("%s: no Go files (%v)", dir, err)
		}
		fset := token.NewFileSet()
		for _, name := range files {
			f, err := parser.ParseFile(fset, name, nil, parser.SkipObjectResolution)
			if err != nil {
				t.Fatal(err)
			}
			for _, imp := range f.Imports {
				if p := strings.Trim(imp.Path.Value, `"`); p == "sync" || p == "sync/atomic" {
					t.Errorf("%s imports %s: the package must run under -race", name, p)
				}
			}
			ast.Inspect(f, func(n ast.Node) bool {
				if g, ok := n.(*ast.GoStmt); ok {
					t.Errorf("%s: a go statement: the package must run under -race", fset.Position(g.Pos()))
				}
				return true
			})
		}
	}
}
