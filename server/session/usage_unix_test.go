//go:build unix

package session

import (
	"syscall"
	"time"
)

// processUsage returns the process's CPU time and minor page faults so
// far; ok is false where they cannot be read.
func processUsage() (cpu time.Duration, faults int64, ok bool) {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0, 0, false
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano()), int64(ru.Minflt), true
}
