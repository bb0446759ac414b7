package alerts

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net"
	"os"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"
)

// testNATS is a real nats-server with JetStream, in process, on a random
// loopback port, that a test can stop and start again on the same port and
// store (an outage).
type testNATS struct {
	t     testing.TB
	store string
	port  int
	mu    sync.Mutex
	srv   *server.Server
}

func startTestNATS(t testing.TB) *testNATS {
	t.Helper()
	n := &testNATS{t: t, store: t.TempDir(), port: -1}
	n.start()
	t.Cleanup(n.stop)
	return n
}

func (n *testNATS) start() {
	n.t.Helper()
	srv, err := server.NewServer(&server.Options{
		ServerName: "trapline-test", Host: "127.0.0.1", Port: n.port,
		JetStream: true, StoreDir: n.store, SyncAlways: true,
		JetStreamMaxStore: 256 << 20, JetStreamMaxMemory: 16 << 20,
		NoSigs: true, NoLog: true,
	})
	if err != nil {
		n.t.Fatal(err)
	}
	srv.Start()
	if !srv.ReadyForConnections(10*time.Second) || !srv.JetStreamEnabled() {
		srv.Shutdown()
		n.t.Fatal("nats server did not start")
	}
	n.port = srv.Addr().(*net.TCPAddr).Port
	n.mu.Lock()
	n.srv = srv
	n.mu.Unlock()
}

func (n *testNATS) stop() {
	n.mu.Lock()
	srv := n.srv
	n.srv = nil
	n.mu.Unlock()
	if srv == nil {
		return
	}
	srv.Shutdown()
	done := make(chan struct{})
	go func() { srv.WaitForShutdown(); close(done) }()
	select {
	case <-done:
	case <-time.After(30 * time.Second):
		n.t.Error("nats server did not shut down in 30 s")
	}
}

// testStreams returns stream limits that fit the test server's 256 MiB:
// JetStream reserves each stream's MaxBytes from the account's store.
// startWithStreams starts a test server, connects to it and creates the
// default alert and breath streams: how most publisher tests begin.
func startWithStreams(t *testing.T) (*testNATS, *nats.Conn, StreamsConfig) {
	t.Helper()
	ns := startTestNATS(t)
	nc := ns.connect(t)
	cfg := testStreams("")
	js, _ := jetstream.New(nc)
	if err := EnsureStreams(t.Context(), js, cfg); err != nil {
		t.Fatal(err)
	}
	return ns, nc, cfg
}

func testStreams(prefix string) StreamsConfig {
	return StreamsConfig{Prefix: prefix, AlertsMaxBytes: 32 << 20, BreathsMaxBytes: 32 << 20}
}

func (n *testNATS) url() string { return fmt.Sprintf("nats://127.0.0.1:%d", n.port) }

// connect returns a client that reconnects forever, quickly (test timing).
func (n *testNATS) connect(t testing.TB) *nats.Conn {
	t.Helper()
	nc, err := nats.Connect(n.url(), nats.MaxReconnects(-1), nats.RetryOnFailedConnect(true),
		nats.ReconnectWait(50*time.Millisecond), nats.ReconnectJitter(0, 0))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	return nc
}

// storedAlerts reads every message of the alerts stream in stream order and
// returns their dedup ids (from the payload, not the header).
func storedAlerts(t testing.TB, nc *nats.Conn, cfg StreamsConfig) []string {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	st, err := js.Stream(ctx, cfg.WithDefaults().Alerts)
	if err != nil {
		t.Fatal(err)
	}
	info, err := st.Info(ctx)
	if err != nil {
		t.Fatal(err)
	}
	var ids []string
	for seq := info.State.FirstSeq; seq <= info.State.LastSeq && info.State.Msgs > 0; seq++ {
		m, err := st.GetMsg(ctx, seq)
		if errors.Is(err, jetstream.ErrMsgNotFound) {
			continue
		}
		if err != nil {
			t.Fatal(err)
		}
		var ev Event
		if err := json.Unmarshal(m.Data, &ev); err != nil {
			t.Fatalf("stream seq %d: %v", seq, err)
		}
		if h := m.Header.Get(jetstream.MsgIDHeader); h != ev.DedupID() {
			t.Errorf("stream seq %d: Nats-Msg-Id %q, payload id %q", seq, h, ev.DedupID())
		}
		if want := (Subjects{cfg.Prefix}).Alert(ev.Stream); m.Subject != want {
			t.Errorf("stream seq %d: subject %q, want %q", seq, m.Subject, want)
		}
		ids = append(ids, ev.DedupID())
	}
	return ids
}

