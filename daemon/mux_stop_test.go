package daemon

import (
	"bytes"
	"encoding/json"
	"net"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/config"
	"trapline/ingest"
	"trapline/simulator"
)

// TestMuxShutdownEndsOpenAlarms: a stream of a multiplexed source keeps no
// checkpoint, so when the daemon stops, every alarm it has open is ended
// with reason "monitoring stopped" rather than left open for subscribers
// with nothing to end it after the restart. The patient traps air from the
// first breaths (R 30, C 50: τ 1.5 s against an expiratory time of 1.1 s).
func TestMuxShutdownEndsOpenAlarms(t *testing.T) {
	cfg := muxConfig(t, config.Source{Name: "ward", URL: "tcp-listen://127.0.0.1:0?format=text", Pattern: "bed-*"})
	r := startDaemonWith(t, cfg, Options{})
	nc, err := nats.Connect(r.info.NATSURL)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	var mu sync.Mutex
	var events []alerts.Event
	if _, err := nc.Subscribe(alerts.Subjects{Prefix: cfg.NATS.SubjectPrefix}.All(alerts.KindAlert), func(m *nats.Msg) {
		var e alerts.Event
		if err := json.Unmarshal(m.Data, &e); err != nil {
			t.Errorf("alert event: %v", err)
			return
		}
		mu.Lock()
		events = append(events, e)
		mu.Unlock()
	}); err != nil {
		t.Fatal(err)
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}

	sc := simulator.Steady{RCmH2OSPerL: 30, CMLPerCmH2O: 50, VtML: 600, FlowLPM: 40, RateBPM: 30,
		PEEPCmH2O: 5, SampleRateHz: 100, DurationS: 120, PressureNoiseCmH2O: 0.2, FlowNoiseLPM: 0.5, Seed: 7}.Scenario()
	sc.Stream = "bed-t"
	var ward bytes.Buffer
	if _, err := simulator.StreamWard(t.Context(), []*simulator.Sim{newSim(t, sc)}, simulator.WriterOutput(&ward), simulator.WardOptions{Format: ingest.FormatText}); err != nil {
		t.Fatal(err)
	}
	ms := r.d.mux.sources[0]
	waitFor(t, 10*time.Second, "the listener", func() bool { return ms.src.(ingest.Listener).Addr() != "" })
	conn, err := net.Dial("tcp", ms.src.(ingest.Listener).Addr())
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	if _, err := conn.Write(ward.Bytes()); err != nil {
		t.Fatal(err)
	}

	waitFor(t, 30*time.Second, "an air-trapping alarm", func() bool {
		mu.Lock()
		defer mu.Unlock()
		return slices.ContainsFunc(events, func(e alerts.Event) bool {
			return e.State == alerts.Raised && e.Condition == analyze.CondAirTrapping
		})
	})
	if err := r.stop(); err != nil {
		t.Fatal(err)
	}
	mu.Lock()
	defer mu.Unlock()
	open, raised := map[string]bool{}, 0
	for _, e := range events {
		switch {
		case e.State == alerts.Raised:
			open[e.ID] = true
			raised++
		case e.State.Terminal():
			delete(open, e.ID)
			if e.State == alerts.Ended && e.Reason != alerts.ReasonStopped {
				t.Errorf("%s ended with reason %q, want %q", e.ID, e.Reason, alerts.ReasonStopped)
			}
		}
	}
	for id := range open {
		t.Errorf("alarm %s was still open when the daemon had stopped", id)
	}
	t.Logf("%d alert events, %d alarms raised", len(events), raised)
}
