package pipeline

import (
	"fmt"

	"trapline/alerts"
)

// State is the part of a pipeline's state that outlives it: the alarm
// lifecycle, the last breath number and where the stream's time axis
// stood. It marshals to JSON for a checkpoint.
//
// The breath analyzer's open breath and the detectors' windows are not in
// it: a new owner rebuilds them by analysing the recent samples again (the
// scale-out worker's warm-up) with its alarm events thrown away, and then
// restores the alarms.
type State struct {
	Stream string `json:"stream"`
	// LastBreathSeq is the analyzer's number of the last completed breath
	// (-1 before any).
	LastBreathSeq int `json:"last_breath_seq"`
	// HaveSample and LastS: whether a sample arrived, and its stream time.
	HaveSample bool    `json:"have_sample"`
	LastS      float64 `json:"last_s"`
	// Alarms is the alarm lifecycle: open alarms, their priorities and
	// acknowledgements.
	Alarms alerts.LifecycleState `json:"alarms"`
}

// LastBreathSeq returns the analyzer's number of the last completed
// breath, -1 before any.
func (p *Pipeline) LastBreathSeq() int { return p.lastBreath }

// Alarms returns a snapshot of the alarm lifecycle.
func (p *Pipeline) Alarms() alerts.LifecycleState { return p.judge.Lifecycle().Snapshot() }

// RestoreAlarms replaces the alarm lifecycle with one restored from st, as
// a worker does when it takes a stream over.
func (p *Pipeline) RestoreAlarms(st alerts.LifecycleState) error {
	l, err := alerts.RestoreLifecycle(p.stream, p.alarms, st)
	if err != nil {
		return fmt.Errorf("stream %s: restore alarms: %w", p.stream, err)
	}
	p.judge.SetLifecycle(l)
	return nil
}

// ResetAlarms starts the alarm lifecycle afresh: no alarm raised.
func (p *Pipeline) ResetAlarms() { p.judge.SetLifecycle(alerts.NewLifecycle(p.stream, p.alarms)) }

// Snapshot returns the pipeline's State.
func (p *Pipeline) Snapshot() State {
	return State{Stream: p.stream, LastBreathSeq: p.lastBreath, HaveSample: p.haveSample, LastS: p.lastS, Alarms: p.Alarms()}
}

// Restore puts st back into a pipeline of the same stream: the alarms and
// the stream's time axis. The analyzer and the detectors start empty.
func (p *Pipeline) Restore(st State) error {
	if st.Stream != p.stream {
		return fmt.Errorf("restore: state of stream %q into pipeline of %q", st.Stream, p.stream)
	}
	if err := p.RestoreAlarms(st.Alarms); err != nil {
		return err
	}
	// LastBreathSeq is not put back: the new analyzer numbers its breaths
	// from 0, and the caller maps those numbers onto the published ones.
	p.haveSample, p.lastS = st.HaveSample, st.LastS
	if st.HaveSample {
		p.lastWall = p.now()
		if p.offline() {
			p.lastWall = p.clock.Wall(st.LastS)
		}
	}
	return nil
}
