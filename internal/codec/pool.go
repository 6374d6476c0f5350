package codec

import (
	"math/bits"
	"sync"

	"google.golang.org/grpc/mem"
)

// Pool returns gRPC buffers in power-of-two sizes from 256 B to 64 MiB,
// without clearing them. gRPC's default pool jumps from 32 KiB to 1 MiB
// and clears the whole buffer it hands out, so a 51 KB message (64 chains
// × 100 float64) cleared 1 MiB per frame; measured, clearing was a sixth
// of a session's CPU time. gRPC fills every buffer it gets before reading
// it (a received message is read in full, an encoded one written in
// full), which is why it keeps such dirty pools itself for its framer; so
// does Codec.Marshal, which checks that a Sender wrote every byte it
// announced. The server's TestTransportIsTransparent checks bit-identical
// draws through this pool at several message sizes.
func Pool() mem.BufferPool { return bufferPool }

var bufferPool = newPowerPool(8, 26)

// powerPool keeps one sync.Pool per power-of-two capacity.
type powerPool struct {
	lo, hi uint
	pools  []sync.Pool
}

func newPowerPool(lo, hi uint) *powerPool {
	return &powerPool{lo: lo, hi: hi, pools: make([]sync.Pool, hi-lo+1)}
}

// tier returns the index of the smallest tier holding n bytes, or -1.
func (p *powerPool) tier(n int) int {
	e := uint(bits.Len(uint(max(n, 1) - 1)))
	if e < p.lo {
		e = p.lo
	}
	if e > p.hi {
		return -1
	}
	return int(e - p.lo)
}

// Get implements mem.BufferPool.
func (p *powerPool) Get(n int) *[]byte {
	t := p.tier(n)
	if t < 0 {
		b := make([]byte, n)
		return &b
	}
	if b, ok := p.pools[t].Get().(*[]byte); ok {
		*b = (*b)[:n]
		return b
	}
	b := make([]byte, n, 1<<(uint(t)+p.lo))
	return &b
}

// Put implements mem.BufferPool: buffers of a tier's exact capacity go
// back to it, others to the collector.
func (p *powerPool) Put(b *[]byte) {
	c := cap(*b)
	if t := p.tier(c); t >= 0 && c == 1<<(uint(t)+p.lo) {
		p.pools[t].Put(b)
	}
}
