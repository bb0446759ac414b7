package tests

import (
	"context"
	"encoding/json"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/internal/freeport"
)

// storedBreathSeqs returns the seq of every breath record of the stream
// in the breaths stream, in store order.
func storedBreathSeqs(t *testing.T, url string) []int {
	t.Helper()
	js := jetStreamOf(t, url)
	ctx, cancel := context.WithTimeout(t.Context(), 20*time.Second)
	defer cancel()
	s, err := js.Stream(ctx, "TRAPLINE_BREATHS")
	if err != nil {
		t.Fatalf("breaths stream: %v", err)
	}
	info, err := s.Info(ctx)
	if err != nil {
		t.Fatal(err)
	}
	var out []int
	for seq := info.State.FirstSeq; seq <= info.State.LastSeq && info.State.Msgs > 0; seq++ {
		m, err := s.GetMsg(ctx, seq)
		if err != nil {
			continue
		}
		var b struct {
			Seq int `json:"seq"`
		}
		if err := json.Unmarshal(m.Data, &b); err != nil {
			t.Errorf("breath %d: %v", seq, err)
			continue
		}
		out = append(out, b.Seq)
	}
	return out
}

// TestRestartMidEpisodeLeavesNoGhost: the daemon, a child process, is
// killed with SIGKILL (or stopped with SIGTERM) in the middle of the
// bronchospasm scenario's air-trapping episode and restarted on the same
// data directory. Every alarm id that was raised reaches a terminal state
// (cleared, or ended for an interruption), the scenario's rising-peak trend
// alarm is still raised, and breath numbers continue without a repeat.
func TestRestartMidEpisodeLeavesNoGhost(t *testing.T) {
	t.Parallel()
	for _, tc := range []struct {
		name string
		kill bool
	}{{"sigkill", true}, {"sigterm", false}} {
		t.Run(tc.name, func(t *testing.T) {
			ns := startNATS(t)
			dir := t.TempDir()
			link := filepath.Join(dir, "ventilator")
			httpPort := freeport.Take(t)
			cfg := outageConfig(t, dir, link, ns.URL(), httpPort)
			ctx, cancel := context.WithTimeout(t.Context(), 3*time.Minute)
			defer cancel()
			// Air trapping builds from minute 2 and resolves after minute 11.
			first, simDone := runBronchospasm(ctx, t, cfg, httpPort, link)
			waitFor(t, 60*time.Second, "an air-trapping alarm", func() bool { return metricsOf(httpPort)["trapline_alerts_active"] >= 1 })
			time.Sleep(2 * time.Second) // a checkpoint with the alarm open
			if !tc.kill {
				checkBadAcks(t, ns.URL(), httpPort)
			}
			// The alarms the first daemon raised: each must reach a
			// terminal state after the restart.
			before := map[string]bool{}
			for _, e := range storedAlerts(t, jetStreamOf(t, ns.URL()), "TRAPLINE_ALERTS") {
				before[e.ID] = true
			}
			if tc.kill {
				first.kill()
			} else if err := first.stop(20 * time.Second); err != nil {
				t.Fatal(err)
			}
			runAfterRestart(t, cfg, httpPort, simDone, 20*time.Second, nil)
			stored := storedAlerts(t, jetStreamOf(t, ns.URL()), "TRAPLINE_ALERTS")
			checkTerminal(t, stored, before)
			t.Logf("%d alert events:\n%s", len(stored), describe(stored))
			seqs := storedBreathSeqs(t, ns.URL())
			seen := map[int]bool{}
			for _, s := range seqs {
				if seen[s] {
					t.Fatalf("breath seq %d stored twice (of %d breaths)", s, len(seqs))
				}
				seen[s] = true
			}
			t.Logf("%d breaths, seq %d..%d, none repeated", len(seqs), seqs[0], seqs[len(seqs)-1])
		})
	}
}

