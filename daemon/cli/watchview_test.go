package cli

import (
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/daemon/bus"
	"trapline/daemon/tui"
)

// TestWatchPlainGolden feeds the watch view, through the same handler the
// NATS subscriptions call, an alarm that escalates, is acknowledged by
// someone whose name carries a terminal escape sequence, and clears, with
// breaths between, and compares its plain 80-column output (alert lines as
// they come, then the stream block) with testdata/watch_plain_80.golden.
// Every line fits 80 columns, EEF and Te/τ are there with their units, and
// no escape byte reaches the output. TRAPLINE_UPDATE_TESTDATA=1 rewrites
// the file.
func TestWatchPlainGolden(t *testing.T) {
	var out bytes.Buffer
	v := newWatchView(&out, watchOptions{Plain: true, Loc: time.UTC})
	send := func(kind string, x any) {
		b, err := json.Marshal(x)
		if err != nil {
			t.Fatal(err)
		}
		v.handle(kind, b)
	}
	t0 := time.Date(2026, 3, 1, 10, 0, 0, 0, time.UTC)
	seq := 12
	ev := alerts.Event{Type: "alert", Schema: 1, ID: "bed-7/air-trapping/1", Stream: "bed-7", Condition: "air-trapping",
		Class: "physiological", Priority: alerts.Medium, State: alerts.Raised, Time: t0, TS: 40, BreathSeq: &seq,
		Message: "expiratory flow has not returned to zero for 4 of the last 6 breaths; intrinsic PEEP about 4.1 cmH2O, trapped volume about 180 mL"}
	send("alert", ev)
	send("alert", ev) // a replay: shown once
	b := analyze.NewBreath()
	b.Stream, b.Seq, b.StartS, b.RateBPM, b.VteML, b.PeakCmH2O, b.PEEPCmH2O = "bed-7", 14, 44.1, 20, 480, 31.5, 5
	b.EndExpFlowLPM, b.TeOverTau, b.PEEPiCmH2O, b.TrappedML = 12.6, 1.12, 6.4, 248
	send("breath", b)
	esc := ev
	esc.ID, esc.Supersedes, esc.Priority, esc.Time, esc.TS = "bed-7/air-trapping/2", ev.ID, alerts.High, t0.Add(5*time.Minute), 340
	esc.Message = "escalated to high (unacknowledged for 300 s): intrinsic PEEP about 6.7 cmH2O, trapped volume about 262 mL"
	send("alert", esc)
	ack := esc
	ack.State, ack.Time, ack.TS = alerts.Acknowledged, t0.Add(6*time.Minute), 400
	ack.Message = "acknowledged by nurse\x1b[2J\x1b]0;owned\x07; announced again after 120 s if still present"
	send("alert", ack)
	send("status", bus.StreamStatus{Type: "status", Schema: 1, Stream: "bed-9", Connected: false})
	clr := esc
	clr.State, clr.Time, clr.TS, clr.Message = alerts.Cleared, t0.Add(8*time.Minute), 520, "cleared: no air trapping: 0 of the last 6 breaths show it (need 4)"
	send("alert", clr)
	v.mu.Lock()
	for _, l := range v.plainLines() {
		v.write(l + "\n")
	}
	v.mu.Unlock()
	for _, l := range v.summary(0) {
		out.WriteString(l + "\n")
	}
	got := out.String()
	for _, l := range strings.Split(strings.TrimRight(got, "\n"), "\n") {
		if tui.Width(l) > 80 {
			t.Errorf("line wider than 80 columns (%d): %q", tui.Width(l), l)
		}
	}
	for _, want := range []string{"EEF", "Te/τ", "L/min", "cmH2O", "ESCALATED air-trapping medium → high", "0 open"} {
		if !strings.Contains(got, want) {
			t.Errorf("output lacks %q", want)
		}
	}
	if strings.ContainsAny(got, "\x1b\x07") {
		t.Errorf("an escape sequence reached the output: %q", got)
	}
	path := filepath.Join("testdata", "watch_plain_80.golden")
	if os.Getenv("TRAPLINE_UPDATE_TESTDATA") != "" {
		if err := os.MkdirAll("testdata", 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, []byte(got), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("%v (TRAPLINE_UPDATE_TESTDATA=1 writes it)", err)
	}
	if got != string(want) {
		t.Errorf("watch output differs from %s:\n%s", path, got)
	}
}
