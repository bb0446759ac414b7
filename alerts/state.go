package alerts

import (
	"encoding/json"
	"fmt"
	"math"
	"time"

	"trapline/analyze"
)

// LifecycleState is a snapshot of a Lifecycle that can be stored (as JSON)
// and restored elsewhere: a worker that takes a stream over from another one
// restores the alarms where the other left them, so that an alarm that is
// active keeps its id and its used states, and a replayed finding makes the
// same event with the same id (which JetStream then drops as a duplicate).
type LifecycleState struct {
	Stream string       `json:"stream"`
	Alarms []AlarmState `json:"alarms"`
}

// AlarmState is the stored state of one condition of a stream.
type AlarmState struct {
	Condition     string          `json:"condition"`
	Phase         int             `json:"phase"`
	PresentN      int             `json:"present_n"`
	PresentSinceS float64         `json:"present_since_s"`
	AbsentN       int             `json:"absent_n"`
	AbsentSinceS  float64         `json:"absent_since_s"`
	ID            string          `json:"id,omitempty"`
	Used          []State         `json:"used,omitempty"`
	Priority      Priority        `json:"priority,omitempty"`
	LastEscS      float64         `json:"last_esc_s"`
	Acked         bool            `json:"acked,omitempty"`
	AckWall       time.Time       `json:"ack_wall"`
	LastIDms      int64           `json:"last_id_ms"`
	Last          analyze.Finding `json:"last"`
	LastOut       *Event          `json:"last_out,omitempty"`
}

// Snapshot returns the state of every condition the lifecycle has seen, in
// the order they were first seen. Non-finite numbers (which JSON cannot
// carry) are left out of the findings' evidence; stream times that are not
// finite become 0.
func (l *Lifecycle) Snapshot() LifecycleState {
	st := LifecycleState{Stream: l.stream}
	for _, c := range l.order {
		a := l.conds[c]
		as := AlarmState{
			Condition: a.condition, Phase: int(a.phase),
			PresentN: a.presentN, PresentSinceS: finiteOr0(a.presentSinceS),
			AbsentN: a.absentN, AbsentSinceS: finiteOr0(a.absentSinceS),
			ID: a.id, Priority: a.priority, LastEscS: finiteOr0(a.lastEscS),
			Acked: a.acked, AckWall: a.ackWall, LastIDms: a.lastIDms,
			Last: a.last,
		}
		as.Last.Evidence, as.Last.Predict = finite(a.last.Evidence), finite(a.last.Predict)
		as.Last.TimeS = finiteOr0(as.Last.TimeS)
		for _, s := range []State{Raised, Escalated, Acknowledged, Cleared, Ended} {
			if a.used[s] {
				as.Used = append(as.Used, s)
			}
		}
		if a.id != "" {
			out := a.lastOut
			out.Evidence, out.Predict = finite(out.Evidence), finite(out.Predict)
			as.LastOut = &out
		}
		st.Alarms = append(st.Alarms, as)
	}
	return st
}

func finiteOr0(v float64) float64 {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return 0
	}
	return v
}

// RestoreLifecycle returns the lifecycle of stream in the state st, with the
// configuration cfg (which must be valid; each condition takes its settings
// from cfg, not from the snapshot, so that a changed configuration applies).
// A snapshot of another stream or with an unknown phase is an error.
func RestoreLifecycle(stream string, cfg LifecycleConfig, st LifecycleState) (*Lifecycle, error) {
	if st.Stream != "" && st.Stream != stream {
		return nil, fmt.Errorf("restore lifecycle of %s: snapshot is of stream %s", stream, st.Stream)
	}
	l := NewLifecycle(stream, cfg)
	for _, as := range st.Alarms {
		if as.Phase < int(inactive) || as.Phase > int(latched) {
			return nil, fmt.Errorf("restore lifecycle of %s: condition %s: unknown phase %d", stream, as.Condition, as.Phase)
		}
		if _, dup := l.conds[as.Condition]; dup || as.Condition == "" {
			return nil, fmt.Errorf("restore lifecycle of %s: condition %q empty or repeated", stream, as.Condition)
		}
		a := &alarm{
			condition: as.Condition, cc: cfg.For(as.Condition), phase: phase(as.Phase),
			presentN: as.PresentN, presentSinceS: as.PresentSinceS,
			absentN: as.AbsentN, absentSinceS: as.AbsentSinceS,
			id: as.ID, used: map[State]bool{}, priority: as.Priority, lastEscS: as.LastEscS,
			acked: as.Acked, ackWall: as.AckWall, lastIDms: as.LastIDms, last: as.Last,
		}
		for _, s := range as.Used {
			a.used[s] = true
		}
		if as.LastOut != nil {
			a.lastOut = *as.LastOut
		}
		l.conds[as.Condition] = a
		l.order = append(l.order, as.Condition)
	}
	return l, nil
}

// MarshalState encodes a snapshot as JSON.
func MarshalState(st LifecycleState) ([]byte, error) {
	b, err := json.Marshal(st)
	if err != nil {
		return nil, fmt.Errorf("encode lifecycle state of %s: %w", st.Stream, err)
	}
	return b, nil
}
