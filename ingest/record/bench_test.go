package record

import (
	"context"
	"testing"

	"trapline/ingest"
)

// BenchmarkWrite measures what recording costs the reading goroutine of a
// source: one Write of a 1 KiB read (a copy into the buffer), with the
// writer goroutine writing to disk at the same time.
func BenchmarkWrite(b *testing.B) {
	w, err := Open(context.Background(), Options{Dir: b.TempDir(), BufferBytes: 64 << 20})
	if err != nil {
		b.Fatal(err)
	}
	defer w.Close()
	src := Source{Stream: "bench", Format: ingest.FormatText}
	p := make([]byte, 1024)
	b.SetBytes(int64(len(p)))
	b.ReportAllocs()
	for b.Loop() {
		w.Write(src, p)
	}
	b.StopTimer()
	b.ReportMetric(float64(w.Stats().DroppedRecords), "dropped")
}
