package pipeline

import (
	"errors"
	"fmt"
	"time"

	"trapline/alerts"
	"trapline/analyze"
)

// DefaultMaxGap is the longest interruption after which a restarted
// pipeline resumes its alarms as they were. After a longer one the alarms
// left open are ended ("monitoring interrupted"): what the patient did in
// between was not seen, so neither "still present" nor "cleared" would be
// honest. 60 s is our choice: a few breaths at any rate, about the longest
// a supervised restart takes.
const DefaultMaxGap = 60 * time.Second

// recentTerminal bounds the ids whose fate an acknowledgement can still be
// told.
const recentTerminal = 256

// CheckpointVersion is the version of the Checkpoint layout.
const CheckpointVersion = 1

// Checkpoint is what a live pipeline keeps on disk to resume after a
// restart: its State, the recent breaths (replayed into fresh detectors so
// that their windows, the rising-peak trend among them, are as they were),
// and the recent terminal ids (so that an acknowledgement of an old id is
// answered with what became of it).
type Checkpoint struct {
	Version  int              `json:"version"`
	SavedAt  time.Time        `json:"saved_at"`
	State    State            `json:"state"`
	Breaths  []analyze.Breath `json:"breaths"`
	Terminal []Terminal       `json:"terminal"`
	// SeqReserved is the first breath number not yet promised: breaths up
	// to it may have been published after the checkpoint was written, so
	// after a kill the numbering resumes there rather than after
	// State.LastBreathSeq, and never repeats a published number.
	SeqReserved int `json:"seq_reserved"`
	// Clean marks the checkpoint of a clean stop: nothing was published
	// after it, and the numbering resumes right after State.LastBreathSeq.
	Clean bool `json:"clean"`
}

// seqBlock is how many breath numbers a checkpoint reserves ahead.
const seqBlock = 64

// Terminal is what became of an alarm id that gets no further events.
type Terminal struct {
	ID     string       `json:"id"`
	State  alerts.State `json:"state"` // cleared, ended, or raised for a superseded id
	Time   time.Time    `json:"time"`
	Reason string       `json:"reason,omitempty"`
	By     string       `json:"by,omitempty"` // the id that superseded it
}

// String tells what became of the id, as an acknowledgement answers.
func (t Terminal) String() string {
	at := t.Time.UTC().Format(time.RFC3339)
	switch {
	case t.By != "":
		return fmt.Sprintf("alert %s was superseded by %s at %s", t.ID, t.By, at)
	case t.State == alerts.Ended:
		return fmt.Sprintf("alert %s ended at %s: %s", t.ID, at, t.Reason)
	}
	return fmt.Sprintf("alert %s was %s at %s", t.ID, t.State, at)
}

// KeepBreaths sets how many recent breaths the pipeline keeps for its
// checkpoint: at least the longest breath window of its detectors.
func KeepBreaths(d analyze.DetectorConfig) int {
	return min(max(d.RisingPeak.WindowBreaths, 32), 1024)
}

// note records the events that end an id.
func (p *Pipeline) note(e *alerts.Event) {
	switch {
	case e.State.Terminal():
		p.addTerminal(Terminal{ID: e.ID, State: e.State, Time: e.Time, Reason: e.Reason})
	case e.Supersedes != "":
		p.addTerminal(Terminal{ID: e.Supersedes, State: alerts.Raised, Time: e.Time, By: e.ID})
	}
}

func (p *Pipeline) addTerminal(t Terminal) {
	if len(p.terminal) >= recentTerminal {
		p.terminal = append(p.terminal[:0], p.terminal[1:]...)
	}
	p.terminal = append(p.terminal, t)
}

// fate returns what became of id, if it is among the recent terminal ids.
func (p *Pipeline) fate(id string) (Terminal, bool) {
	for i := len(p.terminal) - 1; i >= 0; i-- {
		if p.terminal[i].ID == id {
			return p.terminal[i], true
		}
	}
	return Terminal{}, false
}

