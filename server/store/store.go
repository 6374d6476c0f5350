package store

import (
	"context"
	"errors"
	"fmt"
	"math"
	"time"
)

// Store keeps session checkpoints. Implementations are safe for
// concurrent use.
type Store interface {
	// Put writes rec under id, replacing any record there as a whole,
	// when the lease allows it (see the package documentation); otherwise
	// it returns ErrConflict. The store sets rec.Updated to its own clock.
	Put(ctx context.Context, id string, rec Record) error
	// Get returns the record under id, or ErrNotFound.
	Get(ctx context.Context, id string) (Record, error)
	// Renew sets the lease of the record under id to until, keeping its
	// state and seq, when owner holds it: the record's Owner is owner and
	// its lease has not been released (LeaseUntil is not zero; it may have
	// expired, as long as no other owner took the record since). A zero
	// until releases the lease: anyone may then take the record. It
	// returns ErrNotFound when there is no record, ErrConflict when owner
	// does not hold it. The store sets Updated to its own clock.
	Renew(ctx context.Context, id, owner string, until time.Time) error
	// Delete removes the record under id; deleting a missing id is not an
	// error.
	Delete(ctx context.Context, id string) error
	// DeleteReleased removes the record under id only if its lease is
	// released (LeaseUntil zero) and it was last written at updated, in one
	// step, so that a session another replica took or wrote since it was
	// read is never removed. It reports whether it removed the record.
	DeleteReleased(ctx context.Context, id string, updated time.Time) (bool, error)
	// Sweep deletes every record written before the given time whose lease
	// has expired, and returns how many it deleted.
	Sweep(ctx context.Context, before time.Time) (int, error)
	// Close releases the store. Calls after Close return errors.
	Close() error
}

// Record is one session checkpoint.
type Record struct {
	// State is the engine's serialized state; the store does not read it.
	State []byte
	// Seq is the checkpoint's sequence number; a Put never lowers it.
	// At most math.MaxInt64.
	Seq uint64
	// Updated is when the store last wrote the record (set by Put and
	// Renew).
	Updated time.Time
	// Owner names the replica holding the lease; empty for none.
	Owner string
	// LeaseUntil is when the lease expires; zero means no lease.
	LeaseUntil time.Time
}

// ErrNotFound is returned by Get when no record exists under the id.
var ErrNotFound = errors.New("store: no checkpoint under this id")

// ErrConflict is returned by Put when another owner holds a live lease on
// the session, or when the record's Seq is below the stored one.
var ErrConflict = errors.New("store: checkpoint held by another owner or newer")

// MaxIDBytes is the longest id accepted.
const MaxIDBytes = 256

// checkPut validates the arguments of Put.
func checkPut(id string, rec Record) error {
	if err := checkID(id); err != nil {
		return err
	}
	if rec.Seq > math.MaxInt64 {
		return fmt.Errorf("store: seq %d exceeds %d", rec.Seq, int64(math.MaxInt64))
	}
	if len(rec.Owner) > MaxIDBytes {
		return fmt.Errorf("store: owner of %d bytes exceeds %d", len(rec.Owner), MaxIDBytes)
	}
	return nil
}

func checkID(id string) error {
	if id == "" {
		return errors.New("store: empty id")
	}
	if len(id) > MaxIDBytes {
		return fmt.Errorf("store: id of %d bytes exceeds %d", len(id), MaxIDBytes)
	}
	return nil
}

// micro truncates t to the microsecond, dropping the monotonic reading;
// the zero time stays zero.
func micro(t time.Time) time.Time {
	if t.IsZero() {
		return time.Time{}
	}
	return time.UnixMicro(t.UnixMicro()).UTC()
}

// checkRenew validates the arguments of Renew.
func checkRenew(id, owner string) error {
	if err := checkID(id); err != nil {
		return err
	}
	if owner == "" || len(owner) > MaxIDBytes {
		return fmt.Errorf("store: owner of %d bytes: want 1 to %d", len(owner), MaxIDBytes)
	}
	return nil
}

// mayRenew reports whether owner holds cur (the rule of Renew).
func mayRenew(cur Record, owner string) bool {
	return cur.Owner == owner && !cur.LeaseUntil.IsZero()
}

// mayReplace reports whether a Put of next may replace cur at time now
// (the rule of the package documentation).
func mayReplace(cur, next Record, now time.Time) bool {
	if next.Seq < cur.Seq {
		return false
	}
	return cur.Owner == next.Owner || cur.LeaseUntil.IsZero() || !cur.LeaseUntil.After(now)
}

var (
	_ Store = (*File)(nil)
	_ Store = (*Postgres)(nil)
)
