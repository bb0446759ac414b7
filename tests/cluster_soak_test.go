//go:build soak

package tests

import (
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"trapline/alerts"
	"trapline/internal/freeport"
)

// procCPU returns the user+system CPU seconds and the peak resident memory
// (MiB) of a process, from /proc.
func procCPU(pid int) (cpuS, peakMiB float64) {
	if b, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", pid)); err == nil {
		f := strings.Fields(string(b[strings.LastIndexByte(string(b), ')')+2:]))
		if len(f) > 12 {
			u, _ := strconv.ParseFloat(f[11], 64)
			s, _ := strconv.ParseFloat(f[12], 64)
			cpuS = (u + s) / 100 // clock ticks of 10 ms
		}
	}
	if b, err := os.ReadFile(fmt.Sprintf("/proc/%d/status", pid)); err == nil {
		for _, l := range strings.Split(string(b), "\n") {
			if v, ok := strings.CutPrefix(l, "VmHWM:"); ok {
				kb, _ := strconv.ParseFloat(strings.TrimSuffix(strings.TrimSpace(v), " kB"), 64)
				peakMiB = kb / 1024
			}
		}
	}
	return cpuS, peakMiB
}

// TestClusterSoak plays TRAPLINE_CLUSTER_SOAK_STREAMS streams (default 1000) at
// 100 Hz for TRAPLINE_CLUSTER_SOAK_SECONDS (default 300) through an edge, a
// three-node cluster and two workers (the edge and the workers as child
// processes), and reports throughput, CPU, memory and the latency from the
// samples being stored to the alert arriving. Run it with
//
//	go test -tags soak -run TestClusterSoak -timeout 30m -v ./tests/
func TestClusterSoak(t *testing.T) {
	streams := envInt("TRAPLINE_CLUSTER_SOAK_STREAMS", 1000)
	secs := envInt("TRAPLINE_CLUSTER_SOAK_SECONDS", 300)
	// 20 messages/s per stream of about 150 bytes stored: 1000 streams for
	// 5 minutes is about 1 GB per node besides the breath stream's 512 MiB.
	clusterMaxStore = 8 << 30
	c := startCluster(t)
	dir := t.TempDir()
	// Dynamic hyperinflation raises air trapping from the start: alerts to
	// time. Every stream plays the same recording.
	rec := simFile(t, dir, "hyper", "hyperinflation", time.Duration(secs+60)*time.Second)
	var edge strings.Builder
	edgeHTTP := fmt.Sprintf("127.0.0.1:%d", freeport.Take(t))
	fmt.Fprintf(&edge, "role: edge\ndata_dir: %s\nhttp: {listen: \"%s\"}\nlog: {level: warn}\nnats: {url: \"%s\"}\nscaleout: {partitions: 16}\nstreams:\n",
		filepath.Join(dir, "edge"), edgeHTTP, c.urls())
	for i := range streams {
		fmt.Fprintf(&edge, "  - id: bed-%04d\n    source: file://%s?pace=realtime\n", i, rec)
	}
	edgeCfg := writeConfig(t, edge.String())
	var workers []*daemonProcess
	nc, err := nats.Connect(c.urls(), nats.MaxReconnects(-1))
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()

	var breaths atomic.Int64
	var mu sync.Mutex
	var lat []float64
	if _, err := nc.Subscribe("trapline.breath.>", func(*nats.Msg) { breaths.Add(1) }); err != nil {
		t.Fatal(err)
	}
	if _, err := nc.Subscribe("trapline.alert.>", func(m *nats.Msg) {
		var ev alerts.Event
		if json.Unmarshal(m.Data, &ev) == nil && ev.Class != "technical" {
			mu.Lock()
			lat = append(lat, time.Since(ev.Time).Seconds())
			mu.Unlock()
		}
	}); err != nil {
		t.Fatal(err)
	}
	for _, id := range []string{"w1", "w2"} {
		cfg := writeConfig(t, fmt.Sprintf(`role: worker
data_dir: %s
http: {listen: ""}
log: {level: warn}
nats: {url: "%s", replicas: 3}
scaleout: {partitions: 16, worker_id: %s}
`, filepath.Join(dir, id), c.urls(), id))
		workers = append(workers, startDaemonProcess(t, "run", "-c", cfg))
	}
	time.Sleep(3 * time.Second) // bounded: let the workers join
	var ru0 syscall.Rusage
	_ = syscall.Getrusage(syscall.RUSAGE_SELF, &ru0)
	start := time.Now()
	ep := startDaemonProcess(t, "run", "-c", edgeCfg)

	// In the middle, one node is shut down and restarted 10 s later.
	time.Sleep(time.Duration(secs/2) * time.Second) // bounded: the first half
	c.restartNode(t, 1, 10*time.Second)
	back := time.Now()
	if pollUntil(3*time.Minute, func() bool { return c.srv[1].JetStreamIsCurrent() }) {
		t.Logf("restarted node current again %.1f s after its restart", time.Since(back).Seconds())
	} else {
		t.Log("restarted node not current 3 min after its restart")
	}
	time.Sleep(time.Until(start.Add(time.Duration(secs) * time.Second))) // bounded: the rest
	elapsed := time.Since(start).Seconds()
	var ru1 syscall.Rusage
	_ = syscall.Getrusage(syscall.RUSAGE_SELF, &ru1)
	edgeCPU, edgeMem := procCPU(ep.cmd.Process.Pid)
	var wCPU, wMem []float64
	for _, w := range workers {
		c, m := procCPU(w.cmd.Process.Pid)
		wCPU, wMem = append(wCPU, c), append(wMem, m)
	}
	js, _ := nc.JetStream()
	si, err := js.StreamInfo("TRAPLINE_SAMPLES")
	if err != nil {
		t.Fatal(err)
	}
	var edgeMetrics string
	if resp, err := http.Get("http://" + edgeHTTP + "/metrics"); err == nil {
		b, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		edgeMetrics = string(b)
	}
	_ = ep.stop(30 * time.Second)
	// Nothing lost: every stream's batches stored once each, without a gap,
	// and the edge neither failed nor dropped a message.
	var seqs map[string]map[uint64]int
	var perStream map[string]int
	// Read back through a node whose JetStream is current: a node that is
	// still recovering its store answers its clients' API requests with no
	// responders.
	if !pollUntil(3*time.Minute, func() bool {
		rc, cerr := nats.Connect(c.currentURL())
		if cerr != nil {
			err = cerr
			return false
		}
		defer rc.Close()
		perStream, seqs, err = storedSamples(t.Context(), jsNew(t, rc), 5*time.Minute)
		return err == nil
	}) {
		t.Errorf("read the samples stream: %v", err)
	}
	for id, q := range seqs {
		checkBatches(t, id, q)
	}
	for _, m := range []string{"trapline_edge_messages_failed_total", "trapline_edge_batches_dropped_total"} {
		if v := metricValue(edgeMetrics, m); v != 0 {
			t.Errorf("edge %s = %v, want 0", m, v)
		}
	}
	t.Logf("edge: sent %.0f, acknowledged %.0f, retried %.0f; %d streams with every batch stored once",
		metricValue(edgeMetrics, "trapline_edge_messages_sent_total"), metricValue(edgeMetrics, "trapline_edge_messages_acknowledged_total"),
		metricValue(edgeMetrics, "trapline_edge_messages_retried_total"), len(seqs))
	for _, w := range workers {
		_ = w.stop(30 * time.Second)
	}
	tv := func(tv syscall.Timeval) float64 { return float64(tv.Sec) + float64(tv.Usec)/1e6 }
	clusterCPU := tv(ru1.Utime) + tv(ru1.Stime) - tv(ru0.Utime) - tv(ru0.Stime)

	mu.Lock()
	sort.Float64s(lat)
	q := func(p float64) float64 {
		if len(lat) == 0 {
			return 0
		}
		return lat[min(len(lat)-1, int(p*float64(len(lat))))]
	}
	mu.Unlock()
	samples := 0.0 // counted in the stream (a message holds one batch or several)
	for _, n := range perStream {
		samples += float64(n)
	}
	t.Logf("streams %d at 100 Hz for %.0f s", streams, elapsed)
	t.Logf("samples stream: %d messages (%.0f samples/s of %d offered, %.1f MB/s stored)", si.State.Msgs, samples/elapsed, streams*100, float64(si.State.Bytes)/elapsed/1e6)
	t.Logf("breaths published: %d (%.0f/s)", breaths.Load(), float64(breaths.Load())/elapsed)
	t.Logf("CPU: cluster+test process %.0f%%, edge %.0f%%, workers %.0f%% and %.0f%% of one core",
		100*clusterCPU/elapsed, 100*edgeCPU/elapsed, 100*wCPU[0]/elapsed, 100*wCPU[1]/elapsed)
	t.Logf("peak memory: edge %.0f MiB, workers %.0f and %.0f MiB", edgeMem, wMem[0], wMem[1])
	t.Logf("samples stored → alert received: %d alerts, p50 %.3f s, p99 %.3f s", len(lat), q(0.5), q(0.99))
	if breaths.Load() == 0 || len(lat) == 0 {
		t.Error("no breath or no alert came through")
	}
	if samples/elapsed < 0.9*float64(streams*100) { // the start of 1000 sources takes seconds
		t.Errorf("stored %.0f samples/s, offered %d: the cluster did not keep up", samples/elapsed, streams*100)
	}
	if strings.Contains(ep.out.String(), "not stored") {
		t.Errorf("JetStream refused samples from the edge:\n%s", ep.out.String())
	}
}

// jsNew returns a JetStream context on nc.
// currentURL returns the client URL of a running node whose JetStream is
// current, or of every node when none is.
func (c *cluster) currentURL() string {
	for _, s := range c.srv {
		if s != nil && s.Running() && s.JetStreamIsCurrent() {
			return s.ClientURL()
		}
	}
	return c.urls()
}

func jsNew(t *testing.T, nc *nats.Conn) jetstream.JetStream {
	t.Helper()
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	return js
}