// remember keeps a copy of b among the recent breaths.
func (p *Pipeline) remember(b *analyze.Breath) {
	if p.keep <= 0 {
		return
	}
	if len(p.recent) >= p.keep {
		p.recent = append(p.recent[:0], p.recent[1:]...)
	}
	p.recent = append(p.recent, *b)
}

// SeqReservationDue reports whether the breath numbers reserved by the last
// checkpoint run out: a new checkpoint must be written before more breaths
// are published.
func (p *Pipeline) SeqReservationDue() bool { return p.keep > 0 && p.lastBreath+1 >= p.reserved }

// Checkpoint returns the pipeline's checkpoint at wall time now; clean
// marks the last one of a clean stop. It reserves the next breath numbers
// (see Checkpoint.SeqReserved).
func (p *Pipeline) Checkpoint(now time.Time, clean bool) Checkpoint {
	p.reserved = p.lastBreath + 1 + seqBlock
	return Checkpoint{
		Version: CheckpointVersion, SavedAt: now.UTC(), State: p.Snapshot(),
		SeqReserved: p.reserved, Clean: clean,
		Breaths:  append([]analyze.Breath(nil), p.recent...),
		Terminal: append([]Terminal(nil), p.terminal...),
	}
}

// Resume puts a checkpoint back into a fresh live pipeline of the same
// stream at wall time now, and returns the events it makes:
//   - always a monitoring-gap event with the interval from the checkpoint
//     to now;
//   - when the interval is longer than maxGap, an Ended event for every
//     alarm left open, and the detectors start empty;
//   - otherwise the alarms resume as they were and the recent breaths are
//     replayed into the detectors (their findings are not judged again).
//
// Breath numbers continue after the checkpoint's last one (after a clean
// stop) or after its reserved ones (otherwise), never repeating one.
func (p *Pipeline) Resume(cp Checkpoint, now time.Time, maxGap time.Duration) (Output, error) {
	if cp.Version != CheckpointVersion {
		return Output{}, fmt.Errorf("resume stream %s: checkpoint version %d, want %d", p.stream, cp.Version, CheckpointVersion)
	}
	if err := p.Restore(cp.State); err != nil {
		return Output{}, fmt.Errorf("resume: %w", err)
	}
	p.seqBase = cp.State.LastBreathSeq + 1
	if !cp.Clean {
		p.seqBase = max(p.seqBase, cp.SeqReserved)
	}
	p.lastBreath = p.seqBase - 1
	p.terminal = append(p.terminal[:0], cp.Terminal...)
	if len(p.terminal) > recentTerminal {
		p.terminal = p.terminal[len(p.terminal)-recentTerminal:]
	}
	gap := now.Sub(cp.SavedAt)
	var out Output
	if gap > maxGap {
		for _, e := range p.judge.Lifecycle().EndAll(now, cp.State.LastS, alerts.ReasonInterrupted) {
			p.note(&e)
			out.Alerts = append(out.Alerts, e)
		}
	} else {
		for i := range cp.Breaths {
			p.judge.Warm(&cp.Breaths[i])
			p.remember(&cp.Breaths[i])
		}
	}
	if !cp.SavedAt.IsZero() {
		out.Alerts = append(out.Alerts, alerts.GapEvent(p.stream, cp.SavedAt, now, cp.State.LastS))
	}
	return out, nil
}

// ackAnswer turns an unknown-id error into what became of the id, when
// the pipeline still knows.
func (p *Pipeline) ackAnswer(id string, err error) error {
	if !errors.Is(err, alerts.ErrUnknownAlert) {
		return err
	}
	if t, ok := p.fate(id); ok {
		return fmt.Errorf("%s: %w", t, alerts.ErrUnknownAlert)
	}
	return err
}

// Active returns the latest event of every open alarm.
func (p *Pipeline) Active() []alerts.Event { return p.judge.Lifecycle().Active() }
