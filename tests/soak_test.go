//go:build soak

package tests

// The load test: many simulated streams at 100 Hz over loopback TCP into one
// daemon (a child process, so that its CPU time and memory are its own),
// with a NATS subscriber measuring the latency from the end of a breath to
// the arrival of its record. Run it with
//
//	go test -tags soak -run TestSoak -v -timeout 10m ./tests/
//
// TRAPLINE_SOAK_STREAMS (default 200) and TRAPLINE_SOAK_SECONDS (default 60)
// change the load. docs/operations.md lists the figures measured.

import (
	"bufio"
	"encoding/json"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"trapline/internal/freeport"
)

func envInt(name string, def int) int {
	if v, err := strconv.Atoi(os.Getenv(name)); err == nil && v > 0 {
		return v
	}
	return def
}

func TestSoak(t *testing.T) {
	nStreams := envInt("TRAPLINE_SOAK_STREAMS", 200)
	dur := time.Duration(envInt("TRAPLINE_SOAK_SECONDS", 60)) * time.Second
	lung := defaultLung

	// One listener per stream: the daemon connects to each (tcp:// source).
	type feed struct {
		id   string
		ln   net.Listener
		t0   atomic.Int64 // wall time of sample 0, unix ns
		sent atomic.Int64
	}
	feeds := make([]*feed, nStreams)
	var cfg strings.Builder
	dir := t.TempDir()
	natsPort, httpPort := freeport.Take(t), freeport.Take(t)
	fmt.Fprintf(&cfg, "data_dir: %s\nshutdown_timeout: 10s\nhttp:\n  listen: 127.0.0.1:%d\nlog:\n  level: warn\n", dir, httpPort)
	fmt.Fprintf(&cfg, "nats:\n  embedded:\n    port: %d\nstreams:\n", natsPort)
	for i := range feeds {
		ln, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		defer ln.Close()
		f := &feed{id: fmt.Sprintf("load-%03d", i), ln: ln}
		feeds[i] = f
		fmt.Fprintf(&cfg, "  - id: %s\n    source: tcp://%s\n", f.id, ln.Addr())
	}
	cfgPath := filepath.Join(dir, "soak.yaml")
	if err := os.WriteFile(cfgPath, []byte(cfg.String()), 0o600); err != nil {
		t.Fatal(err)
	}
	proc := startDaemonProcess(t, "run", "--config", cfgPath)

	// Subscriber: latency from the end of the breath (its t_end_s on the
	// stream's wall clock) to arrival here.
	var nc *nats.Conn
	waitFor(t, 30*time.Second, "the daemon's NATS server", func() bool {
		c, err := nats.Connect(fmt.Sprintf("nats://127.0.0.1:%d", natsPort))
		if err != nil {
			return false
		}
		nc = c
		return true
	})
	defer nc.Close()
	byID := map[string]*feed{}
	for _, f := range feeds {
		byID[f.id] = f
	}
	var mu sync.Mutex
	var lat []float64
	var breaths atomic.Int64
	sub, err := nc.Subscribe("trapline.breath.>", func(m *nats.Msg) {
		now := time.Now()
		var b struct {
			Stream string   `json:"stream"`
			EndS   *float64 `json:"t_end_s"`
		}
		if json.Unmarshal(m.Data, &b) != nil || b.EndS == nil {
			return
		}
		f := byID[b.Stream]
		if f == nil || f.t0.Load() == 0 {
			return
		}
		end := time.Unix(0, f.t0.Load()).Add(time.Duration(*b.EndS * float64(time.Second)))
		breaths.Add(1)
		mu.Lock()
		lat = append(lat, now.Sub(end).Seconds())
		mu.Unlock()
	})
	if err != nil {
		t.Fatal(err)
	}
	defer sub.Unsubscribe()
	_ = sub.SetPendingLimits(-1, -1)

	// Writers: each stream paces its samples on the wall clock, writing
	// every sample whose time has come, every 10 ms.
	stop := make(chan struct{})
	var wg sync.WaitGroup
	for _, f := range feeds {
		wg.Add(1)
		go func() {
			defer wg.Done()
			conn, err := f.ln.Accept()
			if err != nil {
				return
			}
			defer conn.Close()
			w := bufio.NewWriterSize(conn, 4096)
			t0 := time.Now()
			f.t0.Store(t0.UnixNano())
			tick := time.NewTicker(10 * time.Millisecond)
			defer tick.Stop()
			n := 0
			var line []byte
			for {
				select {
				case <-stop:
					return
				case now := <-tick.C:
					due := int(now.Sub(t0).Seconds() * lung.SampleRateHz)
					for ; n <= due; n++ {
						line = lung.appendLine(line[:0], n)
						if _, err := w.Write(line); err != nil {
							return
						}
					}
					if err := w.Flush(); err != nil {
						return
					}
					f.sent.Store(int64(n))
				}
			}
		}()
	}
	start := time.Now()
	cpu0 := procCPUSeconds(t, proc.cmd.Process.Pid)
	timer := time.NewTimer(dur)
	select {
	case <-timer.C:
	case <-proc.done:
		t.Fatalf("daemon exited during the soak:\n%s", proc.out.String())
	}
	cpu := procCPUSeconds(t, proc.cmd.Process.Pid) - cpu0
	wall := time.Since(start).Seconds()
	rss, hwm := procMemory(t, proc.cmd.Process.Pid)
	close(stop)
	wg.Wait()

	var sent int64
	for _, f := range feeds {
		sent += f.sent.Load()
	}
	// Every sent sample must have been read: wait for the counters.
	var got, dropped float64
	waitFor(t, 30*time.Second, "every sample to be counted", func() bool {
		m := metricsOf(httpPort)
		got = m["trapline_samples_total"]
		dropped = m["trapline_queue_dropped_samples_total"] + m["trapline_source_dropped_samples_total"]
		return got >= float64(sent)
	})
	if err := proc.stop(30 * time.Second); err != nil {
		t.Error(err)
	}

	mu.Lock()
	slices.Sort(lat)
	p50, p99 := percentile(lat, 0.50), percentile(lat, 0.99)
	mu.Unlock()
	t.Logf("soak: %d streams × %.0f Hz for %.0f s: %d samples sent, %.0f read, %.0f dropped; %d breaths received",
		nStreams, lung.SampleRateHz, wall, sent, got, dropped, breaths.Load())
	t.Logf("soak: daemon CPU %.2f cores (%.1f s of %.1f s), RSS %.0f MiB (peak %.0f MiB)",
		cpu/wall, cpu, wall, rss/1024, hwm/1024)
	t.Logf("soak: breath end → subscriber latency p50 %.1f ms, p99 %.1f ms", p50*1000, p99*1000)
	if dropped != 0 {
		t.Errorf("%.0f samples dropped, want none", dropped)
	}
	// The first breath of a stream is not reported (the analyzer starts
	// mid-breath) and the last one is still open when the feed stops.
	perStream := int64(wall/(lung.TiS+lung.TeS)) - 2
	if want := int64(nStreams) * perStream; breaths.Load() < want {
		t.Errorf("received %d breaths, want at least %d (%d streams × %d)", breaths.Load(), want, nStreams, perStream)
	}
}

