package main

import (
	"flag"
	"fmt"
	"io"
	"runtime"
	"runtime/debug"
)

// buildVersion is the release this binary is, set at link time:
//
//	go build -ldflags "-X main.buildVersion=1.2.0" ./cmd/sluice
//
// Without it, the module version recorded by the Go toolchain is shown
// (for "go install sluice/cmd/sluice@v1.2.0"), else "dev".
var buildVersion = ""

// version prints the version, the Go version and the module build
// information.
func version(args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("version", flag.ContinueOnError)
	fs.SetOutput(stderr)
	setHelp(fs, help{
		usage: "sluice version",
		about: "Prints the version of this sluice binary (set at link time with -ldflags \"-X main.buildVersion=…\", " +
			"else the module version Go recorded, else \"dev\"), the Go version and platform it was built with, " +
			"the source revision when built from a checkout, and the versions of the modules it contains. " +
			"Include this output in bug reports.",
		examples: []string{"sluice version", `go build -ldflags "-X main.buildVersion=1.2.0" -o sluice ./cmd/sluice && ./sluice version`},
	})
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	info, ok := debug.ReadBuildInfo()
	fmt.Fprintf(stdout, "sluice %s\n", versionString(info, ok))
	fmt.Fprintf(stdout, "built with %s for %s/%s\n", runtime.Version(), runtime.GOOS, runtime.GOARCH)
	if !ok {
		fmt.Fprintln(stdout, "no module build information in this binary")
		return nil
	}
	var rev, when, modified string
	for _, s := range info.Settings {
		switch s.Key {
		case "vcs.revision":
			rev = s.Value
		case "vcs.time":
			when = s.Value
		case "vcs.modified":
			modified = s.Value
		}
	}
	if rev != "" {
		fmt.Fprintf(stdout, "source revision %s", rev)
		if when != "" {
			fmt.Fprintf(stdout, " (%s)", when)
		}
		if modified == "true" {
			fmt.Fprint(stdout, ", with uncommitted changes")
		}
		fmt.Fprintln(stdout)
	}
	fmt.Fprintf(stdout, "module %s %s\n", info.Main.Path, info.Main.Version)
	for _, d := range info.Deps {
		v := d.Version
		if d.Replace != nil {
			v += " => " + d.Replace.Path + " " + d.Replace.Version
		}
		fmt.Fprintf(stdout, "  %s %s\n", d.Path, v)
	}
	return nil
}

// versionString is the link-time version, else the module version the
// toolchain recorded (not "(devel)"), else "dev".
func versionString(info *debug.BuildInfo, ok bool) string {
	if buildVersion != "" {
		return buildVersion
	}
	if ok && info.Main.Version != "" && info.Main.Version != "(devel)" {
		return info.Main.Version
	}
	return "dev"
}
