package offline

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"slices"
	"sync"
	"sync/atomic"
	"testing"

	"trapline/ingest"
)

// ward encodes n samples of each stream, the streams taking turns sample
// by sample, and returns the bytes and, per stream, the samples written.
func ward(t testing.TB, format ingest.Format, streams, n int) ([]byte, map[string][]ingest.Sample) {
	t.Helper()
	var enc ingest.Encoder
	var err error
	if format == ingest.FormatBinary {
		enc, err = ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{RateHz: 100, Time: true})
	} else {
		// L/s and the shortest text: the samples read back bit for bit.
		enc, err = ingest.NewTextEncoder(ingest.TextEncoderOptions{Stream: true, FlowUnit: "L/s"})
	}
	if err != nil {
		t.Fatal(err)
	}
	sent := map[string][]ingest.Sample{}
	buf := append([]byte(nil), enc.Header()...)
	for i := range n {
		for k := range streams {
			id := fmt.Sprintf("bed-%d", k)
			s := ingest.Sample{TimeS: float64(i) / 100, PressureCmH2O: float64(k) + float64(i%97)/8, FlowLPS: float64(i%13) / 16,
				VolumeL: ingest.NoVolume}
			buf = enc.Append(buf, id, s)
			sent[id] = append(sent[id], s)
		}
	}
	return buf, sent
}

// collector records what each stream's handler receives and fails when
// two calls for one stream overlap.
type collector struct {
	mu   sync.Mutex
	got  map[string][]ingest.Sample
	busy map[string]*atomic.Bool
	bad  atomic.Bool
}

func (c *collector) open(stream string) Handler {
	c.mu.Lock()
	if c.got == nil {
		c.got, c.busy = map[string][]ingest.Sample{}, map[string]*atomic.Bool{}
	}
	busy := &atomic.Bool{}
	c.busy[stream] = busy
	c.mu.Unlock()
	var mine []ingest.Sample
	return func(s []ingest.Sample) {
		if !busy.CompareAndSwap(false, true) {
			c.bad.Store(true)
		}
		mine = append(mine, s...)
		c.mu.Lock()
		c.got[stream] = mine
		c.mu.Unlock()
		busy.Store(false)
	}
}

// TestRunEveryStream: with any number of workers and batch size, every
// stream's handler gets exactly the samples written for it, in order, and
// never two calls at once.
func TestRunEveryStream(t *testing.T) {
	for _, format := range []ingest.Format{ingest.FormatText, ingest.FormatBinary} {
		data, sent := ward(t, format, 5, 3000)
		for _, workers := range []int{0, 1, 2, 3} {
			for _, batch := range []int{0, 7, 1000} {
				t.Run(fmt.Sprintf("%s/%d workers/batch %d", format, workers, batch), func(t *testing.T) {
					var c collector
					st, err := Run(t.Context(), bytes.NewReader(data), Options{Format: format, Workers: workers,
						BatchSamples: batch, ReadBytes: 1000}, c.open)
					if err != nil {
						t.Fatal(err)
					}
					if st.Samples != 15000 || st.BadLines+st.BadFrames != 0 {
						t.Fatalf("stats %+v", st)
					}
					if c.bad.Load() {
						t.Fatal("two calls for one stream overlapped")
					}
					tol := 0.0
					if format == ingest.FormatBinary {
						tol = 1e-3 // fixed point of the default scale
					}
					for id, want := range sent {
						same := func(a, b ingest.Sample) bool {
							return abs(a.TimeS-b.TimeS) <= tol && abs(a.PressureCmH2O-b.PressureCmH2O) <= tol &&
								abs(a.FlowLPS-b.FlowLPS) <= tol
						}
						if !slices.EqualFunc(c.got[id], want, same) {
							t.Fatalf("%s: %d samples, want %d, or not the same", id, len(c.got[id]), len(want))
						}
					}
				})
			}
		}
	}
}

func abs(x float64) float64 {
	if x < 0 {
		return -x
	}
	return x
}

// failingReader returns its data, then an error.
type failingReader struct{ r io.Reader }

func (f *failingReader) Read(p []byte) (int, error) {
	n, err := f.r.Read(p)
	if errors.Is(err, io.EOF) {
		return n, errors.New("device unplugged")
	}
	return n, err
}

// TestRunStops: a cancelled context and a failing reader end Run with an
// error, after its workers have returned.
func TestRunStops(t *testing.T) {
	data, _ := ward(t, ingest.FormatText, 2, 20000)
	ctx, cancel := context.WithCancel(t.Context())
	calls := 0
	_, err := Run(ctx, bytes.NewReader(data), Options{Workers: 1, BatchSamples: 100, ReadBytes: 4096}, func(string) Handler {
		return func([]ingest.Sample) {
			if calls++; calls == 3 {
				cancel()
			}
		}
	})
	if !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled: %v", err)
	}
	_, err = Run(t.Context(), &failingReader{bytes.NewReader(data[:5000])}, Options{Workers: 2}, func(string) Handler { return nil })
	if err == nil || !bytes.Contains([]byte(err.Error()), []byte("device unplugged")) {
		t.Errorf("failing reader: %v", err)
	}
	if _, err := Run(t.Context(), bytes.NewReader(data), Options{Workers: -1}, nil); err == nil {
		t.Error("negative workers accepted")
	}
	if _, err := Run(t.Context(), bytes.NewReader([]byte("time[s],pressure[bar],flow[L/s]\n0,1,2\n")), Options{}, nil); err == nil {
		t.Error("unknown unit in the header accepted")
	}
}
