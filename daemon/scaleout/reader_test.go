package scaleout

import (
	"context"
	"fmt"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"
)

// TestPartReaderSurvivesLostConsumer reads one subject of a real embedded
// JetStream server while its consumer is deleted under it twice (as when
// the node that held it dies): the reader makes the consumer again from the
// next sequence, and every message of the subject arrives once, in stream
// order, while the other subject's messages never do.
func TestPartReaderSurvivesLostConsumer(t *testing.T) {
	srv, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, JetStream: true,
		StoreDir: t.TempDir(), NoLog: true, NoSigs: true})
	if err != nil {
		t.Fatal(err)
	}
	srv.Start()
	t.Cleanup(srv.Shutdown)
	if !srv.ReadyForConnections(5 * time.Second) {
		t.Fatal("server not ready")
	}
	nc, err := nats.Connect(srv.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(nc.Close)
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(t.Context(), 30*time.Second)
	defer cancel()
	st, err := js.CreateStream(ctx, jetstream.StreamConfig{Name: "S", Subjects: []string{"s.>"}, Storage: jetstream.MemoryStorage})
	if err != nil {
		t.Fatal(err)
	}
	var want []uint64 // stream sequences of the partition's messages
	publish := func(n int) {
		for i := range n {
			subj := "s.0.bed-1"
			if i%3 == 2 {
				subj = "s.1.bed-2" // another partition
			}
			ack, err := js.Publish(ctx, subj, fmt.Appendf(nil, "%d", i))
			if err != nil {
				t.Fatal(err)
			}
			if subj == "s.0.bed-1" {
				want = append(want, ack.Sequence)
			}
		}
	}
	publish(300)
	r := &partReader{js: js, stream: "S", subject: "s.0.*", log: zerolog.Nop()}
	out := make(chan jetstream.Msg, 16)
	rctx, stop := context.WithCancel(ctx)
	done := make(chan struct{})
	go func() {
		defer close(done)
		r.run(rctx, out)
	}()
	defer func() { stop(); <-done }()

	var got []uint64
	take := func(m jetstream.Msg) {
		t.Helper()
		if m.Subject() != "s.0.bed-1" {
			t.Fatalf("message of %s read from partition 0", m.Subject())
		}
		meta, err := m.Metadata()
		if err != nil {
			t.Fatal(err)
		}
		got = append(got, meta.Sequence.Stream)
	}
	read := func(until int) {
		t.Helper()
		for len(got) < until {
			select {
			case m := <-out:
				take(m)
			case <-ctx.Done():
				t.Fatalf("read %d of %d messages before the deadline", len(got), until)
			}
		}
	}
	deleted := map[string]bool{}
	// lose deletes the reader's current consumer: one it has not deleted
	// before, waiting for the reader to have made it.
	lose := func() {
		t.Helper()
		for ctx.Err() == nil {
			names := st.ConsumerNames(ctx)
			for name := range names.Name() {
				if deleted[name] {
					continue
				}
				if err := st.DeleteConsumer(ctx, name); err != nil {
					t.Fatal(err)
				}
				deleted[name] = true
				return
			}
			// Keep reading meanwhile, as a partition runner does: a
			// reader blocked on its output notices nothing.
			select {
			case m := <-out:
				take(m)
			case <-time.After(20 * time.Millisecond):
			}
		}
		t.Fatal("the reader made no new consumer before the deadline")
	}
	read(50)
	lose()
	publish(300)
	read(150)
	lose()
	publish(300)
	read(len(want))
	if len(got) != len(want) {
		t.Fatalf("read %d messages, want %d", len(got), len(want))
	}
	for i := range want {
		if got[i] != want[i] {
			t.Fatalf("message %d: stream sequence %d, want %d (each once, in order)", i, got[i], want[i])
		}
	}
	if r.resets < 2 {
		t.Errorf("consumer made again %d times, want at least 2 (it was deleted twice)", r.resets)
	}
	select {
	case m := <-out:
		meta, _ := m.Metadata()
		t.Errorf("an extra message after all were read: sequence %d", meta.Sequence.Stream)
	case <-time.After(200 * time.Millisecond):
	}
}
