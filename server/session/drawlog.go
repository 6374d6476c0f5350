package session

import (
	"context"
	"errors"
	"fmt"
	"sync"
)

// DrawLog keeps the most recent kept draws of one session, numbered by
// sequence, so that consumers other than the session's client can follow
// it and resume after a disconnect with no loss and no duplicate. It holds
// at most its capacity in rows (a ring that starts at initialLogRows and
// doubles as it fills, so a short session never holds the whole
// capacity); a reader asking for rows already
// dropped gets an error saying so, never a silent gap. Safe for concurrent
// use: the engine appends, any number of readers read.
type DrawLog struct {
	dim, capRows int

	mu     sync.Mutex
	vals   []float64 // size×dim ring, size = len(chains) ≤ capRows
	chains []int
	iters  []int64
	first  uint64 // sequence number of the oldest row kept
	next   uint64 // sequence number of the next row appended
	wake   chan struct{}
	done   bool
	final  Finished
}

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
	return &DrawLog{dim: dim, capRows: capacity, vals: make([]float64, n*dim),
		chains: make([]int, n), iters: make([]int64, n), wake: make(chan struct{})}
}

// initialLogRows is the ring's first size.
const initialLogRows = 256

// Bytes is the memory the ring holds now.
func (l *DrawLog) Bytes() int64 {
	l.mu.Lock()
	defer l.mu.Unlock()
	return int64(len(l.chains)) * int64(8*l.dim+16)
}

// grow doubles the ring (within the capacity), keeping every row at the
// index its sequence number maps to in the new size.
func (l *DrawLog) grow() {
	old := len(l.chains)
	n := min(2*old, l.capRows)
	vals, chains, iters := make([]float64, n*l.dim), make([]int, n), make([]int64, n)
	for q := l.first; q < l.next; q++ {
		i, j := int(q%uint64(old)), int(q%uint64(n))
		copy(vals[j*l.dim:(j+1)*l.dim], l.vals[i*l.dim:(i+1)*l.dim])
		chains[j], iters[j] = l.chains[i], l.iters[i]
	}
	l.vals, l.chains, l.iters = vals, chains, iters
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
		copy(l.vals[i*l.dim:(i+1)*l.dim], d.Values[r*l.dim:(r+1)*l.dim])
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
				copy(d.Values[r*l.dim:], l.vals[i*l.dim:(i+1)*l.dim])
				d.Chains[r], d.Iterations[r] = l.chains[i], l.iters[i]
			}
			l.mu.Unlock()
			return d, nil
		}
		if l.done {
			l.mu.Unlock()
			return Draws{}, ErrLogClosed
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
