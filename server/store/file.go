package store

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"hash/crc32"
	"os"
	"path/filepath"
	"time"

	bolt "go.etcd.io/bbolt"
	bolterrors "go.etcd.io/bbolt/errors"
)

// FileName is the name of the database file inside the state directory.
const FileName = "checkpoints.db"

var bucket = []byte("checkpoints")

// File is the embedded store: one bbolt database file in a directory, one
// bucket keyed by session id. Every Put is one read-write transaction,
// synced to disk before Put returns (bbolt's default), so after a crash the
// file holds each record as of its last completed Put.
type File struct {
	db  *bolt.DB
	now func() time.Time
}

// OpenFile opens (creating it when missing) the store in dir. Only one
// process may hold a store open: another waits up to a second for the
// file lock, then fails.
func OpenFile(dir string) (*File, error) {
	if err := os.MkdirAll(dir, 0o700); err != nil {
		return nil, fmt.Errorf("store: state directory: %w", err)
	}
	path := filepath.Join(dir, FileName)
	db, err := bolt.Open(path, 0o600, &bolt.Options{Timeout: time.Second})
	if err != nil {
		if errors.Is(err, bolterrors.ErrTimeout) {
			return nil, fmt.Errorf("store: %s is in use by another process", path)
		}
		return nil, fmt.Errorf("store: open %s: %w", path, err)
	}
	if err := db.Update(func(tx *bolt.Tx) error {
		_, err := tx.CreateBucketIfNotExists(bucket)
		return err
	}); err != nil {
		_ = db.Close()
		return nil, fmt.Errorf("store: open %s: %w", path, err)
	}
	return &File{db: db, now: time.Now}, nil
}

// Put implements Store.
func (f *File) Put(ctx context.Context, id string, rec Record) error {
	if err := checkPut(id, rec); err != nil {
		return err
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	return f.db.Update(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucket)
		now := micro(f.now())
		if v := b.Get([]byte(id)); v != nil {
			cur, err := decode(v, false)
			if err != nil {
				return fmt.Errorf("store: record %q: %w", id, err)
			}
			if !mayReplace(cur, rec, now) {
				return ErrConflict
			}
		}
		rec.Updated = now
		return b.Put([]byte(id), encode(rec))
	})
}

// Get implements Store.
func (f *File) Get(ctx context.Context, id string) (Record, error) {
	if err := checkID(id); err != nil {
		return Record{}, err
	}
	if err := ctx.Err(); err != nil {
		return Record{}, err
	}
	var rec Record
	err := f.db.View(func(tx *bolt.Tx) error {
		v := tx.Bucket(bucket).Get([]byte(id))
		if v == nil {
			return ErrNotFound
		}
		var err error
		rec, err = decode(v, true)
		if err != nil {
			return fmt.Errorf("store: record %q: %w", id, err)
		}
		return nil
	})
	return rec, err
}

// Renew implements Store.
func (f *File) Renew(ctx context.Context, id, owner string, until time.Time) error {
	if err := checkRenew(id, owner); err != nil {
		return err
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	return f.db.Update(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucket)
		v := b.Get([]byte(id))
		if v == nil {
			return ErrNotFound
		}
		cur, err := decode(v, true)
		if err != nil {
			return fmt.Errorf("store: record %q: %w", id, err)
		}
		if !mayRenew(cur, owner) {
			return ErrConflict
		}
		cur.LeaseUntil, cur.Updated = micro(until), micro(f.now())
		return b.Put([]byte(id), encode(cur))
	})
}

