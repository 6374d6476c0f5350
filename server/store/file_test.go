package store_test

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"strconv"
	"strings"
	"testing"

	"sluice/server/store"
)

func openFile(t testing.TB, dir string) *store.File {
	t.Helper()
	s, err := store.OpenFile(dir)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = s.Close() })
	return s
}

func TestFileConformance(t *testing.T) {
	testConformance(t, func(t *testing.T) func() store.Store {
		s := openFile(t, t.TempDir())
		return func() store.Store { return s }
	})
}

func TestFileReopen(t *testing.T) {
	dir := t.TempDir()
	s, err := store.OpenFile(dir)
	if err != nil {
		t.Fatal(err)
	}
	state := pattern(3, 300<<10)
	mustPut(t, s, "kept", store.Record{State: state, Seq: 9, Owner: "a"})
	if _, err := store.OpenFile(dir); err == nil || !strings.Contains(err.Error(), "in use") {
		t.Errorf("second open of a held store: %v, want an in-use error", err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	if err := s.Put(context.Background(), "kept", store.Record{Seq: 10}); err == nil {
		t.Error("Put after Close succeeded")
	}
	s2 := openFile(t, dir)
	mustGet(t, s2, "kept", string(state), 9, "a")
}

// crashWriterEnv names the directory the writer subprocess writes to.
const crashWriterEnv = "SLUICE_STORE_CRASH_WRITER_DIR"

// TestCrashWriterProcess is the writer subprocess of TestFileCrashSafety;
// it does nothing unless started by it. It continues from the stored
// record, writing records of seq+1, seq+2, … under one id, each state the
// pattern of its seq, and prints "committed N" after each Put returns.
func TestCrashWriterProcess(t *testing.T) {
	dir := os.Getenv(crashWriterEnv)
	if dir == "" {
		t.Skip("the writer subprocess of TestFileCrashSafety")
	}
	s, err := store.OpenFile(dir)
	if err != nil {
		fmt.Println("error", err)
		os.Exit(3)
	}
	ctx := context.Background()
	var seq uint64
	if r, err := s.Get(ctx, "crash"); err == nil {
		seq = r.Seq
	} else if !errors.Is(err, store.ErrNotFound) {
		fmt.Println("error", err)
		os.Exit(3)
	}
	for range 100000 { // bounded; the parent kills it long before
		seq++
		if err := s.Put(ctx, "crash", store.Record{State: pattern(seq, crashSize(seq)), Seq: seq, Owner: "writer"}); err != nil {
			fmt.Println("error", err)
			os.Exit(3)
		}
		fmt.Printf("committed %d\n", seq)
	}
	os.Exit(0)
}

// crashSize varies the state's size so that records move between pages.
func crashSize(seq uint64) int { return 16<<10 + int(seq%7)*40<<10 }

// TestFileCrashSafety kills a writer with SIGKILL while it writes and
// checks that the reopened store holds the last committed record intact
// (bbolt commits with fsync and a meta page switch, so a transaction is
// either all there or not at all).
func TestFileCrashSafety(t *testing.T) {
	dir := t.TempDir()
	var last uint64
	for round := range 4 {
		target := last + 10 + uint64(round)*13
		cmd := exec.Command(os.Args[0], "-test.run=^TestCrashWriterProcess$", "-test.count=1")
		cmd.Env = append(os.Environ(), crashWriterEnv+"="+dir)
		var stderr bytes.Buffer
		cmd.Stderr = &stderr
		out, err := cmd.StdoutPipe()
		if err != nil {
			t.Fatal(err)
		}
		if err := cmd.Start(); err != nil {
			t.Fatal(err)
		}
		sc := bufio.NewScanner(out)
		var seen uint64
		for sc.Scan() { // ends at the writer's exit at the latest
			line := sc.Text()
			if strings.HasPrefix(line, "error") {
				break
			}
			if v, ok := strings.CutPrefix(line, "committed "); ok {
				if seen, err = strconv.ParseUint(v, 10, 64); err != nil {
					t.Fatalf("writer printed %q", line)
				}
				if seen >= target {
					break // the writer is already inside its next Put
				}
			}
		}
		_ = cmd.Process.Kill() // SIGKILL, to this PID only
		_ = cmd.Wait()
		if seen < target {
			t.Fatalf("round %d: writer stopped at %d before reaching %d; stderr:\n%s", round, seen, target, stderr.Bytes())
		}
		s, err := store.OpenFile(dir)
		if err != nil {
			t.Fatalf("round %d: reopening after SIGKILL: %v", round, err)
		}
		r, err := s.Get(context.Background(), "crash")
		_ = s.Close()
		if err != nil {
			t.Fatalf("round %d: %v", round, err)
		}
		// The killed Put may or may not have committed: seq is the last
		// committed one seen, or up to the next few written after it.
		if r.Seq < seen {
			t.Fatalf("round %d: stored seq %d below the committed %d", round, r.Seq, seen)
		}
		if !bytes.Equal(r.State, pattern(r.Seq, crashSize(r.Seq))) {
			t.Fatalf("round %d: state of seq %d is not the one written (%d bytes)", round, r.Seq, len(r.State))
		}
		t.Logf("round %d: killed after committed %d; reopened at %d, intact", round, seen, r.Seq)
		last = r.Seq
	}
}

func BenchmarkPut1MiB(b *testing.B) {
	state := pattern(5, 1<<20)
	b.Run("file", func(b *testing.B) { benchPut(b, openFile(b, b.TempDir()), state) })
	b.Run("postgres", func(b *testing.B) {
		url := postgresURL(b)
		benchPut(b, openPostgres(b, url), state)
	})
}

func benchPut(b *testing.B, s store.Store, state []byte) {
	ctx := context.Background()
	b.SetBytes(int64(len(state)))
	for i := 0; b.Loop(); i++ {
		if err := s.Put(ctx, "bench", store.Record{State: state, Seq: uint64(i), Owner: "bench"}); err != nil {
			b.Fatal(err)
		}
	}
}
