package daemon

import (
	"bytes"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"trapline/alerts"
	"trapline/config"
	"trapline/ingest"
	"trapline/ingest/offline"
	"trapline/simulator"
)

// TestShardTakesQueuedReadsTogether runs two patients through a shard the
// way a ward arrives (each read one sample of each stream) with its queue
// always backed up, so that every read is taken together with the 63
// queued behind it and run stream by stream. Each stream's breath records
// on NATS equal those of its patient analysed alone: running reads
// together changes the order across streams, never within one.
func TestShardTakesQueuedReadsTogether(t *testing.T) {
	scs := twoPatients(t)
	d, cfg, nc := startMuxDaemon(t, config.Source{Name: "ward", URL: "tcp-listen://127.0.0.1:0?format=text", Pattern: "bed-*"})
	var mu sync.Mutex
	got := map[string][]string{}
	subj := alerts.Subjects{Prefix: cfg.NATS.SubjectPrefix}
	if _, err := nc.Subscribe(subj.All(alerts.KindBreath), func(m *nats.Msg) {
		mu.Lock()
		got[m.Subject] = append(got[m.Subject], string(m.Data))
		mu.Unlock()
	}); err != nil {
		t.Fatal(err)
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}

	// The samples of each patient, as the text source decodes them.
	var ward bytes.Buffer
	if _, err := simulator.StreamWard(t.Context(), []*simulator.Sim{newSim(t, scs[0]), newSim(t, scs[1])}, simulator.WriterOutput(&ward),
		simulator.WardOptions{Format: ingest.FormatText}); err != nil {
		t.Fatal(err)
	}
	samples := map[string][]ingest.Sample{}
	if _, err := offline.Run(t.Context(), bytes.NewReader(ward.Bytes()), offline.Options{Format: ingest.FormatText},
		func(stream string) offline.Handler {
			return func(ss []ingest.Sample) { samples[stream] = append(samples[stream], ss...) }
		}); err != nil {
		t.Fatal(err)
	}

	// A shard of the daemon's runtime that no goroutine runs: the test
	// fills its queue and calls take itself.
	ms := d.mux.sources[0]
	sh := newShard(d.mux, len(d.mux.shards))
	streams := []*muxStream{newMuxStream(ms, scs[0].Stream), newMuxStream(ms, scs[1].Stream)}
	n := min(len(samples[scs[0].Stream]), len(samples[scs[1].Stream]))
	read := func(k int) *work {
		w := getWork(time.Now())
		for _, st := range streams {
			w.items = append(w.items, workItem{st: st, ev: ingest.Event{Stream: st.id, Samples: samples[st.id][k : k+1]}})
		}
		return w
	}
	for k := 0; k < n; k += maxTake {
		first := read(k)
		for j := k + 1; j < min(k+maxTake, n); j++ {
			sh.in <- read(j)
		}
		sh.take(first)
		if len(sh.in) != 0 {
			t.Fatalf("%d reads left in the queue after take", len(sh.in))
		}
	}

	want := map[string][]string{}
	for _, sc := range scs {
		want[subj.Breath(sc.Stream)] = aloneBreaths(t, sc, ingest.FormatText)
	}
	waitFor(t, 20*time.Second, "every breath on NATS", func() bool {
		mu.Lock()
		defer mu.Unlock()
		for k, w := range want {
			if len(got[k]) < len(w) {
				return false
			}
		}
		return true
	})
	mu.Lock()
	defer mu.Unlock()
	for key, w := range want {
		if len(w) < 20 || !slices.Equal(got[key], w) {
			t.Errorf("%s: %d breaths, alone %d, or not the same", key, len(got[key]), len(w))
		}
	}
}

// A shard's queue is bounded by samples as well as by reads: a reservation
// that would pass maxQueuedSamples is refused until earlier reads are
// released, except into an empty queue.
func TestShardQueueBoundedBySamples(t *testing.T) {
	sh := &shard{}
	half := maxQueuedSamples/2 + 1
	a, b := &work{samples: half}, &work{samples: half}
	if !sh.reserve(a) {
		t.Fatal("first half refused by an empty queue")
	}
	if sh.reserve(b) {
		t.Fatal("reservation beyond maxQueuedSamples taken")
	}
	if got := sh.queued.Load(); got != int64(half) {
		t.Fatalf("queued %d after a refused reservation, want %d", got, half)
	}
	a.release()
	if !sh.reserve(b) {
		t.Fatal("refused after the earlier read was released")
	}
	b.release()
	if got := sh.queued.Load(); got != 0 {
		t.Fatalf("queued %d after every read was released, want 0", got)
	}
	big := &work{samples: 2 * maxQueuedSamples}
	if !sh.reserve(big) {
		t.Fatal("a read larger than the bound refused by an empty queue")
	}
	big.release()
}
