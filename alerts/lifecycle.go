package alerts

import (
	"errors"
	"fmt"
	"maps"
	"math"
	"strconv"
	"time"

	"trapline/analyze"
)

// ErrUnknownAlert is returned by Ack for an id that names no current alarm
// of the stream (never raised, already cleared or superseded).
var ErrUnknownAlert = errors.New("unknown alert id")

// Lifecycle turns the findings of one stream into alert events. Each
// condition moves through these phases (see docs/detectors.md for the full
// table):
//
//	inactive → pending      the condition is present; the delay runs
//	pending  → inactive     absent again before the delay passed: no event
//	pending  → active       the delay passed: "raised" with a new id
//	active   → active       severity rose, or the alarm persisted without
//	                        acknowledgement for EscalateAfterS: "escalated"
//	active   → active       Ack: "acknowledged"; the ack expires after
//	                        AckExpiryS and a still-present condition is
//	                        announced again
//	active   → inactive     absent for ClearBreaths and ClearS (hysteresis):
//	                        "cleared"
//	active   → latched      same, but the condition latches and was not
//	                        acknowledged: no event, the alarm stays
//	latched  → inactive     Ack: "acknowledged" and "cleared"
//	latched  → active       present again: no event
//
// An id never carries the same state twice, because the id and the state
// together are the de-duplication id on JetStream and a repeat would be
// swallowed. An announcement that would repeat a state (a second
// escalation, or any announcement after an acknowledgement) therefore
// starts a new raise: a "raised" event with a new id whose Supersedes names
// the old id, which ends there.
//
// Ids are "<stream>/<condition>/<ms>", where ms is the wall time of the
// raise in Unix milliseconds, made strictly increasing per condition. Wall
// time is passed in, so ids are a deterministic function of the input; it
// keeps increasing across restarts, so a restarted daemon does not reuse an
// id, without any state on disk. (Stream time would not do: a device whose
// clock restarts at zero would repeat it.)
//
// Durations of delays, clearing and escalation run on the findings' stream
// time; the acknowledgement expiry runs on the wall clock of Ack and
// Update. A Lifecycle is not safe for concurrent use.
type Lifecycle struct {
	stream string
	cfg    LifecycleConfig
	conds  map[string]*alarm
	order  []string // conditions in order of first finding, for Active
}

type phase int

const (
	inactive phase = iota
	pending
	active
	latched
)

// alarm is the state of one condition of the stream.
type alarm struct {
	condition string
	cc        ConditionConfig
	phase     phase

	presentN      int     // consecutive present findings (pending)
	presentSinceS float64 // stream time of the first of them
	absentN       int     // consecutive absent findings (active)
	absentSinceS  float64

	id       string
	used     map[State]bool
	priority Priority
	lastEscS float64 // stream time of the raise or last escalation
	acked    bool
	ackWall  time.Time
	lastIDms int64
	last     analyze.Finding // the latest finding, for acknowledgement events
	lastOut  Event           // the latest event of the current id
}

// NewLifecycle returns the lifecycle of one stream; cfg must be valid.
func NewLifecycle(stream string, cfg LifecycleConfig) *Lifecycle {
	return &Lifecycle{stream: stream, cfg: cfg, conds: map[string]*alarm{}}
}

// rank orders priorities; an unknown priority ranks lowest.
func rank(p Priority) int {
	switch p {
	case High:
		return 3
	case Medium:
		return 2
	case Low:
		return 1
	}
	return 0
}

// fromSeverity maps a finding's severity to the IEC 60601-1-8 priority of
// the same meaning: immediate, prompt, or awareness.
func fromSeverity(s analyze.Severity) Priority {
	switch s {
	case analyze.SeverityHigh:
		return High
	case analyze.SeverityMedium:
		return Medium
	}
	return Low
}

func (a *alarm) priorityOf(f *analyze.Finding) Priority {
	if a.cc.Priority != "" {
		return Priority(a.cc.Priority)
	}
	return fromSeverity(f.Severity)
}

