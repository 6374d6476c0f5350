package server

import (
	"bufio"
	"os"
	"runtime/debug"
	"strconv"
	"strings"
	"sync"
	"time"

	"sluice/server/metrics"
	"sluice/server/session"
)

// memoryPool is the server's memory budget: every session reserves its
// worst case (session.Budget) at registration and releases it when it
// ends; a finished session's follow ring stays reserved until its
// retention passes.
type memoryPool struct {
	mu          sync.Mutex
	total, used int64
	metrics     *metrics.Metrics // the gauge of the budget in use (nil: none)
}

// reserve takes n bytes; false (and nothing taken) when fewer are left.
func (p *memoryPool) reserve(n int64) bool {
	p.mu.Lock()
	defer p.mu.Unlock()
	if n > p.total-p.used {
		return false
	}
	p.used += n
	p.metrics.MemoryInUse(p.used)
	return true
}

// release gives back n bytes taken by reserve.
func (p *memoryPool) release(n int64) {
	p.mu.Lock()
	defer p.mu.Unlock()
	p.used -= n
	if p.used < 0 {
		panic("server: memory pool released more than it reserved")
	}
	p.metrics.MemoryInUse(p.used)
}

// left returns the bytes not reserved.
func (p *memoryPool) left() int64 {
	p.mu.Lock()
	defer p.mu.Unlock()
	return p.total - p.used
}

// Used returns the bytes the server's sessions have reserved (running
// sessions' worst cases and retained follow rings).
func (s *Server) Used() int64 {
	s.mem.mu.Lock()
	defer s.mem.mu.Unlock()
	return s.mem.used
}

// fallbackMemory is the total budget when physical memory is unknown.
const fallbackMemory = 4 << 30

// DefaultMaxMemory is Options.MaxMemoryBytes's default: half of the
// machine's physical memory (MemTotal of /proc/meminfo), or 4 GiB where
// it cannot be read. The other half is left to the garbage collector's
// headroom (the heap may reach about twice its live size at the default
// GOGC), gRPC's buffers and the rest of the machine.
func DefaultMaxMemory() int64 {
	if n := physicalMemory(); n > 0 {
		return n / 2
	}
	return fallbackMemory
}

// physicalMemory reads MemTotal from /proc/meminfo; 0 when unavailable.
func physicalMemory() int64 {
	f, err := os.Open("/proc/meminfo")
	if err != nil {
		return 0
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		fields := strings.Fields(sc.Text())
		if len(fields) >= 3 && fields[0] == "MemTotal:" && fields[2] == "kB" {
			kb, err := strconv.ParseInt(fields[1], 10, 64)
			if err != nil || kb <= 0 {
				return 0
			}
			return kb << 10
		}
	}
	return 0
}

// Budget returns what a session registered with spec would reserve from
// the server's memory budget, or its refusal.
func (s *Server) Budget(spec session.Spec) (session.Budget, error) {
	return session.Need(spec, s.opts.Limits)
}

// MemoryLimit returns the server's memory budget (Options.MaxMemoryBytes
// after defaults).
func (s *Server) MemoryLimit() int64 { return s.mem.total }

// idleRelease is how long the server must have had no running session
// (and no follow log left to drop) before it returns freed memory to the
// operating system.
const idleRelease = time.Second

// maybeIdle is called, with s.mu held, whenever a session ends or a
// finished session's log is dropped: once the server has been idle for
// idleRelease, it collects and returns the freed memory to the operating
// system, so that a burst of sessions does not leave the process at its
// peak resident size (the runtime would otherwise keep the heap's
// headroom until its next collection, which an idle server never
// triggers). It runs at most once per idle period.
func (s *Server) maybeIdle() {
	if len(s.active) > 0 {
		return
	}
	if s.idleTimer != nil {
		s.idleTimer.Reset(idleRelease)
		return
	}
	s.idleTimer = time.AfterFunc(idleRelease, func() {
		s.mu.Lock()
		idle := len(s.active) == 0
		s.mu.Unlock()
		if idle {
			debug.FreeOSMemory()
		}
	})
}
