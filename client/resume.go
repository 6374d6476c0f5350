package client

import (
	"context"
	"errors"
	"strings"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
)

// ResumePolicy bounds how Run and Follow resume a session whose stream
// broke (status UNAVAILABLE, or a reset stream): up to Attempts tries in a
// row, waiting First, 2·First, 4·First, ... but never more than MaxWait
// between two. A try that gets the session back resets the count.
type ResumePolicy struct {
	// Attempts is the most consecutive tries (0 means 10; negative: never
	// resume).
	Attempts int
	// First is the first wait (0 means 100 ms); MaxWait caps every wait
	// (0 means 5 s).
	First, MaxWait time.Duration
}

// WithResume sets how Run and Follow resume after a broken stream. By
// default they resume (ResumePolicy's zero value): a session continues
// from the server's latest checkpoint, with no draw lost or repeated, when
// the server keeps state (sluice serve --state-dir or --state-postgres).
func WithResume(p ResumePolicy) Option { return func(c *config) { c.resume = p } }

func (p ResumePolicy) withDefaults() ResumePolicy {
	if p.Attempts == 0 {
		p.Attempts = 10
	}
	if p.First <= 0 {
		p.First = 100 * time.Millisecond
	}
	if p.MaxWait <= 0 {
		p.MaxWait = 5 * time.Second
	}
	return p
}

// wait sleeps before try n (0-based), or returns ctx's error.
func (p ResumePolicy) wait(ctx context.Context, n int) error {
	d := p.First
	for i := 0; i < n && d < p.MaxWait; i++ {
		d *= 2
	}
	t := time.NewTimer(min(d, p.MaxWait))
	defer t.Stop()
	select {
	case <-t.C:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}

// errStreamEnded is a stream that closed without a status or a finished
// frame.
var errStreamEnded = errors.New("client: stream ended without a finished frame")

// resumable reports whether err is a broken stream worth resuming after:
// UNAVAILABLE (the server went away, restarts, or shuts down having
// checkpointed the session), a reset stream, or an end without a final
// frame; never when ctx itself ended.
func resumable(ctx context.Context, err error) bool {
	if err == nil || ctx.Err() != nil {
		return false
	}
	if errors.Is(err, errStreamEnded) {
		return true
	}
	s, ok := status.FromError(err)
	if !ok {
		return false
	}
	switch s.Code() {
	case codes.Unavailable:
		return true
	case codes.Internal, codes.Unknown:
		m := s.Message()
		return strings.Contains(m, "RST_STREAM") || strings.Contains(m, "stream reset") || strings.Contains(m, "connection reset")
	}
	return false
}
