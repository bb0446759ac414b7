//go:build soak

package tests

// The ward load test: many streams at 100 Hz carried by connections of 100
// streams each into one multiplexed tcp-listen source of one daemon (a child
// process, so that its CPU time and memory are its own). Run it with
//
//	TRAPLINE_SOAK_STREAMS=1000 TRAPLINE_SOAK_SECONDS=60 \
//	  go test -tags soak -run TestSoakWard -v -timeout 20m ./tests/
//
// TRAPLINE_SOAK_BATCH_WINDOW (the source's batch_window, e.g. 50ms) and
// TRAPLINE_SOAK_MEMORY_LIMIT (the daemon's memory_limit, e.g. 900MiB) set
// the two knobs of a large ward; TRAPLINE_SOAK_CPU_PROFILE=FILE writes the
// daemon's CPU profile, TRAPLINE_SOAK_HEAP_PROFILE=FILE its heap profile at
// the end of the window.
//
// Senders replay a pre-encoded breath (defaultLung) with a per-stream phase,
// paced on the wall clock every 10 ms. A NATS subscriber to the streams of
// the first connection measures the latency from the write of the sample
// that confirms a breath's end (t_end_s + analysis.hold_s) to the arrival
// of the breath record. docs/operations.md lists the figures measured.

import (
	"encoding/json"
	"fmt"
	"io"
	"net"
	"net/http"
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

// wardConn is one sending connection of 100 streams.
type wardConn struct {
	c      int
	ids    []string
	t0     time.Time
	sent   atomic.Int64   // samples written per stream
	writes []atomic.Int64 // unix ns of the write of sample n, at n % len
}

// wardRing is how many samples' write times a connection remembers (20 s).
const wardRing = 2000

func TestSoakWard(t *testing.T) {
	nStreams := envInt("TRAPLINE_SOAK_STREAMS", 1000)
	dur := time.Duration(envInt("TRAPLINE_SOAK_SECONDS", 60)) * time.Second
	const perConn = 100
	lung := defaultLung
	period := int((lung.TiS + lung.TeS) * lung.SampleRateHz)
	// The pressure and flow of every sample of one breath, pre-encoded.
	suffix := make([][]byte, period)
	for k := range suffix {
		line := lung.appendLine(nil, k)
		suffix[k] = line[strings.IndexByte(string(line), ','):]
	}

	dir := t.TempDir()
	natsPort, httpPort, srcPort := freeport.Take(t), freeport.Take(t), freeport.Take(t)
	cfg := fmt.Sprintf(`data_dir: %s
shutdown_timeout: 10s
memory_limit: %s
http:
  listen: 127.0.0.1:%d
  pprof: true
log:
  level: warn
nats:
  embedded:
    port: %d
sources:
  - name: ward
    source: tcp-listen://127.0.0.1:%d?max-clients=1024
    pattern: "c*"
    max_streams: %d
    batch_window: %s
`, dir, envString("TRAPLINE_SOAK_MEMORY_LIMIT", "0"), httpPort, natsPort, srcPort, nStreams+perConn, envString("TRAPLINE_SOAK_BATCH_WINDOW", "0s"))
	cfgPath := filepath.Join(dir, "ward.yaml")
	if err := os.WriteFile(cfgPath, []byte(cfg), 0o600); err != nil {
		t.Fatal(err)
	}
	args := []string{"run", "--config", cfgPath}
	if prof := os.Getenv("TRAPLINE_SOAK_CPU_PROFILE"); prof != "" {
		args = append(args, "--cpu-profile", prof) // written when the daemon stops
	}
	proc := startDaemonProcess(t, args...)
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

	conns := make([]*wardConn, (nStreams+perConn-1)/perConn)
	byID := map[string]*wardConn{}
	for c := range conns {
		wc := &wardConn{c: c, writes: make([]atomic.Int64, wardRing)}
		for j := 0; j < perConn && c*perConn+j < nStreams; j++ {
			id := fmt.Sprintf("c%03d-%02d", c, j)
			wc.ids = append(wc.ids, id)
			byID[id] = wc
		}
		conns[c] = wc
	}
	holdS := 0.05 // analysis.hold_s, default
	var mu sync.Mutex
	var lat []float64
	var breaths atomic.Int64
	handle := func(m *nats.Msg) {
		now := time.Now()
		var b struct {
			Stream string   `json:"stream"`
			EndS   *float64 `json:"t_end_s"`
		}
		if json.Unmarshal(m.Data, &b) != nil || b.EndS == nil {
			return
		}
		wc := byID[b.Stream]
		if wc == nil {
			return
		}
		breaths.Add(1)
		n := confirmingSample(*b.EndS, wardPhase(wc.c, slices.Index(wc.ids, b.Stream), period), period, lung.SampleRateHz, holdS)
		if int64(n) >= wc.sent.Load() || int64(n) < wc.sent.Load()-wardRing/2 {
			return
		}
		w := wc.writes[n%wardRing].Load()
		if w == 0 {
			return
		}
		mu.Lock()
		lat = append(lat, now.Sub(time.Unix(0, w)).Seconds())
		mu.Unlock()
	}
	for _, id := range conns[0].ids {
		sub, err := nc.Subscribe("trapline.breath."+id, handle)
		if err != nil {
			t.Fatal(err)
		}
		_ = sub.SetPendingLimits(-1, -1)
	}

	stop := make(chan struct{})
	var wg sync.WaitGroup
	for c, wc := range conns {
		wg.Add(1)
		go func() {
			defer wg.Done()
			sendWard(t, fmt.Sprintf("127.0.0.1:%d", srcPort), wc, c, suffix, lung.SampleRateHz, stop)
		}()
	}
	// Warm up: every stream admitted and its first breaths out.
	time.Sleep(10 * time.Second)
	pid := proc.cmd.Process.Pid
	start := time.Now()
	cpu0 := procCPUSeconds(t, pid)
	m0 := metricsOf(httpPort)
	timer := time.NewTimer(dur)
	select {
	case <-timer.C:
	case <-proc.done:
		t.Fatalf("daemon exited during the soak:\n%s", proc.out.String())
	}
	cpu := procCPUSeconds(t, pid) - cpu0
	if path := os.Getenv("TRAPLINE_SOAK_HEAP_PROFILE"); path != "" {
		saveURL(t, fmt.Sprintf("http://127.0.0.1:%d/debug/pprof/heap", httpPort), path)
	}
	wall := time.Since(start).Seconds()
	rss, hwm := procMemory(t, pid)
	m1 := metricsOf(httpPort)
	close(stop)
	wg.Wait()
	var sent int64
	for _, wc := range conns {
		sent += wc.sent.Load() * int64(len(wc.ids))
	}
	var got, dropped float64
	var drops string
	waitFor(t, 30*time.Second, "every sample to be counted", func() bool {
		m := metricsOf(httpPort)
		got = m["trapline_samples_total"]
		dropped = m["trapline_queue_dropped_samples_total"] + m["trapline_source_dropped_samples_total"] +
			m["trapline_refused_samples_total"]
		drops = fmt.Sprintf("queue %.0f, source %.0f, refused %.0f", m["trapline_queue_dropped_samples_total"],
			m["trapline_source_dropped_samples_total"], m["trapline_refused_samples_total"])
		return got >= float64(sent)
	})
	if err := proc.stop(30 * time.Second); err != nil {
		t.Error(err)
	}
	mu.Lock()
	slices.Sort(lat)
	p50, p99 := percentile(lat, 0.50), percentile(lat, 0.99)
	mu.Unlock()
	t.Logf("ward: %d streams on %d connections × %.0f Hz for %.0f s: %d samples sent, %.0f read, %.0f dropped or refused",
		nStreams, len(conns), lung.SampleRateHz, wall, sent, got, dropped)
	t.Logf("ward: daemon CPU %.3f cores (%.1f s of %.1f s), %.1f µs per stream-second; RSS %.0f MiB (peak %.0f MiB); goroutines %.0f",
		cpu/wall, cpu, wall, cpu/wall/float64(nStreams)*1e6, rss/1024, hwm/1024, m1["go_goroutines"])
	t.Logf("ward: Go heap in use %.0f MiB, heap objects %.0f, next GC at %.0f MiB",
		m1["go_memstats_heap_inuse_bytes"]/(1<<20), m1["go_memstats_heap_objects"], m1["go_memstats_next_gc_bytes"]/(1<<20))
	t.Logf("ward: breaths %0.f in the window; confirming sample → subscriber latency p50 %.2f ms, p99 %.2f ms (%d breaths of %d streams)",
		m1["trapline_breaths_total"]-m0["trapline_breaths_total"], p50*1000, p99*1000, len(lat), len(conns[0].ids))
	if dropped != 0 {
		t.Errorf("%.0f samples dropped or refused (%s), want none", dropped, drops)
	}
	if cpu/wall >= 1 {
		t.Errorf("daemon used %.2f cores, want less than 1", cpu/wall)
	}
	if hwm >= 1<<20 {
		t.Errorf("daemon peak RSS %.0f MiB, want less than 1 GiB", hwm/1024)
	}
}

// sendWard connects to the source and writes the samples of its streams
// as their time comes, every 10 ms, until stop closes.
func sendWard(t *testing.T, addr string, wc *wardConn, c int, suffix [][]byte, rateHz float64, stop <-chan struct{}) {
	conn, err := net.Dial("tcp", addr)
	for k := 0; err != nil && k < 100; k++ {
		time.Sleep(100 * time.Millisecond)
		conn, err = net.Dial("tcp", addr)
	}
	if err != nil {
		t.Errorf("connection %d: %v", c, err)
		return
	}
	defer conn.Close()
	if _, err := conn.Write([]byte("stream,time[s],pressure[cmH2O],flow[L/min]\n")); err != nil {
		return
	}
	prefix := make([][]byte, len(wc.ids))
	phase := make([]int, len(wc.ids))
	for j, id := range wc.ids {
		prefix[j] = []byte(id + ",")
		phase[j] = wardPhase(c, j, len(suffix))
	}
	wc.t0 = time.Now()
	tick := time.NewTicker(10 * time.Millisecond)
	defer tick.Stop()
	buf := make([]byte, 0, 64<<10)
	n := 0
	for {
		select {
		case <-stop:
			return
		case now := <-tick.C:
			due := int(now.Sub(wc.t0).Seconds() * rateHz)
			buf = buf[:0]
			first := n
			for ; n <= due; n++ {
				ts := strconv.AppendFloat(nil, float64(n)/rateHz, 'f', 3, 64)
				for j := range prefix {
					buf = append(buf, prefix[j]...)
					buf = append(buf, ts...)
					buf = append(buf, suffix[(n+phase[j])%len(suffix)]...)
				}
			}
			// A daemon that stopped reading must not hold the test.
			_ = conn.SetWriteDeadline(time.Now().Add(10 * time.Second))
			if _, err := conn.Write(buf); err != nil {
				return
			}
			w := time.Now().UnixNano()
			for k := first; k < n; k++ {
				wc.writes[k%wardRing].Store(w)
			}
			wc.sent.Store(int64(n))
		}
	}
}

// wardPhase is the offset in samples of stream j of connection c into the
// breath, so that the streams' breaths do not all end at once.
func wardPhase(c, j, period int) int { return (j*37 + c*11) % period }

// confirmingSample returns the number of the sample that confirmed the
// start of the inspiration at tEndS: the breath's first sample above the
// trigger is the one where the replayed breath starts over, and the start is
// confirmed by the first sample at least holdS after it, as the analyzer
// compares times.
func confirmingSample(tEndS float64, phase, period int, rateHz, holdS float64) int {
	k := int((tEndS*rateHz+float64(phase))/float64(period) + 0.5)
	first := k*period - phase
	n := first
	for float64(n)/rateHz-float64(first)/rateHz < holdS {
		n++
	}
	return n
}

// saveURL writes what url serves to path.
func saveURL(t *testing.T, url, path string) {
	t.Helper()
	resp, err := http.Get(url)
	if err != nil {
		t.Errorf("GET %s: %v", url, err)
		return
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Errorf("GET %s: %v", url, err)
		return
	}
	if err := os.WriteFile(path, b, 0o644); err != nil {
		t.Error(err)
	}
}
