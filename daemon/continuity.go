package daemon

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"net/url"
	"os"
	"path/filepath"
	"time"

	"trapline/alerts"
	"trapline/alerts/pipeline"
)

// checkpointEvery is how often a running stream writes its checkpoint
// when no alarm changes: it bounds what a kill -9 loses to about two
// seconds of the detectors' running state. A change of an alarm is written
// before it goes out (checkpointAlarms).
const checkpointEvery = 2 * time.Second

// resumable is a pipeline that can be checkpointed and resumed; the live
// pipeline is.
type resumable interface {
	Checkpoint(now time.Time, clean bool) pipeline.Checkpoint
	SeqReservationDue() bool
	Resume(cp pipeline.Checkpoint, now time.Time, maxGap time.Duration) (pipeline.Output, error)
	Active() []alerts.Event
}

// continuity keeps one stream's checkpoint file in the data directory
// (<data_dir>/state/<stream>.json). A nil *continuity does nothing.
type continuity struct {
	path   string
	maxGap time.Duration
	last   time.Time // last write; touched by the analysis goroutine only
}

// newContinuity returns the checkpoint keeper of stream under dataDir.
func newContinuity(dataDir, stream string) *continuity {
	return &continuity{
		path:   filepath.Join(dataDir, "state", url.PathEscape(stream)+".json"),
		maxGap: pipeline.DefaultMaxGap,
	}
}

// resume puts the stream's last checkpoint, if any, into pl and returns
// the events that makes (see pipeline.Resume) and the alarms left open.
func (c *continuity) resume(pl streamPipeline, now time.Time) (stageOutput, []alerts.Event, error) {
	r, ok := pl.(resumable)
	if c == nil || !ok {
		return stageOutput{}, nil, nil
	}
	data, err := os.ReadFile(c.path)
	if errors.Is(err, fs.ErrNotExist) {
		return stageOutput{}, nil, nil
	}
	if err != nil {
		return stageOutput{}, nil, fmt.Errorf("read checkpoint: %w", err)
	}
	var cp pipeline.Checkpoint
	if err := json.Unmarshal(data, &cp); err != nil {
		return stageOutput{}, nil, fmt.Errorf("checkpoint %s: %w", c.path, err)
	}
	out, err := r.Resume(cp, now, c.maxGap)
	if err != nil {
		return stageOutput{}, nil, fmt.Errorf("checkpoint %s: %w", c.path, err)
	}
	c.last = now
	return out, r.Active(), nil
}

// due reports whether a checkpoint is due at now.
func (c *continuity) due(pl streamPipeline, now time.Time) bool {
	if c == nil {
		return false
	}
	r, ok := pl.(resumable)
	return ok && (now.Sub(c.last) >= checkpointEvery || r.SeqReservationDue())
}

// save writes pl's checkpoint atomically: a temporary file, synced, then
// renamed over the old one, so that a kill at any moment leaves either the
// old checkpoint or the new one.
func (c *continuity) save(pl streamPipeline, now time.Time, clean bool) error {
	r, ok := pl.(resumable)
	if c == nil || !ok {
		return nil
	}
	c.last = now
	data, err := json.Marshal(r.Checkpoint(now, clean))
	if err != nil {
		return fmt.Errorf("encode checkpoint: %w", err)
	}
	if err := os.MkdirAll(filepath.Dir(c.path), 0o750); err != nil {
		return fmt.Errorf("checkpoint dir: %w", err)
	}
	if err := writeAtomic(c.path, data); err != nil {
		return fmt.Errorf("write checkpoint: %w", err)
	}
	return nil
}

// writeAtomic writes data to path through a temporary file that is synced
// and renamed over it, so that a kill at any moment leaves either the old
// file or the new one.
func writeAtomic(path string, data []byte) error {
	tmp := path + ".tmp"
	f, err := os.OpenFile(tmp, os.O_CREATE|os.O_WRONLY|os.O_TRUNC, 0o600)
	if err != nil {
		return err
	}
	_, werr := f.Write(data)
	serr := f.Sync()
	cerr := f.Close()
	if err := errors.Join(werr, serr, cerr); err != nil {
		return fmt.Errorf("%s: %w", tmp, err)
	}
	return os.Rename(tmp, path)
}

// resume restores the stream's checkpoint into a fresh pipeline and
// delivers what that makes; the restored open alarms count as active. A
// checkpoint that cannot be read is logged and set aside: the stream then
// starts afresh rather than not at all.
func (s *stream) resume(ctx context.Context, pl streamPipeline) error {
	c := s.spec.Continuity
	out, open, err := c.resume(pl, time.Now())
	if err != nil {
		s.log.Error().Err(err).Msg("checkpoint not usable; the stream starts without its earlier alarm state")
		if rerr := os.Rename(c.path, c.path+".bad"); rerr != nil {
			s.log.Warn().Err(rerr).Msg("could not set the bad checkpoint aside")
		}
		return nil
	}
	for _, e := range open {
		s.activeIDs[e.ID] = struct{}{}
	}
	if len(open) > 0 || len(out.Alerts) > 0 {
		s.log.Info().Int("open_alarms", len(open)).Int("events", len(out.Alerts)).Msg("resumed from checkpoint")
	}
	return s.emit(ctx, out, time.Time{})
}