func percentile(sorted []float64, q float64) float64 {
	if len(sorted) == 0 {
		return 0
	}
	return sorted[min(len(sorted)-1, int(q*float64(len(sorted))))]
}

// procCPUSeconds reads user+system CPU time of a process from
// /proc/<pid>/stat (fields 14 and 15, in clock ticks of 1/100 s on Linux).
func procCPUSeconds(t *testing.T, pid int) float64 {
	t.Helper()
	b, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", pid))
	if err != nil {
		t.Fatalf("read stat: %v", err)
	}
	// The command name (field 2) may hold spaces: split after its ')'.
	s := string(b[strings.LastIndexByte(string(b), ')')+2:])
	f := strings.Fields(s)
	ut, _ := strconv.ParseFloat(f[11], 64)
	st, _ := strconv.ParseFloat(f[12], 64)
	return (ut + st) / 100
}

// procMemory returns VmRSS and VmHWM of a process in KiB.
func procMemory(t *testing.T, pid int) (rss, hwm float64) {
	t.Helper()
	b, err := os.ReadFile(fmt.Sprintf("/proc/%d/status", pid))
	if err != nil {
		t.Fatalf("read status: %v", err)
	}
	for _, l := range strings.Split(string(b), "\n") {
		f := strings.Fields(l)
		if len(f) < 2 {
			continue
		}
		v, _ := strconv.ParseFloat(f[1], 64)
		switch f[0] {
		case "VmRSS:":
			rss = v
		case "VmHWM:":
			hwm = v
		}
	}
	return rss, hwm
}

// envString returns the environment variable name, or def when it is empty.
func envString(name, def string) string {
	if v := os.Getenv(name); v != "" {
		return v
	}
	return def
}