func up(p Priority) Priority {
	if rank(p) >= 2 {
		return High
	}
	return Medium
}

// since returns the non-negative stream time from t0 to t (a stream whose
// clock went back counts as no time passed).
func since(t0, t float64) float64 { return max(t-t0, 0) }

// Update takes one finding, with the wall time at which it was made, and
// returns the alert events it causes (often none).
//
// A finding without a finite time is ignored: the lifecycle could not time
// it, and its event could not be encoded.
func (l *Lifecycle) Update(f analyze.Finding, wall time.Time) []Event {
	if math.IsNaN(f.TimeS) || math.IsInf(f.TimeS, 0) {
		return nil
	}
	a := l.conds[f.Condition]
	if a == nil {
		a = &alarm{condition: f.Condition, cc: l.cfg.For(f.Condition)}
		l.conds[f.Condition] = a
		l.order = append(l.order, f.Condition)
	}
	if !a.cc.Enabled {
		return nil
	}
	a.last = f
	cc := &a.cc
	switch a.phase {
	case inactive, pending:
		if !f.Present {
			a.phase = inactive
			return nil
		}
		if a.phase == inactive {
			a.phase, a.presentN, a.presentSinceS = pending, 0, f.TimeS
		}
		a.presentN++
		if a.presentN-1 < cc.DelayBreaths || since(a.presentSinceS, f.TimeS) < cc.DelayS {
			return nil
		}
		a.phase, a.absentN = active, 0
		return []Event{l.raise(a, &f, wall, a.priorityOf(&f), "", "")}
	case latched:
		if f.Present {
			a.phase, a.absentN = active, 0
		}
		return nil
	}

	// Active.
	if !f.Present {
		if a.absentN == 0 {
			a.absentSinceS = f.TimeS
		}
		a.absentN++
		if a.absentN < cc.ClearBreaths || since(a.absentSinceS, f.TimeS) < cc.ClearS {
			return nil
		}
		if cc.Latching && !a.acked {
			a.phase = latched
			return nil
		}
		a.phase = inactive
		return []Event{l.event(a, &f, wall, Cleared, "cleared: "+f.Message)}
	}
	a.absentN = 0
	switch p := a.priorityOf(&f); {
	case rank(p) > rank(a.priority):
		return []Event{l.escalate(a, &f, wall, p, "worsened")}
	case cc.EscalateAfterS > 0 && !a.acked && a.priority != High && since(a.lastEscS, f.TimeS) >= cc.EscalateAfterS:
		return []Event{l.escalate(a, &f, wall, up(a.priority),
			fmt.Sprintf("unacknowledged for %.0f s", since(a.lastEscS, f.TimeS)))}
	case a.acked && cc.AckExpiryS > 0 && wall.Sub(a.ackWall) >= time.Duration(cc.AckExpiryS*float64(time.Second)):
		return []Event{l.raise(a, &f, wall, a.priority, a.id, "acknowledgement expired, still present: ")}
	}
	return nil
}

// raise starts a new raise with a new id; old is the id it supersedes, or
// empty.
func (l *Lifecycle) raise(a *alarm, f *analyze.Finding, wall time.Time, p Priority, old, why string) Event {
	ms := wall.UnixMilli()
	if ms <= a.lastIDms {
		ms = a.lastIDms + 1
	}
	a.lastIDms = ms
	a.id = l.stream + "/" + a.condition + "/" + strconv.FormatInt(ms, 10)
	a.used = map[State]bool{}
	a.priority, a.lastEscS, a.acked = p, f.TimeS, false
	e := l.event(a, f, wall, Raised, why+f.Message)
	e.Supersedes = old
	a.lastOut = e
	return e
}

// escalate raises the priority; a second escalation, or one after an
// acknowledgement, starts a new raise (see Lifecycle).
func (l *Lifecycle) escalate(a *alarm, f *analyze.Finding, wall time.Time, p Priority, why string) Event {
	msg := fmt.Sprintf("escalated to %s (%s): ", p, why)
	if a.used[Escalated] || a.used[Acknowledged] {
		return l.raise(a, f, wall, p, a.id, msg)
	}
	a.priority, a.lastEscS, a.acked = p, f.TimeS, false
	return l.event(a, f, wall, Escalated, msg+f.Message)
}

