// Package store owns the checkpoints of sampling sessions: one small
// interface (Store) with two implementations, an embedded file store on
// bbolt (OpenFile, the default for a single server) and PostgreSQL
// (OpenPostgres, for several server replicas sharing sessions).
//
// A checkpoint is a Record: the engine's opaque state bytes, a sequence
// number, the time the store last wrote it, and a lease (an owner name
// and an expiry time). The store never looks inside the state.
//
// # Leases: one runner per session
//
// Put is a compare-and-set on the lease. It writes the record (an atomic
// replace of the whole record) only when
//
//   - no record exists under the id, or
//   - the stored record's Owner equals the new record's Owner, or
//   - the stored record's lease has expired (its LeaseUntil is zero or not
//     after the store's clock),
//
// and, in every case, the new Seq is not below the stored Seq. Otherwise
// Put returns ErrConflict and changes nothing. The check and the write
// happen in one transaction (bbolt: one read-write transaction, which
// bbolt serializes; PostgreSQL: one INSERT … ON CONFLICT DO UPDATE … WHERE,
// which locks the row and evaluates the condition on its latest version),
// so of two replicas racing to take over an abandoned session exactly one
// wins: the loser finds a live lease held by another owner.
//
// A replica running a session therefore writes every checkpoint with its
// own name as Owner and a LeaseUntil some time ahead, renews the lease on
// a timer of its own with Renew (each checkpoint renews it too, but a
// session's checkpoints may be far apart), and stops the session when Put
// or Renew returns ErrConflict: another replica has taken it over. Renew
// with a zero time releases the lease, so that any replica may take the
// session at once (a session suspended because its client fell silent). A replica resuming a session reads it
// with Get and claims it by writing it back under its own name; only after
// that Put succeeds may it run the session. Expiry is judged by the
// store's clock (the process clock for the file store, the database
// server's clock for PostgreSQL), so leases should be much longer than
// the clock skew between replicas and the database, and a replica should
// stop running a session once its own lease has passed by its own clock.
//
// # Retention
//
// Sweep deletes the records not written since a given time whose lease
// has expired: finished and abandoned sessions. A session with a live
// lease is never swept. Delete removes one record unconditionally.
//
// Times are kept to the microsecond (PostgreSQL's precision) in both
// implementations.
package store