// Delete implements Store.
func (f *File) Delete(ctx context.Context, id string) error {
	if err := checkID(id); err != nil {
		return err
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	return f.db.Update(func(tx *bolt.Tx) error { return tx.Bucket(bucket).Delete([]byte(id)) })
}

// DeleteReleased implements Store.
func (f *File) DeleteReleased(ctx context.Context, id string, updated time.Time) (bool, error) {
	if err := checkID(id); err != nil {
		return false, err
	}
	if err := ctx.Err(); err != nil {
		return false, err
	}
	done := false
	err := f.db.Update(func(tx *bolt.Tx) error {
		b := tx.Bucket(bucket)
		v := b.Get([]byte(id))
		if v == nil {
			return nil
		}
		cur, err := decode(v, false)
		if err != nil {
			return fmt.Errorf("store: record %q: %w", id, err)
		}
		if !cur.LeaseUntil.IsZero() || !cur.Updated.Equal(micro(updated)) {
			return nil
		}
		done = true
		return b.Delete([]byte(id))
	})
	return done, err
}

// Sweep implements Store. It reads every record's header in one
// transaction.
func (f *File) Sweep(ctx context.Context, before time.Time) (int, error) {
	if err := ctx.Err(); err != nil {
		return 0, err
	}
	n := 0
	err := f.db.Update(func(tx *bolt.Tx) error {
		now := micro(f.now())
		b := tx.Bucket(bucket)
		var doomed [][]byte
		err := b.ForEach(func(k, v []byte) error {
			cur, err := decode(v, false)
			if err != nil {
				return fmt.Errorf("store: record %q: %w", k, err)
			}
			if cur.Updated.Before(before) && (cur.LeaseUntil.IsZero() || !cur.LeaseUntil.After(now)) {
				doomed = append(doomed, append([]byte{}, k...))
			}
			return nil
		})
		if err != nil {
			return err
		}
		for _, k := range doomed {
			if err := b.Delete(k); err != nil {
				return err
			}
		}
		n = len(doomed)
		return nil
	})
	if err != nil {
		return 0, err
	}
	return n, nil
}

// Close implements Store.
func (f *File) Close() error { return f.db.Close() }

// The value layout (little endian):
//
//	version  1 byte (1)
//	seq      8 bytes
//	updated  8 bytes, Unix microseconds
//	lease    8 bytes, Unix microseconds, 0 for none
//	ownerLen 2 bytes
//	owner    ownerLen bytes
//	crc      4 bytes, CRC-32C of everything else (header, owner and state)
//	state    the rest
const (
	layoutVersion = 1
	headerBytes   = 1 + 8 + 8 + 8 + 2
)

var castagnoli = crc32.MakeTable(crc32.Castagnoli)

func encode(r Record) []byte {
	v := make([]byte, headerBytes+len(r.Owner)+4+len(r.State))
	v[0] = layoutVersion
	binary.LittleEndian.PutUint64(v[1:], r.Seq)
	binary.LittleEndian.PutUint64(v[9:], uint64(unixMicro(r.Updated)))
	binary.LittleEndian.PutUint64(v[17:], uint64(unixMicro(r.LeaseUntil)))
	binary.LittleEndian.PutUint16(v[25:], uint16(len(r.Owner)))
	o := headerBytes + copy(v[headerBytes:], r.Owner)
	copy(v[o+4:], r.State)
	sum := crc32.Update(crc32.Checksum(v[:o], castagnoli), castagnoli, v[o+4:])
	binary.LittleEndian.PutUint32(v[o:], sum)
	return v
}

// decode parses a stored value; with state, it checks the checksum and
// copies the state out (bbolt's memory is valid only inside the
// transaction).
func decode(v []byte, state bool) (Record, error) {
	if len(v) < headerBytes+4 || v[0] != layoutVersion {
		return Record{}, errors.New("unknown layout")
	}
	n := int(binary.LittleEndian.Uint16(v[25:]))
	o := headerBytes + n
	if len(v) < o+4 {
		return Record{}, errors.New("truncated")
	}
	r := Record{
		Seq:        binary.LittleEndian.Uint64(v[1:]),
		Updated:    fromMicro(int64(binary.LittleEndian.Uint64(v[9:]))),
		LeaseUntil: fromMicro(int64(binary.LittleEndian.Uint64(v[17:]))),
		Owner:      string(v[headerBytes:o]),
	}
	if state {
		sum := crc32.Update(crc32.Checksum(v[:o], castagnoli), castagnoli, v[o+4:])
		if sum != binary.LittleEndian.Uint32(v[o:]) {
			return Record{}, errors.New("checksum mismatch")
		}
		r.State = append([]byte{}, v[o+4:]...)
	}
	return r, nil
}

func unixMicro(t time.Time) int64 {
	if t.IsZero() {
		return 0
	}
	return t.UnixMicro()
}

func fromMicro(us int64) time.Time {
	if us == 0 {
		return time.Time{}
	}
	return time.UnixMicro(us).UTC()
}
