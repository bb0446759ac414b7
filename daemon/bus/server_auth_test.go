package bus

import (
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"

	"trapline/alerts"
)

// TestEmbeddedAuthorization: with the daemon's identity, a client without
// credentials (the observer) is refused on the alert, breath, status and
// samples subjects, while it can still read the alerts stream through a
// consumer and send acknowledgement requests; the daemon's events are all
// stored. The identity file is private to its owner.
func TestEmbeddedAuthorization(t *testing.T) {
	dir := t.TempDir()
	id, err := LoadOrCreateIdentity(dir)
	if err != nil {
		t.Fatal(err)
	}
	if fi, err := os.Stat(filepath.Join(dir, IdentityFile)); err != nil || fi.Mode().Perm() != 0o600 {
		t.Fatalf("identity file: %v, mode %v; want 0600", err, fi.Mode().Perm())
	}
	again, err := LoadOrCreateIdentity(dir)
	if err != nil || again != id {
		t.Fatalf("identity not kept across starts: %v", err)
	}
	e := startTestEmbedded(t, EmbeddedOptions{Port: 0, Identity: &id})
	daemonConn, err := e.connect("daemon", zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer daemonConn.Close()
	ctx, cancel := context.WithTimeout(t.Context(), 20*time.Second)
	defer cancel()
	djs, _ := jetstream.New(daemonConn)
	if err := alerts.EnsureStreams(ctx, djs, natsTestStreams()); err != nil {
		t.Fatal(err)
	}

	var mu sync.Mutex
	var violations []string
	observer, err := nats.Connect(e.URL(), nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) {
		mu.Lock()
		violations = append(violations, err.Error())
		mu.Unlock()
	}))
	if err != nil {
		t.Fatalf("observer without credentials: %v", err)
	}
	defer observer.Close()
	forged := natsTestEvent("bed-1", 1, alerts.Raised)
	forged.Priority = alerts.Low
	data, _ := forged.Marshal()
	subjects := []string{"trapline.alert.bed-1", "trapline.breath.bed-1", "trapline.status.bed-1", "trapline.samples.bed-1"}
	for _, s := range subjects {
		if err := observer.Publish(s, data); err != nil {
			t.Fatal(err)
		}
	}
	ojs, _ := jetstream.New(observer)
	octx, ocancel := context.WithTimeout(ctx, 2*time.Second)
	defer ocancel()
	if _, err := ojs.Publish(octx, "trapline.alert.bed-1", data, jetstream.WithMsgID(forged.DedupID())); err == nil {
		t.Error("the observer's JetStream publish of an alert was stored")
	}
	// The daemon's real event with the same de-duplication id is stored.
	real := natsTestEvent("bed-1", 1, alerts.Raised)
	real.Priority = alerts.High
	rdata, _ := real.Marshal()
	ack, err := djs.Publish(ctx, "trapline.alert.bed-1", rdata, jetstream.WithMsgID(real.DedupID()))
	if err != nil || ack.Duplicate {
		t.Fatalf("daemon's publish: %v (duplicate %v)", err, ack != nil && ack.Duplicate)
	}
	waitUntil(t, 5*time.Second, func() bool {
		mu.Lock()
		defer mu.Unlock()
		return len(violations) >= len(subjects)
	})
	mu.Lock()
	for _, v := range violations {
		if !strings.Contains(strings.ToLower(v), "permissions violation") {
			t.Errorf("unexpected error %q", v)
		}
	}
	t.Logf("%d refusals, e.g. %q", len(violations), violations[0])
	mu.Unlock()

	// The observer reads the alerts stream, and can ask for an ack.
	c, err := ojs.OrderedConsumer(ctx, "TRAPLINE_ALERTS", jetstream.OrderedConsumerConfig{})
	if err != nil {
		t.Fatalf("observer's consumer: %v", err)
	}
	m, err := c.Next(jetstream.FetchMaxWait(5 * time.Second))
	if err != nil {
		t.Fatalf("observer reading alerts: %v", err)
	}
	var got alerts.Event
	if err := jsonUnmarshal(m.Data(), &got); err != nil || got.Priority != alerts.High {
		t.Errorf("stored event %s, want the daemon's high-priority one", m.Data())
	}
	if _, err := observer.Request("trapline.ack.bed-1", []byte(`{"id":"bed-1/air-trapping/1"}`), time.Second); err != nil && err != nats.ErrNoResponders {
		t.Errorf("observer's ack request: %v, want it to reach the server", err)
	}
}

func waitUntil(t *testing.T, d time.Duration, f func() bool) {
	t.Helper()
	deadline := time.Now().Add(d)
	for !f() {
		if time.Now().After(deadline) {
			t.Fatal("condition not met in time")
		}
		time.Sleep(20 * time.Millisecond)
	}
}

func jsonUnmarshal(b []byte, v any) error { return json.Unmarshal(b, v) }
