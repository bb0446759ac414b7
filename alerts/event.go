package alerts

import (
	"encoding/json"
	"fmt"
	"time"
)

// EventSchema is the version of the alert event contract. Version 2 added
// the provenance fields trapline_version and config_digest.
const EventSchema = 2

// State is where an alarm condition is in its lifecycle.
type State string

const (
	// Raised: the condition has held for its delay; a new id is issued.
	Raised State = "raised"
	// Escalated: the condition persisted or worsened; priority went up.
	Escalated State = "escalated"
	// Acknowledged: someone acknowledged the alarm.
	Acknowledged State = "acknowledged"
	// Cleared: the condition is gone (after hysteresis, or reset when latched).
	Cleared State = "cleared"
	// Ended: the alarm was closed because the stream went unmonitored for
	// too long to resume it honestly (Reason says why); like Cleared it is
	// terminal: the id gets no further events.
	Ended State = "ended"
)

// ReasonInterrupted is the Reason of an alarm ended because monitoring was
// interrupted (a restart after too long a gap).
const ReasonInterrupted = "monitoring interrupted"

// ReasonStopped is the Reason of an alarm ended because its stream stopped
// being monitored and keeps no state to resume it from (a stream of a
// multiplexed source when the daemon stops).
const ReasonStopped = "monitoring stopped"

// Terminal reports whether s ends an alarm id: after it the id gets no
// further events.
func (s State) Terminal() bool { return s == Cleared || s == Ended }

// Priority is an IEC 60601-1-8 alarm priority: high calls for an immediate
// response, medium for a prompt one, low for awareness.
type Priority string

const (
	// High priority: immediate response required.
	High Priority = "high"
	// Medium priority: prompt response required.
	Medium Priority = "medium"
	// Low priority: awareness required.
	Low Priority = "low"
)

// Event is the alert event contract: one state change of one alarm
// condition. ID is stable across the states of one raise and, with State,
// is the de-duplication id on JetStream.
type Event struct {
	Type      string             `json:"type"`
	Schema    int                `json:"schema"`
	ID        string             `json:"id"`
	Stream    string             `json:"stream"`
	Condition string             `json:"condition"`
	Class     string             `json:"class"`
	Priority  Priority           `json:"priority"`
	State     State              `json:"state"`
	Time      time.Time          `json:"time"`
	TS        float64            `json:"t_s"`
	BreathSeq *int               `json:"breath_seq"`
	Evidence  map[string]float64 `json:"evidence"`
	Message   string             `json:"message"`
	Predict   map[string]float64 `json:"predict,omitempty"`
	// Supersedes names the id that this raise replaces when an alarm is
	// announced again under a new id (a second escalation, or after an
	// acknowledgement); the old id gets no further events.
	Supersedes string `json:"supersedes,omitempty"`
	// TraplineVersion and ConfigDigest say which program and which
	// analysis, detector and alarm settings produced the event; the
	// pipeline fills them in.
	TraplineVersion string `json:"trapline_version"`
	ConfigDigest    string `json:"config_digest"`
	// AckedBy and AckedAt, on an acknowledged event: who acknowledged (as
	// the request named it, cleaned of control characters) and when.
	AckedBy string     `json:"acked_by,omitempty"`
	AckedAt *time.Time `json:"acked_at,omitempty"`
	// Reason says why an alarm ended (ReasonInterrupted, ReasonStopped).
	Reason string `json:"reason,omitempty"`
	// GapFrom and GapTo, on the technical monitoring-gap event: the wall
	// interval during which the stream was not analysed.
	GapFrom *time.Time `json:"gap_from,omitempty"`
	GapTo   *time.Time `json:"gap_to,omitempty"`
}

// DedupID is the JetStream message id of the event: the alert id plus its
// state, so that every state change is delivered exactly once.
func (e *Event) DedupID() string {
	return e.ID + "#" + string(e.State)
}

// Validate checks the fields that the contract requires.
func (e *Event) Validate() error {
	switch {
	case e.ID == "":
		return fmt.Errorf("alert event: empty id")
	case e.Condition == "":
		return fmt.Errorf("alert event %s: empty condition", e.ID)
	}
	switch e.State {
	case Raised, Escalated, Acknowledged, Cleared, Ended:
	default:
		return fmt.Errorf("alert event %s: unknown state %q", e.ID, e.State)
	}
	switch e.Priority {
	case High, Medium, Low:
	default:
		return fmt.Errorf("alert event %s: unknown priority %q", e.ID, e.Priority)
	}
	return nil
}

// Marshal encodes the event as one line of JSON (no newline), with the
// contract's fixed type and schema filled in.
func (e Event) Marshal() ([]byte, error) {
	e.Type = "alert"
	e.Schema = EventSchema
	if e.Evidence == nil {
		e.Evidence = map[string]float64{}
	}
	b, err := json.Marshal(e)
	if err != nil {
		return nil, fmt.Errorf("encode alert %s: %w", e.ID, err)
	}
	return b, nil
}
