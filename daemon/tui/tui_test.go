package tui

import (
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"trapline/alerts"
	"trapline/alerts/alarmbook"
	"trapline/analyze"
	"trapline/daemon/internal/simrun"
)

// update rewrites the golden files, as for the ingest package's.
var update = os.Getenv("TRAPLINE_UPDATE_TESTDATA") == "1"

// TestSanitize: escape sequences and control characters never reach the
// terminal. The sequence layouts are those of ECMA-48, "Control functions
// for coded character sets", 5th edition (1991): CSI = ESC [ … final byte
// 0x40–0x7E, OSC = ESC ] … BEL or ST, C1 CSI = 0x9B. The bidirectional
// controls are those of Unicode Standard Annex #9 (e.g. U+202E RIGHT-TO-
// LEFT OVERRIDE, U+2066 LEFT-TO-RIGHT ISOLATE).
func TestSanitize(t *testing.T) {
	cases := []struct{ in, want string }{
		{"plain text 5 cmH2O", "plain text 5 cmH2O"},
		{"red \x1b[31mALARM\x1b[0m", "red ALARM"},
		{"clear\x1b[2J\x1b[Hscreen", "clearscreen"},
		{"title\x1b]0;owned\x07 after", "title after"},
		{"title\x1b]0;owned\x1b\\ after", "title after"},
		{"c1\u009b31mcsi", "c1csi"},
		{"bell\a and backspace\b", "bell and backspace"},
		{"two\nlines\tand\rtab", "two lines and tab"},
		{"rtl \u202eevil\u202c and \u2066iso\u2069", "rtl evil and iso"},
		{"bad \xff utf8", "bad \ufffd utf8"},
		{"del\x7f", "del"},
		{"unicode τ → … stays", "unicode τ → … stays"},
		{"lone esc at end\x1b", "lone esc at end"},
		{"keypad \x1b=mode", "keypad mode"},
	}
	for _, c := range cases {
		if got := Sanitize(c.in); got != c.want {
			t.Errorf("Sanitize(%q) = %q, want %q", c.in, got, c.want)
		}
	}
}

func FuzzSanitize(f *testing.F) {
	for _, s := range []string{"a\x1b[31mb", "\x1b]0;x\x07", "\u009b1m", "\xff\xfe", "ok"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		out := Sanitize(s)
		for _, r := range out {
			if unsafeRune(r) {
				t.Fatalf("Sanitize(%q) = %q keeps %U", s, out, r)
			}
		}
		if Sanitize(out) != out {
			t.Fatalf("Sanitize is not idempotent on %q", s)
		}
		for _, w := range []int{1, 2, 7, 80} {
			for _, l := range Wrap(out, w, 4, 3) {
				if Width(l) > w {
					t.Fatalf("Wrap(%q, %d) gives %q, %d wide", out, w, l, Width(l))
				}
			}
		}
	})
}

// TestWrapAndFit: lines never exceed the width, nothing is lost when there
// is no line limit, and a cut ends in an ellipsis.
func TestWrapAndFit(t *testing.T) {
	s := "expiratory flow has not returned to zero for 4 of the last 6 breaths; a-very-long-word-that-cannot-break-anywhere-at-all-here"
	for _, w := range []int{20, 33, 80} {
		lines := Wrap(s, w, 4, 0)
		var words []string
		for _, l := range lines {
			if Width(l) > w {
				t.Errorf("width %d: line %q is %d wide", w, l, Width(l))
			}
			words = append(words, strings.Fields(l)...)
		}
		if got := strings.Join(words, ""); got != strings.ReplaceAll(s, " ", "") {
			t.Errorf("width %d: wrapping lost text: %q", w, got)
		}
		two := Wrap(s, w, 4, 2)
		if len(lines) > 2 && (len(two) != 2 || !strings.HasSuffix(two[1], ellipsis) || Width(two[1]) > w) {
			t.Errorf("width %d: two lines %q", w, two)
		}
	}
	if got := Fit("abcdef", 4); got != "abc…" {
		t.Errorf("Fit = %q", got)
	}
}

