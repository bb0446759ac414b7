package input_test

import (
	"context"
	"fmt"
	"math"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"trapline/ingest"
	"trapline/ingest/input"
	"trapline/ingest/record"
)

// TestRecordedStreamsReplay records three simulated patients read at the
// same time by live sources (two text, one binary) through one recorder,
// and reads the recording back as an input: each stream yields exactly
// the samples its source delivered live, in order.
func TestRecordedStreamsReplay(t *testing.T) {
	dir := t.TempDir()
	rec := filepath.Join(dir, "rec")
	w, err := record.Open(context.Background(), record.Options{Dir: rec, SegmentLength: time.Minute})
	if err != nil {
		t.Fatal(err)
	}
	formats := []ingest.Format{ingest.FormatText, ingest.FormatBinary, ingest.FormatText}
	var mu sync.Mutex
	live := map[string][]ingest.Sample{}
	var wg sync.WaitGroup
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	for i, f := range formats {
		path := filepath.Join(dir, fmt.Sprintf("p%d.dat", i))
		simulate(t, path, func(rate float64) (ingest.Encoder, error) {
			if f == ingest.FormatBinary {
				return ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{RateHz: rate, Time: true})
			}
			return ingest.NewTextEncoder(ingest.TextEncoderOptions{})
		})
		stream := fmt.Sprintf("bed-%d", i+1)
		src, err := ingest.Open("file://"+path, ingest.Options{Stream: stream, Format: f, Tap: w.Tap})
		if err != nil {
			t.Fatal(err)
		}
		wg.Add(1)
		go func() {
			defer wg.Done()
			_ = src.Run(ctx, func(ev ingest.Event) {
				mu.Lock()
				live[ev.Stream] = append(live[ev.Stream], ev.Samples...)
				mu.Unlock()
			})
		}()
	}
	wg.Wait()
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	if st := w.Stats(); st.DroppedRecords != 0 {
		t.Fatalf("recorder dropped %d records", st.DroppedRecords)
	}
	got, st := readAll(t, rec, input.Options{})
	if st.Kind != input.KindRecording {
		t.Fatalf("kind %s", st.Kind)
	}
	replay := map[string][]ingest.Sample{}
	for _, g := range got {
		replay[g.stream] = append(replay[g.stream], g.s)
	}
	// The binary stream's frames name the simulated stream, not the source's.
	if len(live) != 3 || len(replay) != 3 {
		t.Fatalf("live streams %d, replayed %d", len(live), len(replay))
	}
	for id, want := range live {
		g := replay[id]
		if len(want) < 1000 || len(g) != len(want) {
			t.Fatalf("%s: replayed %d samples, live %d", id, len(g), len(want))
		}
		for i := range want {
			a, b := want[i], g[i]
			if a.TimeS != b.TimeS || a.PressureCmH2O != b.PressureCmH2O || a.FlowLPS != b.FlowLPS ||
				!(a.VolumeL == b.VolumeL || math.IsNaN(a.VolumeL) && math.IsNaN(b.VolumeL)) {
				t.Fatalf("%s sample %d: live %+v, replayed %+v", id, i, a, b)
			}
		}
	}
}
