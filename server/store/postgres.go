package store

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"
)

// Table is the PostgreSQL table of checkpoints, created when missing in
// the connection's current schema (its search_path).
const Table = "sluice_checkpoints"

// schema creates the table; the advisory lock keeps replicas starting at
// once from racing on CREATE TABLE IF NOT EXISTS.
var schema = []string{
	`SELECT pg_advisory_xact_lock(hashtext('` + Table + `'))`,
	`CREATE TABLE IF NOT EXISTS ` + Table + ` (
		id          text        PRIMARY KEY,
		seq         bigint      NOT NULL,
		state       bytea       NOT NULL,
		owner       text        NOT NULL DEFAULT '',
		lease_until timestamptz,
		updated     timestamptz NOT NULL
	)`,
	`CREATE INDEX IF NOT EXISTS ` + Table + `_updated ON ` + Table + ` (updated)`,
}

// putSQL is the compare-and-set of the package documentation in one
// statement: ON CONFLICT DO UPDATE locks the existing row and evaluates
// the WHERE clause on its latest version, so concurrent writers
// serialize and a refused write changes no row. Expiry is judged by the
// database server's clock.
const putSQL = `INSERT INTO ` + Table + ` AS c (id, seq, state, owner, lease_until, updated)
	VALUES ($1, $2, $3, $4, $5, date_trunc('microseconds', clock_timestamp()))
	ON CONFLICT (id) DO UPDATE SET
		seq = excluded.seq, state = excluded.state, owner = excluded.owner,
		lease_until = excluded.lease_until, updated = excluded.updated
	WHERE c.seq <= excluded.seq
		AND (c.owner = excluded.owner OR c.lease_until IS NULL OR c.lease_until <= clock_timestamp())`

// Postgres is the store for several server replicas: one row per session
// in the table Table, state as bytea, the lease in the columns owner and
// lease_until.
type Postgres struct {
	pool *pgxpool.Pool
}

// OpenPostgres connects to the database at url (a libpq-style URL or
// key=value string) and creates the table when missing.
func OpenPostgres(ctx context.Context, url string) (*Postgres, error) {
	cfg, err := pgxpool.ParseConfig(url)
	if err != nil {
		// pgx's parse errors can echo the URL, password included.
		return nil, errors.New("store: cannot parse the PostgreSQL connection string")
	}
	pool, err := pgxpool.NewWithConfig(ctx, cfg)
	if err != nil {
		return nil, fmt.Errorf("store: postgres: %w", err)
	}
	err = pgx.BeginFunc(ctx, pool, func(tx pgx.Tx) error {
		for _, q := range schema {
			if _, err := tx.Exec(ctx, q); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		pool.Close()
		return nil, fmt.Errorf("store: postgres: creating table %s: %w", Table, err)
	}
	return &Postgres{pool: pool}, nil
}

// Put implements Store.
func (p *Postgres) Put(ctx context.Context, id string, rec Record) error {
	if err := checkPut(id, rec); err != nil {
		return err
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	state := rec.State
	if state == nil {
		state = []byte{}
	}
	var lease *time.Time
	if !rec.LeaseUntil.IsZero() {
		l := micro(rec.LeaseUntil)
		lease = &l
	}
	tag, err := p.pool.Exec(ctx, putSQL, id, int64(rec.Seq), state, rec.Owner, lease)
	if err != nil {
		return fmt.Errorf("store: postgres put: %w", err)
	}
	if tag.RowsAffected() == 0 {
		return ErrConflict
	}
	return nil
}

// Get implements Store.
func (p *Postgres) Get(ctx context.Context, id string) (Record, error) {
	if err := checkID(id); err != nil {
		return Record{}, err
	}
	var (
		r     Record
		seq   int64
		lease *time.Time
	)
	err := p.pool.QueryRow(ctx, `SELECT seq, state, owner, lease_until, updated FROM `+Table+` WHERE id = $1`, id).
		Scan(&seq, &r.State, &r.Owner, &lease, &r.Updated)
	if errors.Is(err, pgx.ErrNoRows) {
		return Record{}, ErrNotFound
	}
	if err != nil {
		return Record{}, fmt.Errorf("store: postgres get: %w", err)
	}
	r.Seq = uint64(seq)
	r.Updated = micro(r.Updated)
	if lease != nil {
		r.LeaseUntil = micro(*lease)
	}
	if r.State == nil {
		r.State = []byte{}
	}
	return r, nil
}

// renewSQL is Renew's compare-and-set: the row is changed only while
// owner holds it (lease not released).
const renewSQL = `UPDATE ` + Table + ` SET lease_until = $3, updated = date_trunc('microseconds', clock_timestamp())
	WHERE id = $1 AND owner = $2 AND lease_until IS NOT NULL`

// Renew implements Store.
func (p *Postgres) Renew(ctx context.Context, id, owner string, until time.Time) error {
	if err := checkRenew(id, owner); err != nil {
		return err
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	var lease *time.Time
	if !until.IsZero() {
		l := micro(until)
		lease = &l
	}
	tag, err := p.pool.Exec(ctx, renewSQL, id, owner, lease)
	if err != nil {
		return fmt.Errorf("store: postgres renew: %w", err)
	}
	if tag.RowsAffected() == 1 {
		return nil
	}
	var exists bool
	if err := p.pool.QueryRow(ctx, `SELECT EXISTS (SELECT 1 FROM `+Table+` WHERE id = $1)`, id).Scan(&exists); err != nil {
		return fmt.Errorf("store: postgres renew: %w", err)
	}
	if !exists {
		return ErrNotFound
	}
	return ErrConflict
}

// Delete implements Store.
func (p *Postgres) Delete(ctx context.Context, id string) error {
	if err := checkID(id); err != nil {
		return err
	}
	if _, err := p.pool.Exec(ctx, `DELETE FROM `+Table+` WHERE id = $1`, id); err != nil {
		return fmt.Errorf("store: postgres delete: %w", err)
	}
	return nil
}

// DeleteReleased implements Store.
func (p *Postgres) DeleteReleased(ctx context.Context, id string, updated time.Time) (bool, error) {
	if err := checkID(id); err != nil {
		return false, err
	}
	tag, err := p.pool.Exec(ctx, `DELETE FROM `+Table+` WHERE id = $1 AND lease_until IS NULL AND updated = $2`,
		id, updated.Truncate(time.Microsecond))
	if err != nil {
		return false, fmt.Errorf("store: postgres delete: %w", err)
	}
	return tag.RowsAffected() == 1, nil
}

// Sweep implements Store.
func (p *Postgres) Sweep(ctx context.Context, before time.Time) (int, error) {
	tag, err := p.pool.Exec(ctx, `DELETE FROM `+Table+` WHERE updated < $1
		AND (lease_until IS NULL OR lease_until <= clock_timestamp())`, before)
	if err != nil {
		return 0, fmt.Errorf("store: postgres sweep: %w", err)
	}
	return int(tag.RowsAffected()), nil
}

// Close implements Store.
func (p *Postgres) Close() error {
	p.pool.Close()
	return nil
}
