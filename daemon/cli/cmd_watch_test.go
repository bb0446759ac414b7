package cli

import (
	"bytes"
	"context"
	"encoding/json"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/analyze"
)

// startTestNATS runs an in-process nats-server with JetStream on a random
// loopback port, stopped at the end of the test.
func startTestNATS(t *testing.T) *server.Server {
	t.Helper()
	ns, err := server.NewServer(&server.Options{
		ServerName: "test", Host: "127.0.0.1", Port: server.RANDOM_PORT, NoSigs: true, NoLog: true,
		JetStream: true, StoreDir: t.TempDir(), JetStreamMaxStore: 64 << 20, JetStreamMaxMemory: 16 << 20,
	})
	if err != nil {
		t.Fatal(err)
	}
	ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		t.Fatal("nats-server not ready within 10 s")
	}
	t.Cleanup(func() { ns.Shutdown(); ns.WaitForShutdown() })
	return ns
}

// syncBuffer is a bytes.Buffer safe for the view's writer and the test.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

func TestWatchReplaysAlertsAndFollowsLive(t *testing.T) {
	ns := startTestNATS(t)
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatal(err)
	}
	ctx := t.Context()
	if _, err := js.CreateStream(ctx, jetstream.StreamConfig{Name: "WATCH_ALERTS", Subjects: []string{"tl.alert.>"}}); err != nil {
		t.Fatal(err)
	}
	seq := 17
	raised := alerts.Event{ID: "bed-7/air-trapping/1", Stream: "bed-7", Condition: "air-trapping", Class: "physiological",
		Priority: alerts.Medium, State: alerts.Raised, Time: time.Now(), BreathSeq: &seq, Message: "flow not back to zero"}
	data, _ := raised.Marshal()
	// Published before the view starts: it must come from the replay.
	if _, err := js.Publish(ctx, "tl.alert.bed-7", data, jetstream.WithMsgID(raised.DedupID())); err != nil {
		t.Fatal(err)
	}

	for _, mode := range []struct {
		name string
		opts watchOptions
		want []string
	}{
		{"json", watchOptions{JSON: true}, []string{`"state":"raised"`, `"state":"cleared"`, `"type":"breath"`}},
		{"plain", watchOptions{Plain: true, PlainEvery: 50 * time.Millisecond}, []string{
			"RAISED    air-trapping (medium)", "CLEARED   air-trapping (medium)", "PEEPi trapped", "alarms: none"}},
	} {
		t.Run(mode.name, func(t *testing.T) {
			opts := mode.opts
			opts.Prefix, opts.Since = "tl", time.Hour
			var out syncBuffer
			vctx, cancel := context.WithCancel(ctx)
			done := make(chan error, 1)
			go func() { done <- runWatch(vctx, nc, opts, &out, nopWarn) }()
			waitFor(t, 5*time.Second, "the replayed raise", func() bool {
				return strings.Contains(out.String(), "raised") || strings.Contains(out.String(), "RAISED")
			})

			b := analyze.NewBreath()
			b.Stream, b.Seq, b.PEEPiCmH2O = "bed-7", 40, 6.8
			bj, _ := json.Marshal(b)
			cleared := raised
			cleared.State = alerts.Cleared
			cj, _ := cleared.Marshal()
			// Publishing the breath until it shows avoids racing the
			// subscription of the view.
			waitFor(t, 5*time.Second, "the breath and the clear", func() bool {
				_ = nc.Publish("tl.breath.bed-7", bj)
				if _, err := js.Publish(ctx, "tl.alert.bed-7", cj, jetstream.WithMsgID(cleared.DedupID())); err != nil {
					t.Fatal(err)
				}
				s := out.String()
				for _, w := range mode.want {
					if !strings.Contains(s, w) {
						return false
					}
				}
				return true
			})
			cancel()
			select {
			case <-done:
			case <-time.After(5 * time.Second):
				t.Fatal("watch did not stop")
			}
			// The clear was published many times with one id: shown once.
			if n := strings.Count(out.String(), "CLEARED") + strings.Count(out.String(), `"state":"cleared"`); n != 1 {
				t.Errorf("clear shown %d times, want 1:\n%s", n, out.String())
			}
		})
	}
}

var nopLog = zerolog.Nop()

func nopWarn() *zerolog.Event { return nopLog.Warn() }
