package analyze

import (
	"syscall"
	"testing"
	"time"
)

// cpuTime returns the CPU time this process has used so far. Benchmarks
// report throughput per CPU second beside the usual wall-clock figure, so
// that a figure measured on a shared, busy machine still means something.
func cpuTime() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// reportCPU adds the samples-per-CPU-second metric of a benchmark that
// started at cpu0 and processed n samples.
func reportCPU(b *testing.B, cpu0 time.Duration, n int) {
	if d := cpuTime() - cpu0; d > 0 {
		b.ReportMetric(float64(n)/d.Seconds()/1e6, "Msamples/cpu-s")
	}
}
