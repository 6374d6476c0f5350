package session

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"sync"
	"time"
)

// DrawLog keeps the most recent kept draws of one session, numbered by
// sequence, so that consumers other than the session's client can follow
// it and resume after a disconnect with no loss and no duplicate. It holds
// at most its capacity in rows (a ring that starts at initialLogRows and
// doubles as it fills, so a short session never holds the whole
// capacity); a reader asking for rows already
// dropped gets an error saying so, never a silent gap. Safe for concurrent
// use: the engine appends, any number of readers read.
//
// Besides the draws it keeps what a follower needs to show the run: the
// session's Header, and its latest progress reports, each placed at the
// sequence number the draws had reached when it was made, so a reader
// gets draws and reports in the order the session produced them
// (ReadEvent).
type DrawLog struct {
	dim, capRows int
	head         Header

	mu     sync.Mutex
	vals   [][]float64 // the ring's values, size×dim, in chunks of logChunkRows rows (the last may be shorter)
	chains []int       // size = len(chains) ≤ capRows rows
	iters  []int64
	first  uint64 // sequence number of the oldest row kept
	next   uint64 // sequence number of the next row appended
	wake   chan struct{}
	done   bool
	final  Finished
	// suspended is set when the session stopped at a checkpoint without
	// finishing (checkpoint.go).
	suspended bool
	// reports is a ring of the latest progressKept reports; report n (0
	// for the session's first) is at reports[n%progressKept].
	reports  [progressKept]placedProgress
	nReports uint64
}

// progressKept is how many of its latest progress reports a DrawLog
// keeps: a follower that falls further behind skips the older ones
// (never draws).
const progressKept = 8

// placedProgress is a progress report and the sequence number of the
// next draw when it was made.
type placedProgress struct {
	at uint64
	p  Progress
}

// Header is what a follower learns of a session before its draws: what it
// samples and the budget it was given, as registered.
type Header struct {
	SessionID          string
	Dim, Chains        int
	Kernel             string
	Names              []string
	Step               float64
	Seed               uint64
	BurnIn, KeepEvery  int64
	DrawsPerChain      int64
	MaxEvaluations     int64
	MaxTime            time.Duration
	EvaluationsPerStep int
	Wants              Wants
}

// header is the session's Header, for its draw log.
func (s *Session) header() Header {
	sp := &s.spec
	return Header{SessionID: s.id, Dim: sp.Dim, Chains: sp.Chains, Kernel: sp.Kernel, Names: slices.Clone(sp.Names),
		Step: sp.Step, Seed: sp.Seed, BurnIn: sp.BurnIn, KeepEvery: sp.KeepEvery, DrawsPerChain: sp.DrawsPerChain,
		MaxEvaluations: sp.MaxEvaluations, MaxTime: sp.MaxTime, EvaluationsPerStep: s.kernel.EvaluationsPerStep(),
		Wants: sp.Wants}
}

// Header is the followed session's header.
func (l *DrawLog) Header() Header { return l.head }

// ErrDrawsDropped is wrapped by the error Read returns when the rows asked
// for have left the log.
var ErrDrawsDropped = errors.New("session: draws no longer kept")

// ErrLogClosed is returned by Read once the session has finished and every
// row from the requested sequence number on has been read.
var ErrLogClosed = errors.New("session: session finished")

// NewDrawLog returns an empty log for draws of dimension dim keeping at
// most capacity rows.
func NewDrawLog(dim, capacity int) *DrawLog {
	if dim < 1 || capacity < 1 {
		panic(fmt.Sprintf("session: DrawLog of dim %d, capacity %d", dim, capacity))
	}
	n := min(capacity, initialLogRows)
	return &DrawLog{dim: dim, capRows: capacity, vals: [][]float64{make([]float64, n*dim)},
		chains: make([]int, n), iters: make([]int64, n), wake: make(chan struct{})}
}

// initialLogRows is the ring's first size; logChunkRows the rows of one
// chunk of its values (the first size, so that the ring's sizes before
// the capacity are whole chunks).
const (
	initialLogRows = 256
	logChunkRows   = initialLogRows
)

