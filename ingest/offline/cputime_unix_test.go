//go:build unix

package offline_test

import (
	"syscall"
	"time"
)

// processCPU returns the CPU time (user and system) the process has used.
// Benchmarks report it per sample beside the wall time: on a shared machine
// the wall time also counts the time the benchmark waited for a core.
func processCPU() time.Duration {
	var ru syscall.Rusage
	if syscall.Getrusage(syscall.RUSAGE_SELF, &ru) != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}