// fixture is a hand-made stretch of a stream: breaths and the alert events
// of one alarm that is raised, escalated twice (the second time under a new
// id), acknowledged and cleared, plus one alarm still open. The values are
// invented; they only need to be plausible and of every width.
func fixture() ([]analyze.Breath, []alerts.Event) {
	mk := func(seq int, t, vt, pip, peep, eef, teTau, peepi, trapped float64, flags ...string) analyze.Breath {
		b := analyze.NewBreath()
		b.Stream, b.Seq, b.StartS, b.RateBPM, b.VteML, b.PeakCmH2O, b.PEEPCmH2O = "bed-7", seq, t, 18, vt, pip, peep
		b.EndExpFlowLPM, b.TeOverTau, b.PEEPiCmH2O, b.TrappedML = eef, teTau, peepi, trapped
		b.RCmH2OSPerL, b.CMLPerCmH2O, b.Flags = 28.4, 52.1, flags
		return b
	}
	breaths := []analyze.Breath{
		mk(1, 3.3, 498, 21.4, 5.0, 0.2, 4.91, 0.1, 4),
		mk(120, 401.7, 476, 38.9, 5.1, 12.6, 1.12, 6.4, 248, "no-pause"),
		mk(121, 405.0, math.NaN(), 39.2, 5.0, 13.1, 1.08, 6.7, 262, "no-pause", "leak-suspected"),
		mk(12345, 41234.5, 1012, 102.5, 15.5, 121.5, 12.25, 25.5, 1480),
	}
	breaths[2].PlateauCmH2O = 31.6
	t0 := time.Date(2026, 3, 4, 10, 0, 0, 0, time.UTC)
	ev := func(id string, st alerts.State, p alerts.Priority, ts float64, msg, sup string) alerts.Event {
		return alerts.Event{ID: id, Stream: "bed-7", Condition: "air-trapping", Priority: p, State: st,
			Time: t0.Add(time.Duration(ts) * time.Second), TS: ts, Message: msg, Supersedes: sup}
	}
	a1, a2 := "bed-7/air-trapping/1772618400000", "bed-7/air-trapping/1772618700000"
	events := []alerts.Event{
		ev(a1, alerts.Raised, alerts.Low, 0, "expiratory flow has not returned to zero for 4 of the last 6 breaths; intrinsic PEEP about 4.1 cmH2O, trapped volume about 180 mL", ""),
		ev(a1, alerts.Escalated, alerts.Medium, 60, "escalated to medium (worsened): expiratory flow has not returned to zero for 6 of the last 6 breaths; intrinsic PEEP about 6.4 cmH2O, trapped volume about 248 mL", ""),
		ev(a2, alerts.Raised, alerts.High, 300, "escalated to high (unacknowledged for 240 s): intrinsic PEEP about 6.7 cmH2O, trapped volume about 262 mL", a1),
		ev(a2, alerts.Acknowledged, alerts.High, 310, "acknowledged by \x1b[31mnurse\x1b[0m; announced again after 120 s if still present", ""),
		ev(a2, alerts.Cleared, alerts.High, 420, "cleared: no air trapping: 0 of the last 6 breaths show it (need 4)", ""),
	}
	open := ev("bed-7/rising-peak-pressure/1772618800000", alerts.Raised, alerts.Medium, 400, "peak pressure rising 2.1 cmH2O/min (5.4 %/min) over the last 150 s", "")
	open.Condition = "rising-peak-pressure"
	return breaths, append(events, open)
}

// render is the whole terminal view of the fixture at one width.
func render(width int) []string {
	breaths, events := fixture()
	var out []string
	for _, sw := range []int{0, 10} {
		bt := NewBreathTable(width, sw)
		out = append(out, bt.Header()...)
		for i := range breaths {
			out = append(out, bt.Line(&breaths[i]))
		}
		out = append(out, bt.Placeholder("bed-9", "no breath yet"), "")
	}
	book := alarmbook.New()
	f := NewAlertFormat(width)
	f.Loc = time.UTC
	for i := range events {
		out = append(out, f.Lines(&events[i], book.Apply(&events[i]))...)
	}
	out = append(out, "", ActiveLine(book.Open("bed-7"), width), "")
	out = append(out, SummaryLines(book, width)...)
	// The whole board: two streams, one without signal.
	board := NewBoard(4)
	for i := range breaths {
		board.Breath(&breaths[i])
	}
	board.Signal("bed-10-with-a-long-name", false)
	for i := range events {
		board.Alert(&events[i])
	}
	out = append(out, "", "-- board --")
	return append(out, board.Render(width, f)...)
}

