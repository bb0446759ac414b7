// Package alarmbook follows alarms, not events. One alarm is what a reader
// sees as one problem: the events of one alert id, and of every id that
// supersedes it (a second escalation, or a re-announcement after an
// acknowledgement, starts a new id that names the old one in Supersedes).
// The terminal view, its summary and the recording plot all read alarms
// from a Book, so that an escalation reads as one alarm moving up and an
// all-clear reads as one alarm cleared.
package alarmbook

import (
	"strings"

	"trapline/alerts"
)

// Kind is what an event did to its alarm.
type Kind int

const (
	// Duplicate: the event (id and state) was seen before; nothing changed.
	Duplicate Kind = iota
	// Raised: a new alarm.
	Raised
	// Escalated: the alarm's priority went up.
	Escalated
	// Repeated: the alarm was announced again at the same priority (its
	// acknowledgement expired while the condition was still present).
	Repeated
	// Acknowledged: someone acknowledged the alarm.
	Acknowledged
	// Cleared: the alarm ended.
	Cleared
)

// Step is one change of an alarm, on the stream's time axis.
type Step struct {
	TS       float64
	Kind     Kind
	Priority alerts.Priority
}

// Alarm is one alarm: a raise and everything that followed it, across the
// ids that superseded one another.
type Alarm struct {
	Stream    string
	Condition string
	// IDs are the alert ids of the alarm, first one first; the last one is
	// the id to acknowledge.
	IDs []string
	// Priority is the current priority.
	Priority alerts.Priority
	// Open is true until the alarm is cleared.
	Open bool
	// Acked is true while the alarm's latest announcement is acknowledged.
	Acked bool
	// Escalations and Acks count those steps.
	Escalations, Acks int
	// Steps is the history of the alarm in the order the events came.
	Steps []Step
}

// ID returns the alarm's current alert id.
func (a *Alarm) ID() string { return a.IDs[len(a.IDs)-1] }

// Change is the effect of one event.
type Change struct {
	Kind Kind
	// Alarm is the alarm the event belongs to (nil for a duplicate).
	Alarm *Alarm
	// From is the priority before an escalation; empty when the earlier
	// events of the alarm were not seen.
	From alerts.Priority
}

// Book holds the alarms seen so far, in the order they were raised. It is
// not safe for concurrent use.
type Book struct {
	byID   map[string]*Alarm
	seen   map[string]bool
	alarms []*Alarm
}

// New returns an empty book.
func New() *Book {
	return &Book{byID: map[string]*Alarm{}, seen: map[string]bool{}}
}

// Alarms returns every alarm seen, in the order they were first seen.
func (b *Book) Alarms() []*Alarm { return b.alarms }

// Open returns the alarms of stream that are still open (all streams when
// stream is empty), in the order they were first seen.
func (b *Book) Open(stream string) []*Alarm {
	var out []*Alarm
	for _, a := range b.alarms {
		if a.Open && (stream == "" || a.Stream == stream) {
			out = append(out, a)
		}
	}
	return out
}

// rank orders priorities; an unknown priority ranks lowest.
func rank(p alerts.Priority) int {
	switch p {
	case alerts.High:
		return 3
	case alerts.Medium:
		return 2
	case alerts.Low:
		return 1
	}
	return 0
}

