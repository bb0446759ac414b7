package cli

import (
	"bufio"
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/ingest"
	"trapline/simulator"
)

// writeScenario writes a shipped scenario as a recording in the sample line
// format v1.
func writeScenario(t *testing.T, name string) string {
	t.Helper()
	sc, err := simulator.Shipped(name)
	if err != nil {
		t.Fatal(err)
	}
	sim, err := simulator.New(sc)
	if err != nil {
		t.Fatal(err)
	}
	enc, err := ingest.NewTextEncoder(ingest.TextEncoderOptions{})
	if err != nil {
		t.Fatal(err)
	}
	buf := append([]byte(nil), enc.Header()...)
	for {
		s, ok := sim.Next()
		if !ok {
			break
		}
		buf = enc.Append(buf, "", s)
	}
	path := filepath.Join(t.TempDir(), name+".csv")
	if err := os.WriteFile(path, buf, 0o600); err != nil {
		t.Fatal(err)
	}
	return path
}

// At each disconnection of the recording the verb prints a signal-lost
// raise lost_after_s (5 s) after the last sample and its clearing at the
// first sample after it, among the breath records in time order; the
// output is the same on every run, alert ids included.
func TestAnalyzePrintsAlertsInTimeOrder(t *testing.T) {
	path := writeScenario(t, "disconnect")
	run := func(args ...string) string {
		t.Helper()
		var stdout, stderr bytes.Buffer
		if code := Run(t.Context(), append([]string{"analyze"}, args...), nil, &stdout, &stderr); code != ExitOK {
			t.Fatalf("exit %d: %s", code, stderr.String())
		}
		return stdout.String()
	}
	out := run("--start", "2026-12-01T10:00:00Z", path)
	if again := run("--start", "2026-12-01T10:00:00Z", path); again != out {
		t.Fatal("two runs on the same recording differ")
	}
	start := time.Date(2026, 12, 1, 10, 0, 0, 0, time.UTC)
	var states []string
	lastT, breaths := 0.0, 0
	sc := bufio.NewScanner(strings.NewReader(out))
	sc.Buffer(nil, 1<<20)
	for sc.Scan() {
		var rec struct {
			Type string  `json:"type"`
			TEnd float64 `json:"t_end_s"`
		}
		if err := json.Unmarshal(sc.Bytes(), &rec); err != nil {
			t.Fatalf("%q: %v", sc.Text(), err)
		}
		ts := rec.TEnd
		if rec.Type == "alert" {
			var e alerts.Event
			if err := json.Unmarshal(sc.Bytes(), &e); err != nil {
				t.Fatal(err)
			}
			if err := e.Validate(); err != nil {
				t.Error(err)
			}
			if want := start.Add(time.Duration(e.TS * float64(time.Second))); e.Time.Sub(want).Abs() > time.Millisecond {
				t.Errorf("alert time %v, want --start + t_s = %v", e.Time, want)
			}
			states = append(states, e.Condition+" "+string(e.State))
			ts = e.TS
		} else {
			breaths++
		}
		// A breath is printed when the next one is confirmed, shortly
		// after its end: allow that much out of order.
		if ts < lastT-0.2 {
			t.Errorf("record at %.2f s printed after one at %.2f s", ts, lastT)
		}
		lastT = max(lastT, ts)
	}
	// Each dropout is a gap in the sample times too, as the live source
	// reports it (ingest.Timelines): sample-gaps is raised around it.
	want := strings.Repeat("sample-gaps raised,signal-lost raised,signal-lost cleared,sample-gaps cleared,", 3)
	if got := strings.Join(states, ",") + ","; got != want || breaths < 90 {
		t.Errorf("%d breaths and alerts %s; want ≥ 90 breaths and %s", breaths, got, want)
	}
	if sum := run("--summary", path); !strings.Contains(sum, "12 alert events:") || strings.Count(sum, "signal-lost") != 6 {
		t.Errorf("--summary lacks the table of the 12 alert events:\n%s", sum[max(0, len(sum)-1500):])
	}
	if quiet := run("--no-alerts", path); strings.Contains(quiet, `"type":"alert"`) {
		t.Error("--no-alerts printed alerts")
	}
	var stderr bytes.Buffer
	if code := Run(t.Context(), []string{"analyze", "--start", "yesterday", path}, nil, &bytes.Buffer{}, &stderr); code != ExitUsage {
		t.Errorf("bad --start: exit %d, want %d (%s)", code, ExitUsage, stderr.String())
	}
}