// runAfterRestart starts the daemon again on cfg, waits for the
// simulator to finish, for the spool to drain and for the alert count to
// stay put for settle, runs during (when set), and stops the daemon.
func runAfterRestart(t *testing.T, cfg string, httpPort int, simDone <-chan error, settle time.Duration, during func()) {
	t.Helper()
	second := startDaemonProcess(t, "run", "--config", cfg)
	if err := <-simDone; err != nil {
		t.Fatalf("simulator: %v", err)
	}
	waitFor(t, 30*time.Second, "the spool to drain", func() bool {
		m := metricsOf(httpPort)
		return m != nil && m["trapline_spool_depth"] == 0
	})
	stable(t, settle, "the alert count to settle", func() float64 { return metricsOf(httpPort)["trapline_alerts_total"] })
	if during != nil {
		during()
	}
	if err := second.stop(30 * time.Second); err != nil {
		t.Error(err)
	}
}

// openAlarms returns the ids that evs leave open: raised, escalated or
// acknowledged, and neither cleared, ended nor superseded. The
// monitoring-gap event is born ended.
func openAlarms(evs []alerts.Event) map[string]bool {
	open := map[string]bool{}
	for _, e := range evs {
		if e.Supersedes != "" {
			delete(open, e.Supersedes)
		}
		if e.State.Terminal() {
			delete(open, e.ID)
		} else {
			open[e.ID] = true
		}
	}
	return open
}

// checkTerminal checks that every alarm id of ids (those raised before the
// restart) ends in stored in a terminal state or is superseded, that the
// rising-peak alarm was raised, and that the restart was marked by a
// monitoring-gap event. An alarm raised after the restart may still be
// open when the scenario ends (the patient's state at its end); it is only
// reported.
func checkTerminal(t *testing.T, stored []alerts.Event, ids map[string]bool) {
	t.Helper()
	rising, gap := false, false
	for _, e := range stored {
		gap = gap || e.Condition == alerts.CondMonitoringGap
		rising = rising || (e.Condition == analyze.CondRisingPeakPressure && e.State == alerts.Raised)
	}
	for id := range openAlarms(stored) {
		if ids[id] {
			t.Errorf("alarm %s raised before the restart has no terminal state in JetStream", id)
		} else {
			t.Logf("alarm %s raised after the restart still open at the end of the scenario", id)
		}
	}
	if !rising {
		t.Error("the rising-peak-pressure alarm of the scenario was not raised")
	}
	if !gap {
		t.Error("no monitoring-gap event marks the restart")
	}
}

// checkBadAcks sends three bad acknowledgements of an open alarm: a 70 kB
// one, one with control characters and one with a malformed id. Each is
// answered ok:false, the stream is not restarted, and the alarm stays open.
func checkBadAcks(t *testing.T, url string, httpPort int) {
	t.Helper()
	var openID string
	for _, e := range storedAlerts(t, jetStreamOf(t, url), "TRAPLINE_ALERTS") {
		if e.State == alerts.Raised {
			openID = e.ID
		}
	}
	if openID == "" {
		t.Fatal("no raised alarm to acknowledge")
	}
	before := metricsOf(httpPort)
	nc, err := nats.Connect(url)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	for name, body := range map[string]string{
		"70 kB":              `{"id":"` + openID + `","by":"` + strings.Repeat("x", 70_000) + `"}`,
		"control characters": `{"id":"` + openID + `","by":"\u001b[2J\u001b[Hforged line"}`,
		"malformed id":       `{"id":"bed-5/air-trapping","by":"night shift"}`,
	} {
		m, err := nc.Request("trapline.ack.bed-5", []byte(body), 5*time.Second)
		if err != nil {
			t.Fatalf("%s ack: %v", name, err)
		}
		var rep struct {
			OK    bool   `json:"ok"`
			Error string `json:"error"`
		}
		if err := json.Unmarshal(m.Data, &rep); err != nil || rep.OK {
			t.Errorf("%s ack answered %s, want ok:false", name, m.Data)
		}
		t.Logf("%s ack: %s", name, rep.Error)
	}
	after := metricsOf(httpPort)
	if after["trapline_stream_restarts_total"] != 0 || after["trapline_stream_up"] != 1 {
		t.Errorf("after bad acks: stream_restarts %v, stream_up %v; want 0 and 1",
			after["trapline_stream_restarts_total"], after["trapline_stream_up"])
	}
	if after["trapline_alerts_active"] < 1 || after["trapline_alerts_active"] < before["trapline_alerts_active"] {
		t.Errorf("after bad acks %v alarms active, before %v", after["trapline_alerts_active"], before["trapline_alerts_active"])
	}
}