// Apply takes one event and returns what it did. Events are applied in the
// order they were published; a repeated event (same id and state), or one
// whose state is not of the contract, is a Duplicate and changes nothing.
func (b *Book) Apply(ev *alerts.Event) Change {
	switch ev.State {
	case alerts.Raised, alerts.Escalated, alerts.Acknowledged, alerts.Cleared, alerts.Ended:
	default:
		return Change{Kind: Duplicate} // not a state of the contract: ignored
	}
	if b.seen[ev.DedupID()] {
		return Change{Kind: Duplicate}
	}
	b.seen[ev.DedupID()] = true
	a := b.byID[ev.ID]
	if a == nil && ev.Supersedes != "" {
		if old := b.byID[ev.Supersedes]; old != nil {
			a = old
			a.IDs = append(a.IDs, ev.ID)
			b.byID[ev.ID] = a
		}
	}
	fresh := a == nil
	if fresh {
		a = &Alarm{Stream: ev.Stream, Condition: ev.Condition, IDs: []string{ev.ID}, Open: true}
		b.byID[ev.ID] = a
		b.alarms = append(b.alarms, a)
	}
	ch := Change{Alarm: a, From: a.Priority}
	switch ev.State {
	case alerts.Raised:
		switch {
		case fresh && ev.Supersedes == "":
			ch.Kind = Raised
		case rank(ev.Priority) > rank(a.Priority) || (fresh && strings.HasPrefix(ev.Message, "escalated to ")):
			ch.Kind = Escalated
		default:
			ch.Kind = Repeated
		}
		a.Open, a.Acked = true, false
	case alerts.Escalated:
		ch.Kind = Escalated
		a.Acked = false
	case alerts.Acknowledged:
		ch.Kind = Acknowledged
		a.Acked = true
		a.Acks++
	case alerts.Cleared, alerts.Ended:
		ch.Kind = Cleared
		a.Open = false
	}
	if ch.Kind == Escalated {
		a.Escalations++
	}
	a.Priority = ev.Priority
	a.Steps = append(a.Steps, Step{TS: ev.TS, Kind: ch.Kind, Priority: ev.Priority})
	return ch
}

// Tally is the count of alarms of one condition.
type Tally struct {
	Condition string
	// Alarms counts the alarms; Raised those whose raise was seen;
	// Escalated, Acknowledged and Cleared those that were escalated (at
	// least once), acknowledged (at least once) and cleared; Open those
	// still open.
	Alarms, Raised, Escalated, Acknowledged, Cleared, Open int
}

// Summary counts the alarms of every condition, in the order the
// conditions were first seen, and the total over all of them.
func (b *Book) Summary() (per []Tally, total Tally) {
	idx := map[string]int{}
	for _, a := range b.alarms {
		i, ok := idx[a.Condition]
		if !ok {
			i = len(per)
			idx[a.Condition] = i
			per = append(per, Tally{Condition: a.Condition})
		}
		for _, t := range []*Tally{&per[i], &total} {
			t.Alarms++
			if len(a.Steps) > 0 && a.Steps[0].Kind == Raised {
				t.Raised++
			}
			if a.Escalations > 0 {
				t.Escalated++
			}
			if a.Acks > 0 {
				t.Acknowledged++
			}
			if a.Open {
				t.Open++
			} else {
				t.Cleared++
			}
		}
	}
	return per, total
}

// Segment is a stretch of an alarm at one priority, on the stream's time
// axis.
type Segment struct {
	FromS, ToS float64
	Priority   alerts.Priority
}

// Span returns the stream times of the alarm's first step and of its
// clearing; an open alarm runs to endS.
func (a *Alarm) Span(endS float64) (fromS, toS float64) {
	if len(a.Steps) == 0 {
		return endS, endS
	}
	fromS, toS = a.Steps[0].TS, endS
	if last := a.Steps[len(a.Steps)-1]; !a.Open {
		toS = last.TS
	}
	return fromS, toS
}

// Segments splits the alarm's span at its priority changes; an open alarm
// runs to endS. Segments of no length are left out.
func (a *Alarm) Segments(endS float64) []Segment {
	fromS, toS := a.Span(endS)
	var out []Segment
	cur := Segment{FromS: fromS, Priority: ""}
	for _, s := range a.Steps {
		if s.Kind == Cleared || s.Priority == cur.Priority {
			continue
		}
		if cur.Priority != "" && s.TS > cur.FromS {
			cur.ToS = s.TS
			out = append(out, cur)
		}
		cur = Segment{FromS: max(s.TS, fromS), Priority: s.Priority}
	}
	if cur.Priority != "" && toS > cur.FromS {
		cur.ToS = toS
		out = append(out, cur)
	}
	return out
}

// String names the kind.
func (k Kind) String() string {
	switch k {
	case Raised:
		return "raised"
	case Escalated:
		return "escalated"
	case Repeated:
		return "repeated"
	case Acknowledged:
		return "acknowledged"
	case Cleared:
		return "cleared"
	}
	return "duplicate"
}
