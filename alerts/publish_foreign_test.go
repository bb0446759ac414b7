package alerts

import (
	"context"
	"sync/atomic"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

// TestPublisherNoticesForeignDuplicate: another client stores a forged
// event under the de-duplication id of an event the publisher is about to
// send; JetStream answers the real one "duplicate". The publisher counts
// it as foreign and reports it, while an ordinary event is not reported.
func TestPublisherNoticesForeignDuplicate(t *testing.T) {
	_, nc, cfg := startWithStreams(t)
	var reported atomic.Value
	p := newTestPublisher(t, nc, t.TempDir(), PublisherOptions{Streams: cfg,
		OnForeign: func(ev Event) { reported.Store(ev.DedupID()) }})
	stop := runPublisher(t, p)
	defer stop()

	real := testEvent("bed-1", 1, Escalated)
	forged := real
	forged.Priority = Low
	data, _ := forged.Marshal()
	js, _ := jetstream.New(nc)
	ctx, cancel := context.WithTimeout(t.Context(), 5*time.Second)
	defer cancel()
	if _, err := js.Publish(ctx, cfg.WithDefaults().Prefix+".alert.bed-1", data, jetstream.WithMsgID(real.DedupID())); err != nil {
		t.Fatal(err)
	}
	ok := testEvent("bed-1", 2, Raised)
	for _, ev := range []Event{ok, real} {
		if err := p.Publish(ctx, ev); err != nil {
			t.Fatal(err)
		}
	}
	waitFor(t, 10*time.Second, "both events handled", func() bool { return p.Stats().Published+p.Stats().Duplicates == 2 })
	st := p.Stats()
	if st.Foreign != 1 || st.Published != 1 {
		t.Errorf("stats %+v, want 1 foreign duplicate and 1 published", st)
	}
	if got, _ := reported.Load().(string); got != real.DedupID() {
		t.Errorf("reported %q, want %q", got, real.DedupID())
	}
}
