package tests

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/daemon"
	"trapline/internal/freeport"
)

// TestFullSpoolDegradesNeverStops: NATS is away for 10 minutes of stream
// time (10 s at 60×) with the spool capped at 5 events. Breaths are
// analysed throughout, the source stays connected, the stream is never
// restarted, the delivery-impaired alarm is raised, and once NATS is back
// every high-priority event the daemon spooled is stored.
func TestFullSpoolDegradesNeverStops(t *testing.T) {
	t.Parallel()
	ns := startNATS(t)
	dir := t.TempDir()
	link := filepath.Join(dir, "ventilator")
	httpPort := freeport.Take(t)
	cfg := writeConfig(t, externalNATSConfig(dir, ns.URL(), httpPort, "spool:\n  max_events: 5\n", fmt.Sprintf(`streams:
  - id: bed-5
    source: serial://%s?baud=115200
`, link)))
	ctx, cancel := context.WithTimeout(t.Context(), 3*time.Minute)
	defer cancel()
	d, simDone := runBronchospasm(ctx, t, cfg, httpPort, link)
	waitFor(t, 30*time.Second, "the first breath", func() bool { return metricsOf(httpPort)["trapline_breaths_total"] >= 1 })
	ns.stop()
	prev := metricsOf(httpPort)["trapline_breaths_total"]
	for i := 0; i < 10; i++ { // 10 s of wall time, 10 min of stream time
		time.Sleep(time.Second)
		m := metricsOf(httpPort)
		if m["trapline_source_connected"] != 1 || m["trapline_stream_restarts_total"] != 0 {
			t.Fatalf("during the outage (%d s): source_connected %v, stream_restarts %v", i+1,
				m["trapline_source_connected"], m["trapline_stream_restarts_total"])
		}
		if m["trapline_breaths_total"] <= prev {
			t.Fatalf("no breath analysed in second %d of the outage", i+1)
		}
		prev = m["trapline_breaths_total"]
	}
	during := metricsOf(httpPort)
	ns.start()
	if err := <-simDone; err != nil {
		t.Fatalf("simulator: %v", err)
	}
	waitFor(t, 30*time.Second, "the spool to drain", func() bool {
		m := metricsOf(httpPort)
		return m != nil && m["trapline_spool_depth"] == 0 && m["trapline_nats_connected"] == 1
	})
	stable(t, 20*time.Second, "the alert count to settle", func() float64 { return metricsOf(httpPort)["trapline_alerts_total"] })
	m := metricsOf(httpPort)
	stored := storedAlerts(t, jetStreamOf(t, ns.URL()), "TRAPLINE_ALERTS")
	highs, impaired := 0, false
	for _, e := range stored {
		if e.Priority == alerts.High {
			highs++
		}
		impaired = impaired || (e.Condition == daemon.CondDeliveryImpaired && e.State == alerts.Raised)
	}
	t.Logf("outage: refused %v, evicted %v, breaths %v at its end; after: %d events stored, %d high (spooled %v)\n%s",
		during["trapline_alerts_refused_total"], m["trapline_alert_spool_evicted_total"], during["trapline_breaths_total"],
		len(stored), highs, m["trapline_alerts_high_priority_total"], describe(stored))
	if !impaired {
		t.Error("no alert-delivery-impaired alarm stored")
	}
	if float64(highs) != m["trapline_alerts_high_priority_total"] || highs == 0 {
		t.Errorf("%d high-priority events stored, %v spooled", highs, m["trapline_alerts_high_priority_total"])
	}
	if m["trapline_stream_restarts_total"] != 0 {
		t.Errorf("stream restarted %v times", m["trapline_stream_restarts_total"])
	}
	if err := d.stop(30 * time.Second); err != nil {
		t.Error(err)
	}
	// The checkpoint does not hold the delivery-impaired alarm; the alarm
	// ledger does, so that a kill cannot leave it open for good
	// (TestKilledMuxStreamLeavesNoGhost shows the ledger at work).
	ledger, err := os.ReadFile(filepath.Join(dir, "state", "open-alarms.jsonl"))
	if err != nil {
		t.Fatalf("alarm ledger: %v", err)
	}
	if impaired && !strings.Contains(string(ledger), `"condition":"`+daemon.CondDeliveryImpaired+`","class":"technical","priority":"high","state":"raised"`) {
		t.Errorf("the delivery-impaired raise is not in the alarm ledger:\n%s", ledger)
	}
}
