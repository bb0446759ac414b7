package tests

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"trapline/alerts"
	"trapline/ingest"
	"trapline/internal/freeport"
)

// ackOf acknowledges alarm id of stream over NATS and returns the error the
// daemon answered ("" for ok).
func ackOf(t *testing.T, url, stream, id string) string {
	t.Helper()
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	m, err := nc.Request("trapline.ack."+alerts.SubjectToken(stream), []byte(`{"id":"`+id+`","by":"night shift"}`), 5*time.Second)
	if err != nil {
		t.Fatalf("ack %s: %v", id, err)
	}
	var rep struct {
		OK    bool   `json:"ok"`
		Error string `json:"error"`
	}
	if err := json.Unmarshal(m.Data, &rep); err != nil {
		t.Fatalf("ack %s answered %s: %v", id, m.Data, err)
	}
	t.Logf("ack %s: ok %v, %s", id, rep.OK, rep.Error)
	return rep.Error
}

// TestKilledMuxStreamLeavesNoGhost: a stream of a multiplexed source keeps
// no checkpoint. The daemon, a child process, is killed with SIGKILL as
// soon as such a stream has an alarm open in JetStream (the bronchospasm
// scenario's first, its rising peak pressure) and restarted on the same
// data directory: every alarm raised
// before the kill gets a terminal event, those the kill left open an
// `ended` with reason "monitoring interrupted", from the alarm ledger
// (daemon/ledger.go). Before the ledger they stayed open for every
// subscriber.
func TestKilledMuxStreamLeavesNoGhost(t *testing.T) {
	t.Parallel()
	ns := startNATS(t)
	dir := t.TempDir()
	link := filepath.Join(dir, "ward-link")
	httpPort := freeport.Take(t)
	cfg := writeConfig(t, externalNATSConfig(dir, ns.URL(), httpPort, "", fmt.Sprintf(`sources:
  - name: ward
    source: serial://%s?baud=115200
    pattern: "bed-*"
`, link)))
	ctx, cancel := context.WithTimeout(t.Context(), 3*time.Minute)
	defer cancel()
	first := startDaemonProcess(t, "run", "--config", cfg)
	waitFor(t, 30*time.Second, "the daemon's /metrics", func() bool { return metricsOf(httpPort) != nil })
	simDone := make(chan error, 1)
	go func() {
		simDone <- streamScenarioText(ctx, "bronchospasm", "bed-7", link, 60,
			ingest.TextEncoderOptions{Decimals: 4, Stream: true})
	}()
	js := jetStreamOf(t, ns.URL())
	waitFor(t, 30*time.Second, "the alerts stream", func() bool {
		_, err := js.Stream(ctx, "TRAPLINE_ALERTS")
		return err == nil
	})
	openBefore := func() map[string]bool { return openAlarms(storedAlerts(t, js, "TRAPLINE_ALERTS")) }
	var before map[string]bool
	waitFor(t, 90*time.Second, "an alarm of the multiplexed stream open in JetStream", func() bool {
		before = openBefore()
		return len(before) > 0
	})
	first.kill()
	// The alarms open at the kill, as every subscriber saw them; events
	// still in the spool go out at the restart and may close some.
	before = openBefore()
	raised := map[string]bool{}
	for _, e := range storedAlerts(t, js, "TRAPLINE_ALERTS") {
		raised[e.ID] = true
	}
	ledger, err := os.ReadFile(filepath.Join(dir, "state", "open-alarms.jsonl"))
	if err != nil {
		t.Fatalf("no alarm ledger after the kill: %v", err)
	}
	for id := range before {
		if !strings.Contains(string(ledger), `"id":"`+id+`"`) {
			t.Errorf("alarm %s, open in JetStream, is not in the ledger", id)
		}
	}

	// An acknowledgement of an alarm the ledger ended answers what became
	// of it, as one of an alarm a checkpoint ended does.
	var ackAnswer string
	ackLeft := func() {
		for _, e := range storedAlerts(t, js, "TRAPLINE_ALERTS") {
			if e.State == alerts.Ended && e.Reason == alerts.ReasonInterrupted {
				ackAnswer = ackOf(t, ns.URL(), e.Stream, e.ID)
				return
			}
		}
	}
	runAfterRestart(t, cfg, httpPort, simDone, 10*time.Second, ackLeft)
	if !strings.Contains(ackAnswer, "ended at") || !strings.Contains(ackAnswer, alerts.ReasonInterrupted) {
		t.Errorf("acknowledging an alarm the ledger ended answered %q, want when and why it ended", ackAnswer)
	}
	stored := storedAlerts(t, js, "TRAPLINE_ALERTS")
	t.Logf("%d alarms open at the kill; %d alert events:\n%s", len(before), len(stored), describe(stored))
	open := openAlarms(stored)
	interrupted := map[string]bool{}
	for _, e := range stored {
		if e.State == alerts.Ended && e.Reason == alerts.ReasonInterrupted {
			interrupted[e.ID] = true
		}
	}
	for id := range raised {
		if open[id] {
			t.Errorf("alarm %s raised before the kill has no terminal state in JetStream", id)
		}
	}
	for id := range before {
		if !interrupted[id] && !open[id] {
			t.Logf("alarm %s open at the kill ended otherwise (an event still in the spool)", id)
		}
	}
	if len(interrupted) == 0 {
		t.Error("no alarm ended as interrupted after the kill")
	}
}
