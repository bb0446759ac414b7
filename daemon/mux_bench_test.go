package daemon

import (
	"fmt"
	"net"
	"strconv"
	"testing"
	"time"

	"trapline/config"
	"trapline/ingest"
)

// BenchmarkMuxWard measures the daemon's cost per sample of a multiplexed
// source: one connection of 100 streams (a passive lung each, with a phase
// of its own) into a tcp-listen text source, through admission, the shards,
// the pipelines and the bulletin on an embedded NATS server. One op is one
// sample; the sender's encoding is in the figure too.
func BenchmarkMuxWard(b *testing.B) {
	// A live sender writes every 10 ms: one sample per stream per write.
	b.Run("write=tick", func(b *testing.B) { benchmarkMuxWard(b, 1) })
	// A recording read in large chunks: many samples per stream per read.
	b.Run("write=32KiB", func(b *testing.B) { benchmarkMuxWard(b, 32<<10) })
}

func benchmarkMuxWard(b *testing.B, chunk int) {
	const streams = 100
	cfg := config.Default()
	cfg.DataDir = b.TempDir()
	cfg.HTTP.Listen = ""
	cfg.NATS.Embedded.Port = 0
	cfg.Log.Level = "warn"
	cfg.Sources = []config.Source{{Name: "ward", URL: "tcp-listen://127.0.0.1:0", Pattern: "bed-*"}}
	d := startDaemonWith(b, cfg, Options{}).d
	src := d.mux.sources[0].src
	for src.(ingest.Listener).Addr() == "" {
		time.Sleep(time.Millisecond)
	}
	conn, err := net.Dial("tcp", src.(ingest.Listener).Addr())
	if err != nil {
		b.Fatal(err)
	}
	defer conn.Close()
	ids := make([][]byte, streams)
	for j := range ids {
		ids[j] = fmt.Appendf(nil, "bed-%03d,", j)
	}
	buf := []byte("stream,time[s],pressure[cmH2O],flow[L/min]\n")
	ticks := b.N/streams + 1
	b.ResetTimer()
	for n := range ticks {
		for j := range ids {
			s := lungSample(n + 7*j)
			buf = append(buf, ids[j]...)
			buf = strconv.AppendFloat(buf, float64(n)/100, 'f', 3, 64)
			buf = append(buf, ',')
			buf = strconv.AppendFloat(buf, s.PressureCmH2O, 'f', 2, 64)
			buf = append(buf, ',')
			buf = strconv.AppendFloat(buf, s.FlowLPS*60, 'f', 2, 64)
			buf = append(buf, '\n')
		}
		if len(buf) >= chunk || n == ticks-1 {
			if _, err := conn.Write(buf); err != nil {
				b.Fatal(err)
			}
			buf = buf[:0]
		}
	}
	want := uint64(ticks * streams)
	deadline := time.Now().Add(time.Minute)
	for src.Stats().Samples < want || d.mux.pending() > 0 {
		if time.Now().After(deadline) {
			b.Fatalf("read %d of %d samples", src.Stats().Samples, want)
		}
		time.Sleep(time.Millisecond)
	}
	b.StopTimer()
}
