package tests

import (
	"context"
	"encoding/json"
	"path/filepath"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/analyze"
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
			httpPort := freePort(t)
			cfg := outageConfig(t, dir, link, ns.URL(), httpPort)
			ctx, cancel := context.WithTimeout(t.Context(), 3*time.Minute)
			defer cancel()
			first := startDaemonProcess(t, "run", "--config", cfg)
			waitFor(t, 30*time.Second, "the daemon's /metrics", func() bool { return metricsOf(httpPort) != nil })
			// 18 simulated minutes at 60× take 18 s; air trapping builds
			// from minute 2 and resolves after minute 11.
			simDone := make(chan error, 1)
			go func() { simDone <- streamScenario(ctx, t, "bronchospasm", "bed-5", link, 60) }()
			waitFor(t, 60*time.Second, "an air-trapping alarm", func() bool { return metricsOf(httpPort)["trapline_alerts_active"] >= 1 })
			time.Sleep(2 * time.Second) // a checkpoint with the alarm open
			if tc.kill {
				first.kill()
			} else if err := first.stop(20 * time.Second); err != nil {
				t.Fatal(err)
			}
			second := startDaemonProcess(t, "run", "--config", cfg)
			if err := <-simDone; err != nil {
				t.Fatalf("simulator: %v", err)
			}
			waitFor(t, 30*time.Second, "the spool to drain", func() bool {
				m := metricsOf(httpPort)
				return m != nil && m["trapline_spool_depth"] == 0
			})
			stable(t, 20*time.Second, "the alert count to settle", func() float64 { return metricsOf(httpPort)["trapline_alerts_total"] })
			if err := second.stop(30 * time.Second); err != nil {
				t.Error(err)
			}
			stored := storedAlerts(t, jetStreamOf(t, ns.URL()), "TRAPLINE_ALERTS")
			checkTerminal(t, stored)
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

// checkTerminal checks that every alarm id in stored ends in a terminal
// state or is superseded, that the rising-peak alarm was raised, and that
// a restart was marked by a monitoring-gap event.
func checkTerminal(t *testing.T, stored []alerts.Event) {
	t.Helper()
	open := map[string]bool{}
	rising, gap := false, false
	for _, e := range stored {
		switch {
		case e.Condition == alerts.CondMonitoringGap:
			gap = true
			continue
		case e.Condition == analyze.CondRisingPeakPressure && e.State == alerts.Raised:
			rising = true
		}
		if e.Supersedes != "" {
			delete(open, e.Supersedes)
		}
		if e.State.Terminal() {
			delete(open, e.ID)
		} else {
			open[e.ID] = true
		}
	}
	if len(open) != 0 {
		t.Errorf("alarms without a terminal state in JetStream: %v", open)
	}
	if !rising {
		t.Error("the rising-peak-pressure alarm of the scenario was not raised")
	}
	if !gap {
		t.Error("no monitoring-gap event marks the restart")
	}
}