// checkpoint writes the stream's checkpoint when one is due, or always at
// a clean stop; a failure is logged and counted, never fatal.
func (s *stream) checkpoint(pl streamPipeline, now time.Time, stop bool) {
	c := s.spec.Continuity
	if c == nil || (!stop && !c.due(pl, now)) {
		return
	}
	s.saveCheckpoint(pl, now, stop)
}

// keepAlarms makes the alarm events of out, if any, known to what will end
// them after a kill, before they are delivered, and reports whether it
// wrote the checkpoint. A stream with a checkpoint writes it now: an alarm
// raised, escalated, acknowledged or cleared in the two seconds between
// periodic checkpoints was otherwise lost by a kill -9 in that window (its
// events were in the spool and went out, but the restarted daemon did not
// know the alarm, so nothing ever ended it: a ghost alarm for every
// subscriber; tests/continuity_test.go). Written ahead, a kill after the
// checkpoint and before the spool leaves at worst an alarm the restart ends
// that no subscriber saw raised. A stream without one (a file or stdin)
// records the raises, escalations and acknowledgements in the daemon's
// alarm ledger (ledger.go) with one write and sync; their ends are
// recorded once the spool holds them (deliverKept). Alarm events are rare
// (a few an hour per stream), so either write costs little.
func (s *stream) keepAlarms(pl streamPipeline, now time.Time, out stageOutput) bool {
	if len(out.Alerts) == 0 {
		return false
	}
	if s.spec.Continuity != nil {
		s.saveCheckpoint(pl, now, false)
		return true
	}
	s.spec.Ledger.keepOpening(s.log, s.m, out.Alerts)
	return false
}

// saveCheckpoint writes the checkpoint (clean at a stop); a failure is
// logged and counted, never fatal.
func (s *stream) saveCheckpoint(pl streamPipeline, now time.Time, stop bool) {
	c := s.spec.Continuity
	if err := c.save(pl, now, stop); err != nil {
		s.m.checkpointErrors.WithLabelValues(s.spec.ID).Inc()
		s.log.Warn().Err(err).Msg("checkpoint not written")
	}
}

// alarmEnder is a pipeline that can end its open alarms; the live
// pipeline can (pipeline.(*Pipeline).EndAlarms).
type alarmEnder interface {
	EndAlarms(now time.Time, reason string) pipeline.Output
}

// endUnresumable ends the open alarms of a stream that keeps no checkpoint
// (one read from a file or stdin) when the daemon stops (ctx cancelled)
// before its input ended, with alerts.ReasonStopped: nothing would resume
// them, and they stayed open for every subscriber. A recording read to its
// end keeps the alarms it left, as the patient's state at its end.
func (s *stream) endUnresumable(pubCtx, ctx context.Context, pl streamPipeline) {
	e, ok := pl.(alarmEnder)
	if s.spec.Continuity != nil || ctx.Err() == nil || !ok {
		return
	}
	if err := s.emit(pubCtx, e.EndAlarms(time.Now(), alerts.ReasonStopped), time.Time{}); err != nil {
		s.log.Warn().Err(err).Msg("open alarms not ended at the stop")
	}
}

// A stream that keeps no checkpoint (a file or stdin) keeps its alarms in
// the daemon's alarm ledger (ledger.go) instead (keepAlarms, deliverKept).
// A kill then cannot leave them open for good (the next start ends them),
// and neither can a failure of the stream: its next run starts the
// recording over with a new pipeline, and first ends what the last run
// left open (endLeftAlarms).

// deliverKept delivers ev (deliver) and records the end of an alarm of a
// stream without a checkpoint once the spool holds it.
func (s *stream) deliverKept(ctx context.Context, ev alerts.Event) {
	if s.deliver(ctx, ev) && ev.State.Terminal() && s.spec.Continuity == nil {
		s.recordAlarm(false, ev)
	}
}

// endLeftAlarms ends, before a stream without a checkpoint starts a run,
// the alarms its last run left open in the ledger (state ended, reason
// "monitoring interrupted"): the new run analyses its input from the start
// with a new pipeline that does not know them. The delivery-impaired alarm
// outlives runs (degraded.go) and is left alone.
func (s *stream) endLeftAlarms(ctx context.Context) {
	if s.spec.Continuity != nil {
		return
	}
	left := s.spec.Ledger.openOf(func(e *alerts.Event) bool {
		return e.Stream == s.spec.ID && e.Condition != CondDeliveryImpaired
	})
	s.spec.Ledger.endLeft(ctx, left, s.alerts, s.log, s.m)
}
