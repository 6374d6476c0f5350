//go:build linux

package report

import (
	"bytes"
	"context"
	"errors"
	"image/png"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"
)

// chromium finds Debian's headless-capable browser. Its absence skips
// the browser test only when SLUICE_REQUIRE_CHROMIUM is unset; the test
// command sets it, so a full run never skips.
func chromium(t *testing.T) string {
	t.Helper()
	for _, name := range []string{"chromium", "chromium-browser"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	if os.Getenv("SLUICE_REQUIRE_CHROMIUM") != "" {
		t.Fatal("chromium not found and SLUICE_REQUIRE_CHROMIUM is set: apt-get install -y --no-install-recommends chromium")
	}
	t.Skip("chromium not installed (set SLUICE_REQUIRE_CHROMIUM to make this a failure)")
	return ""
}

// runChromium runs the browser headless on a local page with a fresh
// profile and no network-facing extras, in its own process group, and
// kills that group (by the browser's PID) when it ends or after the
// safety-net timeout.
func runChromium(t *testing.T, exe, profile string, args ...string) []byte {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 4*time.Minute)
	defer cancel()
	base := []string{"--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
		"--disable-background-networking", "--disable-component-update", "--disable-sync",
		"--disable-dev-shm-usage", "--hide-scrollbars", "--user-data-dir=" + profile, "--virtual-time-budget=20000"}
	cmd := exec.CommandContext(ctx, exe, append(base, args...)...)
	cmd.SysProcAttr = &syscall.SysProcAttr{Setpgid: true}
	cmd.Cancel = func() error { return syscall.Kill(-cmd.Process.Pid, syscall.SIGKILL) }
	var stdout, stderr bytes.Buffer
	cmd.Stdout, cmd.Stderr = &stdout, &stderr
	err := cmd.Run()
	if cmd.Process != nil {
		// Helpers the browser started and left behind share its group.
		if kerr := syscall.Kill(-cmd.Process.Pid, syscall.SIGKILL); kerr != nil && !errors.Is(kerr, syscall.ESRCH) {
			t.Logf("killing chromium's process group %d: %v", cmd.Process.Pid, kerr)
		}
	}
	if err != nil {
		t.Fatalf("chromium %s: %v\n%s", strings.Join(args, " "), err, tail(stderr.String(), 2000))
	}
	return stdout.Bytes()
}

func tail(s string, n int) string {
	if len(s) > n {
		return s[len(s)-n:]
	}
	return s
}

var (
	loadedAttr = regexp.MustCompile(`<body[^>]*\bdata-loaded="(\d+)"`)
	imagesAttr = regexp.MustCompile(`<body[^>]*\bdata-images="(\d+)"`)
)

// TestPageInBrowser opens a report in headless Chromium: every picture
// must load (the page's script counts images with a natural width), the
// parameter names must be in the page, and a screenshot must be taken.
func TestPageInBrowser(t *testing.T) {
	exe := chromium(t)
	dir := t.TempDir()
	run := synthetic(3, 4, 200)
	if _, err := Write(run, Options{Dir: dir}); err != nil {
		t.Fatal(err)
	}
	index := filepath.Join(dir, "index.html")
	html, err := os.ReadFile(index)
	if err != nil {
		t.Fatal(err)
	}
	wantImages := strings.Count(string(html), "<img ")
	if wantImages < 8 {
		t.Fatalf("index.html has %d images, want at least 8", wantImages)
	}
	url := "file://" + index

	dom := string(runChromium(t, exe, filepath.Join(dir, "profile-dom"), "--dump-dom", url))
	l, n := loadedAttr.FindStringSubmatch(dom), imagesAttr.FindStringSubmatch(dom)
	if l == nil || n == nil {
		t.Fatalf("the page's load script did not run; body was %q", firstMatch(dom, `<body[^>]*>`))
	}
	loaded, _ := strconv.Atoi(l[1])
	total, _ := strconv.Atoi(n[1])
	if total != wantImages || loaded != total {
		t.Errorf("%d of %d images loaded in the browser, want all %d", loaded, total, wantImages)
	}
	for _, name := range run.Names {
		if !strings.Contains(dom, name) {
			t.Errorf("parameter %s not in the rendered page", name)
		}
	}

	shot := filepath.Join(dir, "page.png")
	runChromium(t, exe, filepath.Join(dir, "profile-shot"), "--screenshot="+shot, "--window-size=1200,1600", url)
	f, err := os.Open(shot)
	if err != nil {
		t.Fatalf("no screenshot: %v", err)
	}
	defer f.Close()
	img, err := png.Decode(f)
	if err != nil {
		t.Fatal(err)
	}
	if b := img.Bounds(); b.Dx() != 1200 || b.Dy() != 1600 {
		t.Errorf("screenshot %d×%d, want 1200×1600", b.Dx(), b.Dy())
	}
}

func firstMatch(s, re string) string { return regexp.MustCompile(re).FindString(s) }