// event builds an event of the current id and records its state as used.
func (l *Lifecycle) event(a *alarm, f *analyze.Finding, wall time.Time, st State, msg string) Event {
	e := Event{
		Type: "alert", Schema: EventSchema,
		ID: a.id, Stream: l.stream, Condition: a.condition, Class: string(f.Class),
		Priority: a.priority, State: st, Time: wall.UTC(), TS: f.TimeS,
		Evidence: finite(f.Evidence), Message: CleanText(msg), Predict: finite(f.Predict),
	}
	if e.Evidence == nil {
		e.Evidence = map[string]float64{}
	}
	if math.Abs(e.TS) < 1e12 {
		e.TS = math.Round(e.TS*1000) / 1000 // milliseconds; beyond, v·1000 could overflow
	}
	// t_s never goes back within an alarm id: a finding judged on a clock
	// that restarted or was extrapolated ahead (signal lost, then the
	// device's own time stamps resume earlier) is placed at the id's last
	// event. A new raise keeps its finding's time (a replay after a
	// hand-over must make the same events as the first analysis).
	if a.lastOut.ID == a.id && e.TS < a.lastOut.TS {
		e.TS = a.lastOut.TS
	}
	if f.BreathSeq >= 0 {
		seq := f.BreathSeq
		e.BreathSeq = &seq
	}
	a.used[st] = true
	a.lastOut = e
	return e
}

// finite copies m without its non-finite values, which JSON cannot carry;
// nil stays nil.
func finite(m map[string]float64) map[string]float64 {
	if m == nil {
		return nil
	}
	out := maps.Clone(m)
	maps.DeleteFunc(out, func(_ string, v float64) bool { return math.IsNaN(v) || math.IsInf(v, 0) })
	return out
}

// Ack acknowledges the alarm with id at wall time and returns the events
// that follow: "acknowledged", plus "cleared" when the alarm was only held
// by latching. Acknowledging an alarm again returns no event and restarts
// its expiry. An id that names no current alarm of the stream returns an
// error wrapping ErrUnknownAlert.
func (l *Lifecycle) Ack(id string, wall time.Time) ([]Event, error) {
	return l.AckBy(id, "", wall)
}

// AckBy is Ack on behalf of by (a user or client name, may be empty), which
// the acknowledged event's message names.
func (l *Lifecycle) AckBy(id, by string, wall time.Time) ([]Event, error) {
	for _, c := range l.order {
		a := l.conds[c]
		if a.id != id || (a.phase != active && a.phase != latched) {
			continue
		}
		if a.acked {
			a.ackWall = wall
			return nil, nil
		}
		a.acked, a.ackWall = true, wall
		msg := "acknowledged"
		if by = CleanText(by); by != "" {
			msg += " by " + by
		}
		if a.cc.AckExpiryS > 0 && a.phase == active {
			msg += fmt.Sprintf("; announced again after %g s if still present", a.cc.AckExpiryS)
		}
		ack := l.event(a, &a.last, wall, Acknowledged, msg)
		at := wall.UTC()
		ack.AckedBy, ack.AckedAt = CleanText(by), &at
		a.lastOut = ack
		out := []Event{ack}
		if a.phase == latched {
			a.phase = inactive
			out = append(out, l.event(a, &a.last, wall, Cleared, "cleared on acknowledgement: "+a.last.Message))
		}
		return out, nil
	}
	return nil, fmt.Errorf("acknowledge %q in stream %s: %w", id, l.stream, ErrUnknownAlert)
}

// Active returns the latest event of every current alarm (active or
// latched), in the order their conditions were first seen.
func (l *Lifecycle) Active() []Event {
	var out []Event
	for _, c := range l.order {
		if a := l.conds[c]; a.phase == active || a.phase == latched {
			out = append(out, a.lastOut)
		}
	}
	return out
}
