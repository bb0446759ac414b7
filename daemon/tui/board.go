package tui

import (
	"sort"

	"trapline/alerts"
	"trapline/alerts/alarmbook"
	"trapline/analyze"
)

// Board is the state behind a terminal view of many streams: the latest
// breath and the signal of each stream, the alarms (in an alarmbook.Book)
// and the latest alert events. Render lays it out at any width, so a
// resized terminal is redrawn to fit. A Board is not safe for concurrent
// use; the caller serialises access.
type Board struct {
	// Book holds the alarms; SummaryLines(board.Book, width) is the
	// closing summary.
	Book    *alarmbook.Book
	maxLog  int
	streams map[string]*boardStream
	log     []logEntry
}

type boardStream struct {
	breath    analyze.Breath
	hasBreath bool
	noSignal  bool
}

type logEntry struct {
	ev alerts.Event
	ch alarmbook.Change
}

// NewBoard returns an empty board that keeps the last maxLog alert events
// (at least one).
func NewBoard(maxLog int) *Board {
	return &Board{Book: alarmbook.New(), maxLog: max(maxLog, 1), streams: map[string]*boardStream{}}
}

func (b *Board) stream(id string) *boardStream {
	s := b.streams[id]
	if s == nil {
		s = &boardStream{}
		b.streams[id] = s
	}
	return s
}

// Breath records a stream's latest breath.
func (b *Board) Breath(br *analyze.Breath) {
	s := b.stream(br.Stream)
	s.breath, s.hasBreath = *br, true
}

// Signal records whether a stream's source is connected.
func (b *Board) Signal(stream string, connected bool) { b.stream(stream).noSignal = !connected }

// Alert applies an alert event to the alarms and keeps it for the log; it
// returns what the event did (a Duplicate is neither applied nor logged).
func (b *Board) Alert(ev *alerts.Event) alarmbook.Change {
	ch := b.Book.Apply(ev)
	if ch.Kind == alarmbook.Duplicate {
		return ch
	}
	b.stream(ev.Stream)
	b.log = append(b.log, logEntry{ev: *ev, ch: ch})
	if len(b.log) > b.maxLog {
		b.log = b.log[len(b.log)-b.maxLog:]
	}
	return ch
}

// Render lays the board out at width columns (DefaultWidth when ≤ 0): the
// stream lines (StreamLines), then the latest alert events in format f (its
// Width is set to width). No line is wider than width.
func (b *Board) Render(width int, f AlertFormat) []string {
	if width <= 0 {
		width = DefaultWidth
	}
	out := append(b.StreamLines(width), "", "alert events:")
	if len(b.log) == 0 {
		out = append(out, "  none yet")
	}
	f.Width = width
	for i := range b.log {
		out = append(out, f.Lines(&b.log[i].ev, b.log[i].ch)...)
	}
	return out
}

// StreamLines lays out the streams at width columns (DefaultWidth when
// ≤ 0): the breath table's header, then per stream (sorted by id) its
// latest breath and a line with its open alarms.
func (b *Board) StreamLines(width int) []string {
	if width <= 0 {
		width = DefaultWidth
	}
	ids := make([]string, 0, len(b.streams))
	sw := 6
	for id := range b.streams {
		ids = append(ids, id)
		sw = max(sw, Width(Sanitize(id)))
	}
	sort.Strings(ids)
	table := NewBreathTable(width, min(sw, 12))
	out := table.Header()
	if len(ids) == 0 {
		out = append(out, "waiting for breaths…")
	}
	for _, id := range ids {
		s := b.streams[id]
		switch {
		case s.noSignal:
			out = append(out, table.Placeholder(id, "no signal"))
		case !s.hasBreath:
			out = append(out, table.Placeholder(id, "no breath yet"))
		default:
			out = append(out, Fit(table.Line(&s.breath), width))
		}
		out = append(out, "  "+ActiveLine(b.Book.Open(id), width-2))
	}
	return out
}
