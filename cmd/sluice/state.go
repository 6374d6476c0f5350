package main

import (
	"context"
	"flag"
	"fmt"
	"time"

	"sluice/server"
	"sluice/server/store"
)

// stateFlags say where serve keeps its sessions' checkpoints.
type stateFlags struct {
	dir       string
	postgres  string
	every     time.Duration
	retention time.Duration
	replica   string
	grace     time.Duration
	lease     time.Duration
}

func (f *stateFlags) register(fs *flag.FlagSet) {
	fs.StringVar(&f.dir, "state-dir", "", "keep session checkpoints in this directory (one bbolt file), so that sessions survive a broken stream or a restart and clients can resume them (empty: no checkpoints)")
	fs.StringVar(&f.postgres, "state-postgres", "", "keep session checkpoints in this PostgreSQL database (a postgres:// URL), shared by replicas (instead of --state-dir)")
	fs.DurationVar(&f.every, "checkpoint-every", 30*time.Second, "write each session's checkpoint at the first step boundary after this much wall time since its last (Register.checkpoint_every_steps adds checkpoints by steps; 0: not by time)")
	fs.DurationVar(&f.retention, "retention", 24*time.Hour, "how long a finished or abandoned session's checkpoint is kept after it was written")
	fs.DurationVar(&f.grace, "suspend-grace", server.DefaultSuspendGrace, "how long a session whose client stopped answering (--answer-timeout) stays suspended and resumable with its token before its state is deleted (at most --retention; needs --state-dir or --state-postgres: without them such a session ends, FAILED)")
	fs.DurationVar(&f.lease, "lease", 2*time.Minute, "how long a running session's hold on its checkpoint lasts; renewed every third of it, so another replica can take the session over this long after this server stopped")
	fs.StringVar(&f.replica, "replica", "", "name of this server as holder of its sessions' leases (default: the host name); a restart under the same name takes its sessions back at once")
}

// open opens the store the flags name (nil when none) and returns the
// server's state options.
func (f *stateFlags) open(ctx context.Context) (server.StateOptions, error) {
	if f.every < 0 || f.retention <= 0 || f.grace <= 0 || f.lease <= 0 {
		return server.StateOptions{}, usagef("--checkpoint-every must be >= 0, and --retention, --suspend-grace and --lease > 0")
	}
	var st store.Store
	switch {
	case f.dir != "" && f.postgres != "":
		return server.StateOptions{}, usagef("--state-dir and --state-postgres exclude each other")
	case f.dir != "":
		s, err := store.OpenFile(f.dir)
		if err != nil {
			return server.StateOptions{}, fmt.Errorf("--state-dir: %w", err)
		}
		st = s
	case f.postgres != "":
		s, err := store.OpenPostgres(ctx, f.postgres)
		if err != nil {
			return server.StateOptions{}, fmt.Errorf("--state-postgres: %w", err)
		}
		st = s
	default:
		return server.StateOptions{}, nil
	}
	every := f.every
	if every == 0 {
		every = -1 // StateOptions: negative means not by time
	}
	return server.StateOptions{Store: st, Every: every, Retention: f.retention, Replica: f.replica,
		SuspendGrace: f.grace, Lease: f.lease}, nil
}