// row is the values of ring row i.
func (l *DrawLog) row(i int) []float64 {
	c := l.vals[i/logChunkRows]
	j := (i % logChunkRows) * l.dim
	return c[j : j+l.dim]
}

// Bytes is the memory the ring holds now.
func (l *DrawLog) Bytes() int64 {
	l.mu.Lock()
	defer l.mu.Unlock()
	return int64(len(l.chains)) * int64(8*l.dim+16)
}

// grow doubles the ring (within the capacity), keeping every row at the
// index its sequence number maps to in the new size. While the ring has
// dropped nothing since the start, every row kept is at the index of its
// sequence number in both sizes: the values stay where they are, in their
// chunks, the new rows' chunks are added, and only the small per-row
// arrays are copied. After a restore that started the ring part-way, the
// rows are moved to their new indices.
func (l *DrawLog) grow() {
	old := len(l.chains)
	n := min(2*old, l.capRows)
	chains, iters := make([]int, n), make([]int64, n)
	if l.first == l.next || l.next <= uint64(old) {
		for lo := old; lo < n; lo += logChunkRows {
			l.vals = append(l.vals, make([]float64, (min(n, lo+logChunkRows)-lo)*l.dim))
		}
		copy(chains, l.chains)
		copy(iters, l.iters)
		l.chains, l.iters = chains, iters
		return
	}
	prev := &DrawLog{dim: l.dim, vals: l.vals}
	l.vals = nil
	for lo := 0; lo < n; lo += logChunkRows {
		l.vals = append(l.vals, make([]float64, (min(n, lo+logChunkRows)-lo)*l.dim))
	}
	for q := l.first; q < l.next; q++ {
		i, j := int(q%uint64(old)), int(q%uint64(n))
		copy(l.row(j), prev.row(i))
		chains[j], iters[j] = l.chains[i], l.iters[i]
	}
	l.chains, l.iters = chains, iters
}

// Capacity is the most rows the log keeps.
func (l *DrawLog) Capacity() int { return l.capRows }

// append adds a block of draws; d.Seq must equal the log's next sequence
// number (the engine numbers draws, so anything else is a bug).
func (l *DrawLog) append(d *Draws) {
	l.mu.Lock()
	defer l.mu.Unlock()
	if d.Seq != l.next {
		panic(fmt.Sprintf("session: DrawLog append at seq %d, want %d", d.Seq, l.next))
	}
	for r := range d.Rows {
		if size := len(l.chains); l.next-l.first >= uint64(size) && size < l.capRows {
			l.grow()
		}
		i := int(l.next % uint64(len(l.chains)))
		copy(l.row(i), d.Values[r*l.dim:(r+1)*l.dim])
		l.chains[i] = d.Chains[r]
		l.iters[i] = d.Iterations[r]
		l.next++
	}
	if l.next-l.first > uint64(l.capRows) {
		l.first = l.next - uint64(l.capRows)
	}
	close(l.wake)
	l.wake = make(chan struct{})
}

// progress records a progress report at the current end of the draws.
// The log keeps its own copy: the engine reuses the report's slices.
func (l *DrawLog) progress(p *Progress) {
	q := *p
	q.Parameters = slices.Clone(p.Parameters)
	q.Targets = slices.Clone(p.Targets)
	q.Kernel.AcceptanceRates = slices.Clone(p.Kernel.AcceptanceRates)
	if p.Bound != nil {
		b := *p.Bound
		q.Bound = &b
	}
	if p.Noise != nil {
		n := *p.Noise
		q.Noise = &n
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	l.reports[l.nReports%progressKept] = placedProgress{at: l.next, p: q}
	l.nReports++
	close(l.wake)
	l.wake = make(chan struct{})
}

// close marks the session finished with f.
func (l *DrawLog) close(f Finished) {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.done {
		return
	}
	l.done, l.final = true, f
	close(l.wake)
}

// Span returns the sequence numbers of the oldest row kept and of the next
// row to come.
func (l *DrawLog) Span() (first, next uint64) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.first, l.next
}

// Finished reports the session's final frame once it has finished.
func (l *DrawLog) Finished() (Finished, bool) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.final, l.done
}

