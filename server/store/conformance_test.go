package store_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"math"
	"sync"
	"testing"
	"time"

	"sluice/server/store"
)

// replicas returns a function that opens the store under test: each call
// is one more server replica sharing the same data (for the file store,
// which one process holds at a time, every call returns the same store).
// The stores are closed when the test ends.
type replicas func(t *testing.T) func() store.Store

// testConformance runs the behaviour every Store promises (the package
// documentation) against one implementation.
func testConformance(t *testing.T, newReplicas replicas) {
	ctx := context.Background()
	hour := time.Hour
	// fresh opens a store with no records.
	fresh := func(t *testing.T) store.Store { return newReplicas(t)() }

	t.Run("missing", func(t *testing.T) {
		s := fresh(t)
		if _, err := s.Get(ctx, "nobody"); !errors.Is(err, store.ErrNotFound) {
			t.Fatalf("Get of a missing id: %v, want ErrNotFound", err)
		}
		if err := s.Delete(ctx, "nobody"); err != nil {
			t.Fatalf("Delete of a missing id: %v", err)
		}
	})

	t.Run("round trip", func(t *testing.T) {
		s := fresh(t)
		state := pattern(1, 1<<20)
		lease := time.Now().Add(hour)
		before := time.Now().Truncate(time.Microsecond)
		if err := s.Put(ctx, "s1", store.Record{State: state, Seq: 7, Owner: "replica-a", LeaseUntil: lease}); err != nil {
			t.Fatal(err)
		}
		after := time.Now()
		got, err := s.Get(ctx, "s1")
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(got.State, state) || got.Seq != 7 || got.Owner != "replica-a" {
			t.Fatalf("got seq %d owner %q state of %d bytes (equal %v), want seq 7 owner replica-a and the 1 MiB written",
				got.Seq, got.Owner, len(got.State), bytes.Equal(got.State, state))
		}
		if !got.LeaseUntil.Equal(lease.Truncate(time.Microsecond)) {
			t.Errorf("lease %v, want %v to the microsecond", got.LeaseUntil, lease)
		}
		if got.Updated.Before(before) || got.Updated.After(after) {
			t.Errorf("updated %v, want within the Put call [%v, %v]", got.Updated, before, after)
		}
	})

	t.Run("replace", func(t *testing.T) {
		s := fresh(t)
		mustPut(t, s, "s", store.Record{State: []byte("first, longer state"), Seq: 1, Owner: "a"})
		mustPut(t, s, "s", store.Record{State: []byte("second"), Seq: 2, Owner: "a"})
		mustGet(t, s, "s", "second", 2, "a")
		mustPut(t, s, "s", store.Record{Seq: 2, Owner: "a"}) // equal seq, empty state
		mustGet(t, s, "s", "", 2, "a")
	})

	t.Run("seq never goes back", func(t *testing.T) {
		s := fresh(t)
		mustPut(t, s, "s", store.Record{State: []byte("five"), Seq: 5, Owner: "a"})
		if err := s.Put(ctx, "s", store.Record{State: []byte("four"), Seq: 4, Owner: "a"}); !errors.Is(err, store.ErrConflict) {
			t.Fatalf("Put with a lower seq: %v, want ErrConflict", err)
		}
		mustGet(t, s, "s", "five", 5, "a")
	})

	t.Run("lease", func(t *testing.T) {
		open := newReplicas(t)
		a, b := open(), open()
		mustPut(t, a, "s", store.Record{State: []byte("a1"), Seq: 1, Owner: "a", LeaseUntil: time.Now().Add(hour)})
		if err := b.Put(ctx, "s", store.Record{State: []byte("b"), Seq: 2, Owner: "b", LeaseUntil: time.Now().Add(hour)}); !errors.Is(err, store.ErrConflict) {
			t.Fatalf("Put by another owner under a live lease: %v, want ErrConflict", err)
		}
		mustGet(t, b, "s", "a1", 1, "a")
		// The owner renews; then its lease runs out (written as expired).
		mustPut(t, a, "s", store.Record{State: []byte("a2"), Seq: 2, Owner: "a", LeaseUntil: time.Now().Add(-time.Minute)})
		mustPut(t, b, "s", store.Record{State: []byte("b3"), Seq: 3, Owner: "b", LeaseUntil: time.Now().Add(hour)})
		if err := a.Put(ctx, "s", store.Record{State: []byte("a4"), Seq: 4, Owner: "a", LeaseUntil: time.Now().Add(hour)}); !errors.Is(err, store.ErrConflict) {
			t.Fatalf("Put by the former owner after a takeover: %v, want ErrConflict", err)
		}
		mustGet(t, a, "s", "b3", 3, "b")
		// No lease at all: anyone may write.
		mustPut(t, b, "free", store.Record{State: []byte("x"), Seq: 1, Owner: "b"})
		mustPut(t, a, "free", store.Record{State: []byte("y"), Seq: 1, Owner: "a"})
		mustGet(t, b, "free", "y", 1, "a")
	})

	t.Run("renew", func(t *testing.T) {
		open := newReplicas(t)
		a, b := open(), open()
		if err := a.Renew(ctx, "none", "a", time.Now().Add(hour)); !errors.Is(err, store.ErrNotFound) {
			t.Fatalf("Renew of a missing id: %v, want ErrNotFound", err)
		}
		// The owner's lease has run out (written as expired): a renewal
		// keeps another owner out again, and leaves state and seq alone.
		mustPut(t, a, "s", store.Record{State: []byte("a1"), Seq: 3, Owner: "a", LeaseUntil: time.Now().Add(-time.Minute)})
		before := time.Now().Truncate(time.Microsecond)
		until := time.Now().Add(hour)
		if err := a.Renew(ctx, "s", "a", until); err != nil {
			t.Fatalf("Renew by the owner of an expired lease: %v", err)
		}
		got, err := b.Get(ctx, "s")
		if err != nil {
			t.Fatal(err)
		}
		if string(got.State) != "a1" || got.Seq != 3 || got.Owner != "a" || !got.LeaseUntil.Equal(until.Truncate(time.Microsecond)) {
			t.Fatalf("after Renew: state %q seq %d owner %q lease %v; want a1, 3, a, %v", got.State, got.Seq, got.Owner, got.LeaseUntil, until)
		}
		if got.Updated.Before(before) {
			t.Errorf("Renew left updated at %v, before the call (%v)", got.Updated, before)
		}
		if err := b.Put(ctx, "s", store.Record{State: []byte("b"), Seq: 4, Owner: "b", LeaseUntil: time.Now().Add(hour)}); !errors.Is(err, store.ErrConflict) {
			t.Fatalf("Put by another owner under a renewed lease: %v, want ErrConflict", err)
		}
		if err := b.Renew(ctx, "s", "b", time.Now().Add(hour)); !errors.Is(err, store.ErrConflict) {
			t.Fatalf("Renew by another owner: %v, want ErrConflict", err)
		}
		// Released: the owner can no longer renew it, anyone may take it.
		if err := a.Renew(ctx, "s", "a", time.Time{}); err != nil {
			t.Fatalf("release: %v", err)
		}
		if err := a.Renew(ctx, "s", "a", time.Now().Add(hour)); !errors.Is(err, store.ErrConflict) {
			t.Fatalf("Renew of a released lease: %v, want ErrConflict", err)
		}
		mustGet(t, b, "s", "a1", 3, "a")
		mustPut(t, b, "s", store.Record{State: []byte("b"), Seq: 4, Owner: "b", LeaseUntil: time.Now().Add(hour)})
		if err := a.Renew(ctx, "s", "a", time.Now().Add(hour)); !errors.Is(err, store.ErrConflict) {
			t.Fatalf("Renew by the former owner after a takeover: %v, want ErrConflict", err)
		}
		mustGet(t, a, "s", "b", 4, "b")
		// A record written without a lease (a finished session's) is held
		// by no one.
		mustPut(t, a, "done", store.Record{State: []byte("x"), Seq: 1, Owner: "a"})
		if err := a.Renew(ctx, "done", "a", time.Now().Add(hour)); !errors.Is(err, store.ErrConflict) {
			t.Fatalf("Renew of a record without a lease: %v, want ErrConflict", err)
		}
	})

	t.Run("takeover race has one winner", func(t *testing.T) {
		open := newReplicas(t)
		const n = 8
		stores := make([]store.Store, n)
		for i := range stores {
			stores[i] = open()
		}
		for round := range 5 {
			id := fmt.Sprintf("race-%d", round)
			mustPut(t, stores[0], id, store.Record{State: []byte("old"), Seq: 1, Owner: "gone", LeaseUntil: time.Now().Add(-time.Minute)})
			var wg sync.WaitGroup
			errs := make([]error, n)
			start := make(chan struct{})
			for i := range n {
				wg.Go(func() {
					<-start
					errs[i] = stores[i].Put(ctx, id, store.Record{State: fmt.Appendf(nil, "by %d", i), Seq: 2,
						Owner: fmt.Sprintf("r%d", i), LeaseUntil: time.Now().Add(hour)})
				})
			}
			close(start)
			wg.Wait()
			winner := -1
			for i, err := range errs {
				switch {
				case err == nil && winner >= 0:
					t.Fatalf("round %d: replicas %d and %d both took the session", round, winner, i)
				case err == nil:
					winner = i
				case !errors.Is(err, store.ErrConflict):
					t.Fatalf("round %d: replica %d: %v", round, i, err)
				}
			}
			if winner < 0 {
				t.Fatalf("round %d: no replica took the session", round)
			}
			mustGet(t, stores[0], id, fmt.Sprintf("by %d", winner), 2, fmt.Sprintf("r%d", winner))
		}
	})

	t.Run("delete", func(t *testing.T) {
		s := fresh(t)
		mustPut(t, s, "s", store.Record{State: []byte("x"), Seq: 1, Owner: "a", LeaseUntil: time.Now().Add(hour)})
		mustPut(t, s, "t", store.Record{State: []byte("y"), Seq: 1})
		if err := s.Delete(ctx, "s"); err != nil {
			t.Fatal(err)
		}
		if _, err := s.Get(ctx, "s"); !errors.Is(err, store.ErrNotFound) {
			t.Fatalf("Get after Delete: %v, want ErrNotFound", err)
		}
		mustGet(t, s, "t", "y", 1, "")
	})

	// DeleteReleased removes a record only with its lease released and
	// only as it was read: a replica that took or wrote the record since
	// keeps it (the expiry of a suspended session).
	t.Run("delete released", func(t *testing.T) {
		s := fresh(t)
		get := func() store.Record {
			t.Helper()
			r, err := s.Get(ctx, "s")
			if err != nil {
				t.Fatal(err)
			}
			return r
		}
		if done, err := s.DeleteReleased(ctx, "nobody", time.Now()); done || err != nil {
			t.Fatalf("DeleteReleased of a missing id: %v, %v", done, err)
		}
		mustPut(t, s, "s", store.Record{State: []byte("x"), Seq: 1, Owner: "a", LeaseUntil: time.Now().Add(hour)})
		if done, err := s.DeleteReleased(ctx, "s", get().Updated); done || err != nil {
			t.Fatalf("DeleteReleased under a live lease: %v, %v", done, err)
		}
		if err := s.Renew(ctx, "s", "a", time.Time{}); err != nil { // released
			t.Fatal(err)
		}
		read := get().Updated
		time.Sleep(2 * time.Millisecond)                             // the store's clock moves past read (microseconds)
		mustPut(t, s, "s", store.Record{State: []byte("y"), Seq: 2}) // written since the read
		if done, err := s.DeleteReleased(ctx, "s", read); done || err != nil {
			t.Fatalf("DeleteReleased of a record written since it was read: %v, %v", done, err)
		}
		mustGet(t, s, "s", "y", 2, "")
		if done, err := s.DeleteReleased(ctx, "s", get().Updated); !done || err != nil {
			t.Fatalf("DeleteReleased of a released record as read: %v, %v", done, err)
		}
		if _, err := s.Get(ctx, "s"); !errors.Is(err, store.ErrNotFound) {
			t.Fatalf("Get after DeleteReleased: %v, want ErrNotFound", err)
		}
	})

	t.Run("sweep", func(t *testing.T) {
		s := fresh(t)
		past, future := time.Now().Add(-time.Minute), time.Now().Add(hour)
		mustPut(t, s, "old-free", store.Record{State: []byte("1"), Seq: 1})
		mustPut(t, s, "old-expired", store.Record{State: []byte("2"), Seq: 1, Owner: "a", LeaseUntil: past})
		mustPut(t, s, "old-live", store.Record{State: []byte("3"), Seq: 1, Owner: "a", LeaseUntil: future})
		// Updated is kept to the microsecond: step past it on both sides
		// of the cut-off so that old and new records fall on either side.
		time.Sleep(2 * time.Millisecond)
		cut := time.Now()
		time.Sleep(2 * time.Millisecond)
		mustPut(t, s, "new-free", store.Record{State: []byte("4"), Seq: 1})
		n, err := s.Sweep(ctx, cut)
		if err != nil {
			t.Fatal(err)
		}
		if n != 2 {
			t.Errorf("Sweep deleted %d records, want 2 (old-free, old-expired)", n)
		}
		for _, id := range []string{"old-free", "old-expired"} {
			if _, err := s.Get(ctx, id); !errors.Is(err, store.ErrNotFound) {
				t.Errorf("%s after Sweep: %v, want ErrNotFound", id, err)
			}
		}
		mustGet(t, s, "old-live", "3", 1, "a")
		mustGet(t, s, "new-free", "4", 1, "")
		if n, err := s.Sweep(ctx, cut); err != nil || n != 0 {
			t.Errorf("second Sweep: %d, %v; want 0, nil", n, err)
		}
	})

	t.Run("bad arguments", func(t *testing.T) {
		s := fresh(t)
		long := string(bytes.Repeat([]byte("x"), store.MaxIDBytes+1))
		for name, err := range map[string]error{
			"put empty id":   s.Put(ctx, "", store.Record{Seq: 1}),
			"put long id":    s.Put(ctx, long, store.Record{Seq: 1}),
			"put huge seq":   s.Put(ctx, "s", store.Record{Seq: math.MaxInt64 + 1}),
			"put long owner": s.Put(ctx, "s", store.Record{Seq: 1, Owner: long}),
			"get empty id":   func() error { _, err := s.Get(ctx, ""); return err }(),
			"delete long id": s.Delete(ctx, long),
			"renew no owner": s.Renew(ctx, "s", "", time.Now()),
			"renew long id":  s.Renew(ctx, long, "a", time.Now()),
		} {
			if err == nil || errors.Is(err, store.ErrConflict) || errors.Is(err, store.ErrNotFound) {
				t.Errorf("%s: %v, want an argument error", name, err)
			}
		}
		if _, err := s.Get(ctx, "s"); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("a refused Put wrote something: %v", err)
		}
		mustPut(t, s, "s", store.Record{Seq: math.MaxInt64})
		mustGet(t, s, "s", "", math.MaxInt64, "")
	})

	t.Run("cancelled context", func(t *testing.T) {
		s := fresh(t)
		cctx, cancel := context.WithCancel(ctx)
		cancel()
		if err := s.Put(cctx, "s", store.Record{Seq: 1}); !errors.Is(err, context.Canceled) {
			t.Errorf("Put with a cancelled context: %v, want context.Canceled", err)
		}
	})
}