// checkExactlyOnce fails unless got holds every id of want exactly once, in
// the order of want, and nothing else.
func checkExactlyOnce(t testing.TB, got, want []string) {
	t.Helper()
	seen := map[string]int{}
	for _, id := range got {
		seen[id]++
	}
	for id, n := range seen {
		if n > 1 {
			t.Errorf("%s stored %d times", id, n)
		}
	}
	for _, id := range want {
		if seen[id] == 0 {
			t.Errorf("%s lost", id)
		}
	}
	if len(got) != len(want) {
		t.Errorf("stream holds %d alerts, want %d", len(got), len(want))
		return
	}
	for i := range got {
		if got[i] != want[i] {
			t.Errorf("stream position %d: %s, want %s (order)", i, got[i], want[i])
			return
		}
	}
}

// waitFor polls cond every 20 ms until it holds or limit passes.
func waitFor(t testing.TB, limit time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(limit)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %v waiting for %s", limit, what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// runPublisher starts p.Run and returns a function that stops it and waits,
// bounded, for Run to return.
func runPublisher(t testing.TB, p *Publisher) (stop func()) {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()
	return func() {
		cancel()
		select {
		case err := <-done:
			if err != nil {
				t.Errorf("Run: %v", err)
			}
		case <-time.After(20 * time.Second):
			t.Fatal("Run did not return 20 s after cancel")
		}
	}
}

func newTestPublisher(t testing.TB, nc *nats.Conn, dir string, opts PublisherOptions) *Publisher {
	t.Helper()
	sp, err := OpenSpool(dir, 0)
	if err != nil {
		t.Fatal(err)
	}
	if opts.RequestTimeout == 0 {
		opts.RequestTimeout = 500 * time.Millisecond
	}
	if opts.RetryMax == 0 {
		opts.RetryMin, opts.RetryMax = 20*time.Millisecond, 200*time.Millisecond
	}
	if opts.Interval == 0 {
		opts.Interval = 200 * time.Millisecond
	}
	p, err := NewPublisher(nc, sp, opts)
	if err != nil {
		t.Fatal(err)
	}
	return p
}

func TestPublisherDeliversInOrder(t *testing.T) {
	_, nc, cfg := startWithStreams(t)
	p := newTestPublisher(t, nc, t.TempDir(), PublisherOptions{Streams: cfg})
	stop := runPublisher(t, p)
	var want []string
	for i := range 20 {
		for _, st := range []State{Raised, Acknowledged, Cleared} {
			ev := testEvent(fmt.Sprintf("bed-%d", i%3), i, st)
			if err := p.Publish(context.Background(), ev); err != nil {
				t.Fatal(err)
			}
			want = append(want, ev.DedupID())
		}
	}
	waitFor(t, 20*time.Second, "spool to drain", func() bool { return p.Depth() == 0 })
	stop()
	if err := p.Close(); err != nil {
		t.Fatal(err)
	}
	checkExactlyOnce(t, storedAlerts(t, nc, cfg), want)
	st := p.Stats()
	if st.Published != uint64(len(want)) || st.Depth != 0 {
		t.Errorf("stats %+v, want %d published", st, len(want))
	}
	if err := p.Publish(context.Background(), testEvent("bed-0", 99, Raised)); !errors.Is(err, ErrPublisherClosed) {
		t.Errorf("publish after close: %v, want ErrPublisherClosed", err)
	}
}

// TestPublisherOutage raises alerts at a steady pace while the server goes
// away for about two seconds and comes back on the same port and store:
// every event must be stored exactly once, in the order it was raised.
func TestPublisherOutage(t *testing.T) {
	ns, nc, cfg := startWithStreams(t)
	p := newTestPublisher(t, nc, t.TempDir(), PublisherOptions{Streams: cfg})
	stop := runPublisher(t, p)
	defer p.Close()

	var want []string
	raise := func(from, to int) {
		for i := from; i < to; i++ {
			ev := testEvent("bed-4", i, Raised)
			if err := p.Publish(context.Background(), ev); err != nil {
				t.Fatal(err)
			}
			want = append(want, ev.DedupID())
			time.Sleep(10 * time.Millisecond)
		}
	}
	raise(0, 50)        // server up
	ns.stop()           // outage
	raise(50, 250)      // about 2 s of alerts into the spool
	if p.Depth() == 0 { // they cannot have gone anywhere
		t.Fatal("spool empty during the outage")
	}
	ns.start() // same port, same store
	raise(250, 300)
	waitFor(t, 30*time.Second, "spool to drain after the outage", func() bool { return p.Depth() == 0 })
	stop()
	checkExactlyOnce(t, storedAlerts(t, nc, cfg), want)
	t.Logf("stats after outage: %+v", p.Stats())
}

// TestPublisherAbandoned simulates a process killed hard during an outage:
// the first publisher spools events and is dropped without Close or drain;
// a new one on the same spool directory delivers them all exactly once.
func TestPublisherAbandoned(t *testing.T) {
	ns, nc, cfg := startWithStreams(t)
	dir := t.TempDir()
	p1 := newTestPublisher(t, nc, dir, PublisherOptions{Streams: cfg, DrainTimeout: -1})
	stop1 := runPublisher(t, p1)
	var want []string
	for i := range 10 {
		ev := testEvent("bed-5", i, Raised)
		if err := p1.Publish(context.Background(), ev); err != nil {
			t.Fatal(err)
		}
		want = append(want, ev.DedupID())
	}
	waitFor(t, 10*time.Second, "first events delivered", func() bool { return p1.Depth() == 0 })
	ns.stop()
	for i := 10; i < 40; i++ {
		ev := testEvent("bed-5", i, Raised)
		if err := p1.Publish(context.Background(), ev); err != nil {
			t.Fatal(err)
		}
		want = append(want, ev.DedupID())
	}
	stop1() // no drain: DrainTimeout < 0
	// The process dies: the kernel drops its lock; nothing else happens.
	if err := p1.spool.lock.Close(); err != nil {
		t.Fatal(err)
	}
	ns.start()
	p2 := newTestPublisher(t, nc, dir, PublisherOptions{Streams: cfg})
	if d := p2.Depth(); d != 30 {
		t.Fatalf("restarted publisher finds %d spooled events, want 30", d)
	}
	stop2 := runPublisher(t, p2)
	waitFor(t, 20*time.Second, "restarted publisher to drain", func() bool { return p2.Depth() == 0 })
	stop2()
	_ = p2.Close()
	checkExactlyOnce(t, storedAlerts(t, nc, cfg), want)
}

// TestPublisherFindsLandedBeyondWindow covers a publish that landed but whose
// ack was lost, retried after the de-duplication window has passed (a long
// outage or a restart): the publisher finds the event at the end of its
// subject and does not store it twice.
func TestPublisherFindsLandedBeyondWindow(t *testing.T) {
	ns := startTestNATS(t)
	nc := ns.connect(t)
	cfg := testStreams("")
	cfg.AlertsDuplicates = 100 * time.Millisecond
	js, _ := jetstream.New(nc)
	if err := EnsureStreams(t.Context(), js, cfg); err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	sp, err := OpenSpool(dir, 0)
	if err != nil {
		t.Fatal(err)
	}
	first, landed := testEvent("bed-6", 1, Raised), testEvent("bed-6", 2, Raised)
	var want []string
	for _, ev := range []Event{first, landed} {
		if _, err := sp.Append(mustMarshal(t, ev)); err != nil {
			t.Fatal(err)
		}
		want = append(want, ev.DedupID())
	}
	// first was delivered and removed; landed made it into the stream
	// but the process died before removing it from the spool.
	for _, ev := range []Event{first, landed} {
		if _, err := js.Publish(t.Context(), (Subjects{}).Alert(ev.Stream), mustMarshal(t, ev), jetstream.WithMsgID(ev.DedupID())); err != nil {
			t.Fatal(err)
		}
	}
	e, _, _ := sp.Oldest()
	if err := sp.Remove(e.Seq); err != nil {
		t.Fatal(err)
	}
	_ = sp.Close()
	time.Sleep(300 * time.Millisecond) // past the 100 ms window: JetStream alone would store it again

	p := newTestPublisher(t, nc, dir, PublisherOptions{Streams: cfg})
	next := testEvent("bed-6", 3, Raised)
	if err := p.Publish(context.Background(), next); err != nil {
		t.Fatal(err)
	}
	want = append(want, next.DedupID())
	stop := runPublisher(t, p)
	waitFor(t, 10*time.Second, "spool to drain", func() bool { return p.Depth() == 0 })
	stop()
	_ = p.Close()
	checkExactlyOnce(t, storedAlerts(t, nc, cfg), want)
	if st := p.Stats(); st.Found != 1 || st.Published != 1 {
		t.Errorf("stats %+v, want found 1 and published 1", st)
	}
}

// TestPublisherCreatesMissingStream: a server without the alerts stream (a
// fresh or wiped store) gets it on the first publish.
func TestPublisherCreatesMissingStream(t *testing.T) {
	ns := startTestNATS(t)
	nc := ns.connect(t)
	cfg := testStreams("lab.bench2")
	p := newTestPublisher(t, nc, t.TempDir(), PublisherOptions{Streams: cfg, Log: zerolog.New(zerolog.NewTestWriter(t))})
	stop := runPublisher(t, p)
	ev := testEvent("bench-2", 1, Raised)
	if err := p.Publish(context.Background(), ev); err != nil {
		t.Fatal(err)
	}
	waitFor(t, 10*time.Second, "spool to drain", func() bool { return p.Depth() == 0 })
	stop()
	_ = p.Close()
	checkExactlyOnce(t, storedAlerts(t, nc, cfg), []string{ev.DedupID()})
}

func TestPublisherRefuses(t *testing.T) {
	ns := startTestNATS(t)
	nc := ns.connect(t)
	sp, err := OpenSpool(t.TempDir(), 2)
	if err != nil {
		t.Fatal(err)
	}
	p, err := NewPublisher(nc, sp, PublisherOptions{Streams: testStreams("")})
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	// Run is not started: the spool fills up.
	bad := testEvent("bed-8", 0, Raised)
	bad.ID = ""
	huge := testEvent("bed-8", 9, Raised)
	huge.Message = strings.Repeat("x", MaxEventBytes)
	for _, tc := range []struct {
		name    string
		ev      Event
		wantErr bool
		wantIs  error // when set, the error must wrap it
	}{
		{"first", testEvent("bed-8", 1, Raised), false, nil},
		{"second", testEvent("bed-8", 2, Raised), false, nil},
		{"spool full", testEvent("bed-8", 3, Raised), true, ErrSpoolFull},
		{"invalid", bad, true, nil},
		{"too large", huge, true, ErrEventTooLarge},
	} {
		t.Run(tc.name, func(t *testing.T) {
			err := p.Publish(context.Background(), tc.ev)
			switch {
			case (err != nil) != tc.wantErr:
				t.Errorf("error %v, want error %v", err, tc.wantErr)
			case tc.wantIs != nil && !errors.Is(err, tc.wantIs):
				t.Errorf("error %v, want one wrapping %v", err, tc.wantIs)
			}
		})
	}
	if st := p.Stats(); st.Refused != 3 || st.Depth != 2 {
		t.Errorf("stats %+v, want refused 3, depth 2", st)
	}
}

func BenchmarkPublisher(b *testing.B) {
	ns := startTestNATS(b)
	nc := ns.connect(b)
	js, _ := jetstream.New(nc)
	if err := EnsureStreams(context.Background(), js, testStreams("")); err != nil {
		b.Fatal(err)
	}
	p := newTestPublisher(b, nc, b.TempDir(), PublisherOptions{Streams: testStreams("")})
	stop := runPublisher(b, p)
	defer p.Close()
	i := 0
	for b.Loop() {
		if err := p.Publish(context.Background(), testEvent("bed-b", i, Raised)); err != nil {
			b.Fatal(err)
		}
		i++
	}
	waitFor(b, 60*time.Second, "spool to drain", func() bool { return p.Depth() == 0 })
	stop()
}

// BenchmarkPublisherReplay measures the drainer alone: events already in the
// spool (as after an outage) sent one by one, each waiting for its
// acknowledgement from a server that syncs every write; per event.
func BenchmarkPublisherReplay(b *testing.B) {
	ns := startTestNATS(b)
	nc := ns.connect(b)
	js, _ := jetstream.New(nc)
	if err := EnsureStreams(context.Background(), js, testStreams("")); err != nil {
		b.Fatal(err)
	}
	dir := b.TempDir()
	sp, err := OpenSpool(dir, 1<<30)
	if err != nil {
		b.Fatal(err)
	}
	for i := range b.N {
		ev := testEvent("bed-r", i, Raised)
		if err := os.WriteFile(sp.path(uint64(i+1)), mustMarshal(b, ev), 0o600); err != nil {
			b.Fatal(err)
		}
		sp.pending = append(sp.pending, uint64(i+1))
	}
	p, err := NewPublisher(nc, sp, PublisherOptions{Streams: testStreams("")})
	if err != nil {
		b.Fatal(err)
	}
	b.ResetTimer()
	stop := runPublisher(b, p)
	waitFor(b, 5*time.Minute, "spool to drain", func() bool { return p.Depth() == 0 })
	b.StopTimer()
	stop()
	_ = p.Close()
}

// TestPublisherCloseDrainsWithinLimit: Close sends what is spooled when the
// server is there, and returns within the drain limit, keeping the events,
// when it is not.
func TestPublisherCloseDrainsWithinLimit(t *testing.T) {
	for _, tc := range []struct {
		name      string
		serverUp  bool
		drain     time.Duration
		wantDepth int
	}{
		// With the server there, the drain ends when the spool is empty;
		// the limit is generous because 25 synced writes can take more
		// than a second on a loaded machine.
		{"server up", true, 30 * time.Second, 0},
		// Without it, Close must give up at the limit.
		{"server down", false, 500 * time.Millisecond, 25},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ns, nc, cfg := startWithStreams(t)
			if !tc.serverUp {
				ns.stop()
			}
			drain := tc.drain
			// A long timer and no reconnect: only Close's drain can send.
			p := newTestPublisher(t, nc, t.TempDir(), PublisherOptions{Streams: cfg, DrainTimeout: drain, Interval: time.Hour})
			for i := range 25 {
				if _, err := p.spool.Append(mustMarshal(t, testEvent("bed-d", i, Raised))); err != nil {
					t.Fatal(err)
				}
			}
			done := make(chan error, 1)
			go func() { done <- p.Run(context.Background()) }()
			waitFor(t, 10*time.Second, "Run to start", func() bool {
				p.mu.Lock()
				defer p.mu.Unlock()
				return p.stop != nil
			})
			start := time.Now()
			if err := p.Close(); err != nil {
				t.Fatal(err)
			}
			took := time.Since(start)
			if err := <-done; err != nil {
				t.Fatal(err)
			}
			if limit := drain + p.opts.RequestTimeout + time.Second; took > limit {
				t.Errorf("Close took %v, want at most %v", took, limit)
			}
			sp, err := OpenSpool(p.spool.Dir(), 0)
			if err != nil {
				t.Fatal(err)
			}
			defer sp.Close()
			if sp.Depth() != tc.wantDepth {
				t.Errorf("%d events left in the spool, want %d", sp.Depth(), tc.wantDepth)
			}
		})
	}
}

// TestDirectPublisherOnce sends every event twice with PublishNow, as a
// retry after an unknown outcome does: JetStream's de-duplication by
// message id keeps one copy of each.
func TestDirectPublisherOnce(t *testing.T) {
	_, nc, cfg := startWithStreams(t)
	p, err := NewDirectPublisher(nc, PublisherOptions{Streams: cfg})
	if err != nil {
		t.Fatal(err)
	}
	defer p.Close()
	var want []string
	for i := range 5 {
		ev := testEvent("bed-1", i, Raised)
		for range 2 {
			if err := p.PublishNow(t.Context(), ev); err != nil {
				t.Fatal(err)
			}
		}
		want = append(want, ev.DedupID())
	}
	checkExactlyOnce(t, storedAlerts(t, nc, cfg), want)
	if st := p.Stats(); st.Published != 5 || st.Duplicates != 5 || st.Depth != 0 {
		t.Errorf("stats %+v, want 5 published and 5 duplicates", st)
	}
	if err := p.Publish(t.Context(), testEvent("bed-1", 9, Raised)); err == nil {
		t.Error("Publish on a direct publisher: want an error (no spool)")
	}
}