// TestGoldenView compares the view with human-readable golden files at 80
// and 120 columns (TRAPLINE_UPDATE_TESTDATA=1 go test ./daemon/tui rewrites them), and
// checks that no line is wider than the terminal.
func TestGoldenView(t *testing.T) {
	for _, w := range []int{80, 120} {
		lines := render(w)
		for _, l := range lines {
			if Width(l) > w {
				t.Errorf("width %d: %q is %d columns", w, l, Width(l))
			}
			if strings.ContainsRune(l, 0x1b) {
				t.Errorf("width %d: escape character in %q", w, l)
			}
		}
		got := strings.Join(lines, "\n") + "\n"
		path := filepath.Join("testdata", "view_"+map[int]string{80: "80", 120: "120"}[w]+".golden")
		if update {
			if err := os.WriteFile(path, []byte(got), 0o644); err != nil {
				t.Fatal(err)
			}
		}
		want, err := os.ReadFile(path)
		if err != nil {
			t.Fatalf("%v (TRAPLINE_UPDATE_TESTDATA=1 creates it)", err)
		}
		if got != string(want) {
			t.Errorf("width %d: view differs from %s:\n%s", w, path, got)
		}
	}
}

// TestViewKeepsAirTrappingFigures: at 80 columns, even with a stream
// column, the figures of air trapping (EEF, Te/τ, PEEPi, trapped) and their
// units stay on screen; R and C come only on wider terminals.
func TestViewKeepsAirTrappingFigures(t *testing.T) {
	for _, c := range []struct {
		width, stream int
		want, not     []string
	}{
		{80, 0, []string{"seq", "VTe", "PIP", "Pplat", "PEEP", "EEF", "Te/τ", "PEEPi", "trapped", "L/min", "cmH2O", "mL"}, []string{"cmH2O·s/L", "flags"}},
		{80, 12, []string{"EEF", "Te/τ", "PEEPi", "trapped"}, []string{"flags"}},
		{60, 0, []string{"EEF", "Te/τ"}, []string{"trapped"}},
		{120, 0, []string{"EEF", "Te/τ", "trapped", "cmH2O·s/L", "mL/cmH2O", "flags"}, nil},
	} {
		h := strings.Join(NewBreathTable(c.width, c.stream).Header(), "\n")
		for _, s := range c.want {
			if !strings.Contains(h, s) {
				t.Errorf("width %d stream %d: header lacks %q:\n%s", c.width, c.stream, s, h)
			}
		}
		for _, s := range c.not {
			if strings.Contains(h, s) {
				t.Errorf("width %d stream %d: header has %q:\n%s", c.width, c.stream, s, h)
			}
		}
	}
}

// TestSummaryOfDefaultScenario runs the demo's default scenario
// (bronchospasm) through the analysis offline and feeds every alert event
// to the summary: at the end no alarm is open, and the summary counts one
// alarm per chain of ids linked by supersedes (an id that supersedes
// another continues the same alarm), not one per event.
func TestSummaryOfDefaultScenario(t *testing.T) {
	if testing.Short() {
		t.Skip("simulates 18 minutes of signal")
	}
	r, err := simrun.Run("bronchospasm", 0)
	if err != nil {
		t.Fatal(err)
	}
	if len(r.Alerts) == 0 {
		t.Fatal("the default scenario raised no alert")
	}
	book := alarmbook.New()
	root := map[string]string{} // id → first id of its chain
	for i := range r.Alerts {
		ev := &r.Alerts[i]
		book.Apply(ev)
		if _, ok := root[ev.ID]; !ok {
			root[ev.ID] = ev.ID
			if r, ok := root[ev.Supersedes]; ok {
				root[ev.ID] = r
			}
		}
	}
	chains := map[string]bool{}
	for _, r := range root {
		chains[r] = true
	}
	_, total := book.Summary()
	if total.Open != 0 || total.Cleared != total.Alarms {
		t.Errorf("summary %+v: want every alarm cleared, 0 open", total)
	}
	if total.Alarms != len(chains) {
		t.Errorf("summary counts %d alarms; the events hold %d distinct alarms (ids %d, events %d)",
			total.Alarms, len(chains), len(root), len(r.Alerts))
	}
	lines := SummaryLines(book, 80)
	last := lines[len(lines)-1]
	if !strings.HasSuffix(last, "open 0") && !strings.HasSuffix(last, "0 open") {
		t.Errorf("summary does not end with 0 open: %q", last)
	}
	for _, l := range lines {
		if Width(l) > 80 {
			t.Errorf("summary line %q is wider than 80", l)
		}
	}
}