func mustPut(t *testing.T, s store.Store, id string, r store.Record) {
	t.Helper()
	if err := s.Put(context.Background(), id, r); err != nil {
		t.Fatalf("Put %q seq %d owner %q: %v", id, r.Seq, r.Owner, err)
	}
}

func mustGet(t *testing.T, s store.Store, id, state string, seq uint64, owner string) {
	t.Helper()
	r, err := s.Get(context.Background(), id)
	if err != nil {
		t.Fatalf("Get %q: %v", id, err)
	}
	if string(r.State) != state || r.Seq != seq || r.Owner != owner {
		t.Fatalf("Get %q = state %q seq %d owner %q; want %q, %d, %q", id, r.State, r.Seq, r.Owner, state, seq, owner)
	}
}

// pattern returns n bytes determined by seed (splitmix64), so a reader can
// tell an intact state from a torn or mixed one.
func pattern(seed uint64, n int) []byte {
	b := make([]byte, n)
	x := seed
	for i := 0; i < n; i += 8 {
		x += 0x9e3779b97f4a7c15
		z := x
		z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
		z = (z ^ (z >> 27)) * 0x94d049bb133111eb
		z ^= z >> 31
		for j := 0; j < 8 && i+j < n; j++ {
			b[i+j] = byte(z >> (8 * j))
		}
	}
	return b
}