// Read returns up to max rows starting at sequence number from, waiting
// until at least one is available. It returns an error wrapping
// ErrDrawsDropped when from is older than the oldest row kept,
// ErrLogClosed when the session finished and no row at or after from will
// come, or ctx's error. The returned Draws owns its slices.
func (l *DrawLog) Read(ctx context.Context, from uint64, max int) (Draws, error) {
	if max < 1 {
		max = 1
	}
	for {
		l.mu.Lock()
		if from < l.first {
			first := l.first
			l.mu.Unlock()
			return Draws{}, fmt.Errorf("%w: asked from %d, the oldest kept is %d (the log keeps %d rows)", ErrDrawsDropped, from, first, l.capRows)
		}
		if from < l.next {
			n := int(min(l.next-from, uint64(max)))
			d := Draws{Seq: from, Rows: n, Dim: l.dim, Values: make([]float64, n*l.dim), Chains: make([]int, n), Iterations: make([]int64, n)}
			for r := range n {
				i := int((from + uint64(r)) % uint64(len(l.chains)))
				copy(d.Values[r*l.dim:], l.row(i))
				d.Chains[r], d.Iterations[r] = l.chains[i], l.iters[i]
			}
			l.mu.Unlock()
			return d, nil
		}
		if l.done {
			l.mu.Unlock()
			return Draws{}, ErrLogClosed
		}
		if l.suspended {
			l.mu.Unlock()
			return Draws{}, ErrLogSuspended
		}
		wake := l.wake
		l.mu.Unlock()
		select {
		case <-wake:
		case <-ctx.Done():
			return Draws{}, ctx.Err()
		}
	}
}

// Event is one item a follower reads: a block of draws or a progress
// report (exactly one is set).
type Event struct {
	Draws    *Draws
	Progress *Progress
}

// Cursor is where a follower stands: the next draw and the next progress
// report it has not seen. Start it with Cursor.
type Cursor struct {
	Seq    uint64
	report uint64
}

// Cursor returns a reader's starting point at draw from: its first report
// is the latest one made at or before that draw (or the oldest kept, when
// all were made after it), then every later one.
func (l *DrawLog) Cursor(from uint64) Cursor {
	l.mu.Lock()
	defer l.mu.Unlock()
	c := Cursor{Seq: from, report: l.nReports - min(l.nReports, progressKept)}
	for n := l.nReports; n > c.report; n-- {
		if l.reports[(n-1)%progressKept].at <= from {
			c.report = n - 1
			break
		}
	}
	return c
}

// ReadEvent returns the next event at c and advances c past it, waiting
// until one is available: a progress report when one is placed at or
// before c.Seq (reports that have left the log are skipped), else up to
// max draws from c.Seq that do not pass the next report's place. Its
// errors are Read's. The returned values own their slices (a report's
// slices are shared with other readers: read them only).
func (l *DrawLog) ReadEvent(ctx context.Context, c *Cursor, max int) (Event, error) {
	if max < 1 {
		max = 1
	}
	for {
		l.mu.Lock()
		if c.report+progressKept < l.nReports {
			c.report = l.nReports - progressKept
		}
		limit := uint64(max)
		if c.report < l.nReports {
			r := &l.reports[c.report%progressKept]
			if r.at <= c.Seq {
				p := r.p
				c.report++
				l.mu.Unlock()
				return Event{Progress: &p}, nil
			}
			limit = min(limit, r.at-c.Seq)
		}
		if c.Seq < l.first || c.Seq < l.next {
			l.mu.Unlock()
			d, err := l.Read(ctx, c.Seq, int(limit))
			if err != nil {
				return Event{}, err
			}
			c.Seq += uint64(d.Rows)
			return Event{Draws: &d}, nil
		}
		if l.done {
			l.mu.Unlock()
			return Event{}, ErrLogClosed
		}
		if l.suspended {
			l.mu.Unlock()
			return Event{}, ErrLogSuspended
		}
		wake := l.wake
		l.mu.Unlock()
		select {
		case <-wake:
		case <-ctx.Done():
			return Event{}, ctx.Err()
		}
	}
}
