package tui

import (
	"fmt"
	"strings"
	"time"

	"trapline/alerts"
	"trapline/alerts/alarmbook"
)

// AlertFormat formats alert events as alert lines.
type AlertFormat struct {
	// Width is the terminal width; 0 means no limit (plain output).
	Width int
	// MaxLines bounds the lines of one alert (0: no limit); the last line
	// ends in an ellipsis when the message was cut.
	MaxLines int
	// ShowID appends the alert id (the one to acknowledge).
	ShowID bool
	// Loc is the time zone of the wall times; nil means time.Local.
	Loc *time.Location
}

// NewAlertFormat returns the format for a terminal width columns wide: at
// 80 columns an alert takes at most two lines; from 120 columns up (and
// with no limit, width 0) the message is shown in full with the alert id.
func NewAlertFormat(width int) AlertFormat {
	f := AlertFormat{Width: width, MaxLines: 2}
	if width == 0 || width >= 120 {
		f.MaxLines, f.ShowID = 0, true
	}
	return f
}

// verbs name what an event did to its alarm, all of the same width.
var verbs = map[alarmbook.Kind]string{
	alarmbook.Raised:       "RAISED   ",
	alarmbook.Escalated:    "ESCALATED",
	alarmbook.Repeated:     "RE-RAISED",
	alarmbook.Acknowledged: "ACKED    ",
	alarmbook.Cleared:      "CLEARED  ",
}

// streamWidth is the width of the stream id in alert lines.
const streamWidth = 8

// indent is the indent of an alert's continuation lines.
const indent = 4

// Lines returns the lines of one event, given what it did to its alarm (the
// Change that alarmbook.Book.Apply returned); a duplicate gives no line. An
// escalation reads as the alarm moving up ("air-trapping medium → high"),
// whatever id the event carries.
func (f AlertFormat) Lines(ev *alerts.Event, ch alarmbook.Change) []string {
	if ch.Kind == alarmbook.Duplicate {
		return nil
	}
	ts := "--:--:--"
	if !ev.Time.IsZero() {
		loc := f.Loc
		if loc == nil {
			loc = time.Local
		}
		ts = ev.Time.In(loc).Format(time.TimeOnly)
	}
	cond := Sanitize(ev.Condition)
	prio := Sanitize(string(ev.Priority))
	what := fmt.Sprintf("%s (%s)", cond, prio)
	msg := Sanitize(ev.Message)
	switch ch.Kind {
	case alarmbook.Escalated:
		from := Sanitize(string(ch.From))
		if from == "" || from == prio {
			from = "?"
		}
		what = fmt.Sprintf("%s %s → %s", cond, from, prio)
		msg = strings.TrimPrefix(msg, "escalated to "+prio+" ")
		// "(worsened): …" says why: keep it beside the arrow.
		if strings.HasPrefix(msg, "(") {
			if j := strings.Index(msg, "): "); j > 0 {
				what, msg = what+" "+msg[:j+1], msg[j+3:]
			}
		}
	case alarmbook.Cleared:
		msg = strings.TrimPrefix(msg, "cleared: ")
	}
	if f.ShowID {
		msg += " [" + Sanitize(ev.ID) + "]"
	}
	line := fmt.Sprintf("%s %s %s %s: %s", ts, pad(Sanitize(ev.Stream), streamWidth, true), verbs[ch.Kind], what, msg)
	return Wrap(line, f.Width, indent, f.MaxLines)
}

// ActiveLine lists the open alarms of one stream with their priority (and
// "ack" when acknowledged), fitted to width (0: no limit).
func ActiveLine(open []*alarmbook.Alarm, width int) string {
	if len(open) == 0 {
		return Fit("alarms: none", width)
	}
	tags := make([]string, 0, len(open))
	for _, a := range open {
		tag := Sanitize(a.Condition) + " (" + Sanitize(string(a.Priority))
		if a.Acked {
			tag += ", ack"
		}
		tags = append(tags, tag+")")
	}
	return Fit("alarms: "+strings.Join(tags, ", "), width)
}

// SummaryLines counts alarms, not events: per condition how many alarms
// there were, and how many of them were raised, escalated, acknowledged,
// cleared and are still open, then the total. An alarm that escalated
// twice and cleared counts once. Lines fit width (0: no limit).
func SummaryLines(b *alarmbook.Book, width int) []string {
	per, total := b.Summary()
	if total.Alarms == 0 {
		return []string{"no alarms"}
	}
	condW := 0
	for _, t := range per {
		condW = max(condW, Width(Sanitize(t.Condition)))
	}
	condW = min(condW, 22)
	out := make([]string, 0, len(per)+1)
	for _, t := range per {
		out = append(out, tallyLine(pad(Sanitize(t.Condition), condW, true), t, width))
	}
	return append(out, tallyLine(pad("all", condW, true), total, width))
}

// tallyLine is one line of the summary: in full words when they fit, else
// in short ones, else cut.
func tallyLine(name string, t alarmbook.Tally, width int) string {
	noun := "alarms"
	if t.Alarms == 1 {
		noun = "alarm"
	}
	s := fmt.Sprintf("%s %d %s: %d raised, %d escalated, %d acknowledged, %d cleared, %d open",
		name, t.Alarms, noun, t.Raised, t.Escalated, t.Acknowledged, t.Cleared, t.Open)
	if width > 0 && Width(s) > width {
		s = fmt.Sprintf("%s %d %s: raised %d, escalated %d, acked %d, cleared %d, open %d",
			name, t.Alarms, noun, t.Raised, t.Escalated, t.Acknowledged, t.Cleared, t.Open)
	}
	return Fit(s, width)
}
