package bus

import (
	"context"
	"encoding/json"
	"fmt"
	"math"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/analyze"
)

func natsTestBreath(stream string, seq int) *analyze.Breath {
	b := analyze.NewBreath()
	b.Stream, b.Seq = stream, seq
	b.StartS, b.EndS, b.TiS, b.TeS, b.RateBPM = 51.2, 54.2, 1.22, 1.78, 20
	b.VtiML, b.VteML, b.PeakCmH2O, b.PEEPCmH2O = 551, 549, 44.3, 5
	return &b
}

// TestBulletinPublishesBreathsAndStatus checks subjects, the breaths stream
// and the payloads on a real embedded server.
func TestBulletinPublishesBreathsAndStatus(t *testing.T) {
	e := startTestEmbedded(t, EmbeddedOptions{})
	nc, err := e.connect("trapline", zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, _ := jetstream.New(nc)
	if err := alerts.EnsureStreams(t.Context(), js, natsTestStreams()); err != nil {
		t.Fatal(err)
	}
	status := make(chan *nats.Msg, 4)
	if _, err := nc.ChanSubscribe("trapline.status.>", status); err != nil {
		t.Fatal(err)
	}
	b := NewBulletin(nc, "trapline", 16, zerolog.Nop())
	ctx, cancel := context.WithCancel(t.Context())
	done := make(chan error, 1)
	go func() { done <- b.Run(ctx) }()
	for i := 1; i <= 5; i++ {
		b.Breath(natsTestBreath("bench-a", i))
	}
	b.Status("bench-a", []byte(`{"type":"status","schema":1,"stream":"bench-a","connected":true}`))

	select {
	case m := <-status:
		if m.Subject != "trapline.status.bench-a" {
			t.Errorf("status subject %q", m.Subject)
		}
	case <-time.After(10 * time.Second):
		t.Fatal("no status heartbeat within 10 s")
	}
	st, err := js.Stream(t.Context(), "TRAPLINE_BREATHS")
	if err != nil {
		t.Fatal(err)
	}
	deadline := time.Now().Add(10 * time.Second)
	for {
		info, err := st.Info(t.Context())
		if err != nil {
			t.Fatal(err)
		}
		if info.State.Msgs == 5 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("breaths stream holds %d records, want 5", info.State.Msgs)
		}
		time.Sleep(20 * time.Millisecond)
	}
	m, err := st.GetLastMsgForSubject(t.Context(), "trapline.breath.bench-a")
	if err != nil {
		t.Fatal(err)
	}
	var got analyze.Breath
	if err := json.Unmarshal(m.Data, &got); err != nil {
		t.Fatal(err)
	}
	if got.Seq != 5 || got.VtiML != 551 || !math.IsNaN(got.PlateauCmH2O) {
		t.Errorf("stored breath seq %d vti %v pplat %v, want 5, 551, null", got.Seq, got.VtiML, got.PlateauCmH2O)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	if b.Published() != 6 || b.Dropped() != 0 {
		t.Errorf("published %d dropped %d, want 6 and 0", b.Published(), b.Dropped())
	}
}

// TestBulletinNeverBlocks fills the queue while nothing drains it: offers
// return at once and the surplus is counted.
func TestBulletinNeverBlocks(t *testing.T) {
	e := startTestEmbedded(t, EmbeddedOptions{})
	nc, err := e.connect("trapline", zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	for _, tc := range []struct {
		queue, offered int
		wantDropped    uint64
	}{
		{queue: 4, offered: 4, wantDropped: 0},
		{queue: 4, offered: 10, wantDropped: 6},
		{queue: 1, offered: 1000, wantDropped: 999},
	} {
		t.Run(fmt.Sprintf("queue %d offered %d", tc.queue, tc.offered), func(t *testing.T) {
			b := NewBulletin(nc, "trapline", tc.queue, zerolog.Nop())
			start := time.Now()
			for i := range tc.offered {
				b.Breath(natsTestBreath("bed-1", i))
			}
			if d := time.Since(start); d > 5*time.Second {
				t.Errorf("offering %d breaths took %v", tc.offered, d)
			}
			if b.Dropped() != tc.wantDropped {
				t.Errorf("dropped %d, want %d", b.Dropped(), tc.wantDropped)
			}
		})
	}
}

// TestBulletinAcrossOutage: breaths offered while the server is away are
// kept in the client's reconnect buffer and stored once it is back.
// (What is written in the instant before the client notices is lost: the
// Bulletin is best effort.)
func TestBulletinAcrossOutage(t *testing.T) {
	log := zerolog.Nop()
	o := startOutageNATS(t, log)
	e, store, port, nc, js := o.srv, o.store, o.port, o.nc, o.js
	var err error
	b := NewBulletin(nc, "trapline", 64, log)
	ctx, cancel := context.WithCancel(t.Context())
	done := make(chan error, 1)
	go func() { done <- b.Run(ctx) }()
	b.Breath(natsTestBreath("bed-2", 1))
	// The stream stores a core publish after the server has read it: wait
	// for the store, not just the flush, before pulling the plug.
	breathsStored := func() uint64 {
		st, err := js.Stream(t.Context(), "TRAPLINE_BREATHS")
		if err != nil {
			return 0
		}
		info, err := st.Info(t.Context())
		if err != nil {
			return 0
		}
		return info.State.Msgs
	}
	for deadline := time.Now().Add(10 * time.Second); breathsStored() != 1; {
		if time.Now().After(deadline) {
			t.Fatal("first breath not stored in 10 s")
		}
		time.Sleep(10 * time.Millisecond)
	}
	if err := e.Shutdown(30 * time.Second); err != nil {
		t.Fatal(err)
	}
	// Core NATS is at most once: what is written into a socket that has
	// just died is lost. Once the client has noticed the loss, publishes
	// go to its reconnect buffer and survive.
	for deadline := time.Now().Add(10 * time.Second); nc.IsConnected(); {
		if time.Now().After(deadline) {
			t.Fatal("client did not notice the outage in 10 s")
		}
		time.Sleep(10 * time.Millisecond)
	}
	for i := 2; i <= 10; i++ {
		b.Breath(natsTestBreath("bed-2", i))
	}
	e, err = StartEmbedded(EmbeddedOptions{Port: port, StoreDir: store, MaxStoreBytes: 256 << 20}, log)
	if err != nil {
		t.Fatal(err)
	}
	defer e.Shutdown(30 * time.Second)
	var n uint64
	for deadline := time.Now().Add(15 * time.Second); time.Now().Before(deadline); {
		if n = breathsStored(); n == 10 {
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	cancel()
	<-done
	if n != 10 || b.Dropped() != 0 {
		t.Errorf("stored %d breaths, dropped %d; want 10 and 0", n, b.Dropped())
	}
}

func BenchmarkBulletinBreath(b *testing.B) {
	br := natsTestBreath("bench-a", 1)
	bl := NewBulletin(nil, "trapline", 1, zerolog.Nop())
	b.ReportAllocs()
	for b.Loop() {
		bl.Breath(br) // the queue stays full: measures the offer and the drop
	}
}
