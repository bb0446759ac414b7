package daemon

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
	"sort"
	"sync"
	"time"

	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/alerts/pipeline"
)

// The alarm ledger keeps the open alarms that no stream checkpoint holds:
// those of the streams of multiplexed sources and of streams read from a
// file or stdin (which keep no checkpoint, docs/operations.md), and each
// stream's alert-delivery-impaired alarm. It is one file of JSON lines,
// <data_dir>/state/open-alarms.jsonl, each line an alarm event as it went
// out. A raise, escalation or acknowledgement is written and synced before
// it goes to the spool, so an alarm that any subscriber saw open is in the
// file; an end is written once the spool holds it. At the next start, the
// alarms the file leaves open (raised, escalated or acknowledged, never
// cleared, ended or superseded) were left by a daemon that was killed or
// crashed, or by a recording read to its end that the new start reads
// again; each is ended with reason "monitoring interrupted". A clean stop
// ends the others itself (reason "monitoring stopped").
//
// Only alarm changes write to it (a handful an hour per stream), not the
// streams' running state, so it costs nothing per sample and one write
// and sync per batch of alarm events rather than a file per stream.

// ledgerFile is the ledger's name in the state directory; stream
// checkpoints there all end in ".json".
const ledgerFile = "open-alarms.jsonl"

// ledgerCompactBytes is the size beyond which the ledger is rewritten with
// only its open alarms; when those alone take more than half of it (ten
// thousand streams with an alarm each), the next rewrite waits until the
// file has doubled, so that rewrites stay rare.
const ledgerCompactBytes = 1 << 20

// alarmLedger is the ledger of one daemon; safe for concurrent use.
type alarmLedger struct {
	mu   sync.Mutex
	path string
	f    *os.File
	size int64
	// compactAt is the size that makes record rewrite the file; rewrites
	// counts the rewrites.
	compactAt int64
	rewrites  int
	open      map[string]alerts.Event // by id, as last written
	buf       []byte
	// ended remembers the last ledgerRemember alarms that the ledger
	// ended (endedEvent), by id, so that an acknowledgement of one of them
	// answers what became of it; endedOrder is their order and
	// endedTokens counts them by stream subject token.
	ended       map[string]alerts.Event
	endedOrder  []string
	endedTokens map[string]int
}

// ledgerRemember is how many alarms ended by the ledger an
// acknowledgement can still be answered about.
const ledgerRemember = 1024

// openLedger opens the ledger in the state directory under dataDir and
// returns it with the alarms that the file left open, oldest first. Those
// stay open in the ledger until their ends are recorded
// (Daemon.startLedger). Lines that cannot be read (a write cut short by a
// kill) are skipped and counted in bad.
func openLedger(dataDir string) (l *alarmLedger, left []alerts.Event, bad int, err error) {
	dir := filepath.Join(dataDir, "state")
	if err := os.MkdirAll(dir, 0o750); err != nil {
		return nil, nil, 0, fmt.Errorf("alarm ledger: %w", err)
	}
	l = &alarmLedger{path: filepath.Join(dir, ledgerFile), open: map[string]alerts.Event{},
		ended: map[string]alerts.Event{}, endedTokens: map[string]int{}}
	data, err := os.ReadFile(l.path)
	if err != nil && !errors.Is(err, fs.ErrNotExist) {
		return nil, nil, 0, fmt.Errorf("alarm ledger: %w", err)
	}
	for len(data) > 0 {
		line := data
		if i := bytes.IndexByte(data, '\n'); i >= 0 {
			line, data = data[:i], data[i+1:]
		} else {
			data = nil
		}
		if len(bytes.TrimSpace(line)) == 0 {
			continue
		}
		var e alerts.Event
		if json.Unmarshal(line, &e) != nil || e.ID == "" {
			bad++
			continue
		}
		l.apply(&e)
	}
	left = l.openOfLocked(func(*alerts.Event) bool { return true })
	if err := l.compact(); err != nil {
		return nil, nil, bad, err
	}
	return l, left, bad, nil
}

// apply updates the set of open alarms with event e.
func (l *alarmLedger) apply(e *alerts.Event) {
	if e.Supersedes != "" {
		delete(l.open, e.Supersedes)
	}
	if e.State.Terminal() {
		delete(l.open, e.ID)
	} else {
		l.open[e.ID] = *e
	}
	if e.State == alerts.Ended && e.Reason == alerts.ReasonInterrupted {
		l.rememberEnded(e)
	}
}

// rememberEnded keeps e, an end the ledger made, for acknowledgements.
func (l *alarmLedger) rememberEnded(e *alerts.Event) {
	if _, ok := l.ended[e.ID]; ok {
		return
	}
	if len(l.endedOrder) >= ledgerRemember {
		old := l.endedOrder[0]
		l.endedOrder = l.endedOrder[1:]
		if tok := alerts.SubjectToken(l.ended[old].Stream); l.endedTokens[tok] <= 1 {
			delete(l.endedTokens, tok)
		} else {
			l.endedTokens[tok]--
		}
		delete(l.ended, old)
	}
	l.ended[e.ID] = *e
	l.endedOrder = append(l.endedOrder, e.ID)
	l.endedTokens[alerts.SubjectToken(e.Stream)]++
}

// fate tells, for an alarm id the ledger ended, what became of it, as an
// acknowledgement answers (pipeline.Terminal, as for an alarm a checkpoint
// ended); false for any other id.
func (l *alarmLedger) fate(id string) (string, bool) {
	if l == nil {
		return "", false
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	e, ok := l.ended[id]
	if !ok {
		return "", false
	}
	return pipeline.Terminal{ID: id, State: e.State, Time: e.Time, Reason: e.Reason}.String(), true
}

// endedOf reports whether the ledger ended an alarm of the stream with
// subject token tok.
func (l *alarmLedger) endedOf(tok string) bool {
	if l == nil {
		return false
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.endedTokens[tok] > 0
}

// record writes evs, and when sync is set syncs the file, before it
// returns. An alarm's raise, escalation or acknowledgement is recorded
// and synced before it goes to the spool; its end is recorded once the
// spool holds it, without a sync (a kill does not lose what was written;
// a crash that does leaves an alarm the next start ends a second time,
// which is harmless, where the other order could leave one open). An event that cannot be encoded (it
// carries a non-finite number) is not written; the others are. The set of
// open alarms follows evs even when the write fails, so that a later
// compaction writes them.
func (l *alarmLedger) record(sync bool, evs ...alerts.Event) error {
	if l == nil || len(evs) == 0 {
		return nil
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	l.buf = l.buf[:0]
	var errs []error
	for i := range evs {
		line, err := json.Marshal(&evs[i])
		if err != nil {
			errs = append(errs, fmt.Errorf("alarm ledger: encode %s: %w", evs[i].DedupID(), err))
			continue
		}
		l.buf = append(append(l.buf, line...), '\n')
		l.apply(&evs[i])
	}
	if len(l.buf) > 0 {
		errs = append(errs, l.write(l.buf, sync))
	}
	if l.size > l.compactAt {
		errs = append(errs, l.compact())
	}
	return errors.Join(errs...)
}

// write appends p, and syncs when sync is set.
func (l *alarmLedger) write(p []byte, sync bool) error {
	if l.f == nil {
		return fmt.Errorf("alarm ledger %s: not open", l.path)
	}
	n, err := l.f.Write(p)
	l.size += int64(n)
	if err == nil && sync {
		err = l.f.Sync()
	}
	if err != nil {
		return fmt.Errorf("alarm ledger %s: %w", l.path, err)
	}
	return nil
}

// compact rewrites the ledger with only its open alarms (a temporary file
// synced and renamed over it, so a kill leaves the old file or the new
// one) and reopens it for appending.
func (l *alarmLedger) compact() error {
	var data []byte
	for _, e := range l.open {
		line, err := json.Marshal(&e)
		if err != nil {
			continue // not encodable: it could not have been written either
		}
		data = append(append(data, line...), '\n')
	}
	if err := writeAtomic(l.path, data); err != nil {
		return fmt.Errorf("alarm ledger: %w", err)
	}
	if l.f != nil {
		_ = l.f.Close()
	}
	f, err := os.OpenFile(l.path, os.O_WRONLY|os.O_APPEND, 0o600)
	if err != nil {
		l.f = nil
		return fmt.Errorf("alarm ledger: %w", err)
	}
	l.f, l.size = f, int64(len(data))
	l.compactAt = max(ledgerCompactBytes, 2*l.size)
	l.rewrites++
	return nil
}

// close closes the file.
func (l *alarmLedger) close() {
	if l == nil {
		return
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.f != nil {
		_ = l.f.Close()
		l.f = nil
	}
}

// endedEvent is the event that ends alarm e, which a daemon that did not
// stop cleanly left open, at wall time now: state ended, reason
// alerts.ReasonInterrupted, at the stream time of its last event (t_s
// never goes back within a condition).
func endedEvent(e alerts.Event, now time.Time) alerts.Event {
	e.State = alerts.Ended
	e.Time = now.UTC()
	e.Reason = alerts.ReasonInterrupted
	e.Message = alerts.ReasonInterrupted + ": " + e.Message
	e.BreathSeq, e.Predict, e.Supersedes = nil, nil, ""
	return e
}

// startLedger opens the daemon's alarm ledger and ends, through del's
// spool, the alarms it left open: those of a daemon that was killed or
// crashed. Each end is recorded once spooled; one the spool refuses stays
// in the ledger for the next start.
func (d *Daemon) startLedger(ctx context.Context, del *delivery) error {
	l, left, bad, err := openLedger(d.cfg.DataDir)
	if err != nil {
		return err
	}
	d.ledger = l
	if bad > 0 {
		d.log.Warn().Int("lines", bad).Str("file", l.path).Msg("alarm ledger: unreadable lines skipped (a write cut short)")
	}
	if len(left) > 0 {
		ended := l.endLeft(ctx, left, del, d.log, d.m)
		d.log.Warn().Int("ended", ended).Int("left_open", len(left)).
			Msg("alarms left open by a run that did not stop cleanly ended: monitoring interrupted")
	}
	return nil
}

// endLeft ends, through pub, the alarms evs that a run left open (state
// ended, reason "monitoring interrupted") and records each end once pub
// holds it; one pub refuses stays open in the ledger for the next try. It
// returns how many it ended.
func (l *alarmLedger) endLeft(ctx context.Context, evs []alerts.Event, pub alertSink, log zerolog.Logger, m *metrics) int {
	now, ended := time.Now(), 0
	for _, e := range evs {
		ev := endedEvent(e, now)
		if err := pub.Publish(ctx, ev); err != nil {
			log.Error().Err(err).Str("alert", ev.DedupID()).Msg("alarm left open by the last run not ended")
			continue
		}
		m.alerts.WithLabelValues(ev.Stream, ev.Condition, string(ev.State)).Inc()
		l.keep(log, m, false, ev)
		ended++
	}
	return ended
}

// keep records evs (see record); a failure is logged and counted with the
// checkpoint errors, and the alarms go out all the same. A nil ledger
// keeps nothing.
func (l *alarmLedger) keep(log zerolog.Logger, m *metrics, sync bool, evs ...alerts.Event) {
	if l == nil || len(evs) == 0 {
		return
	}
	if err := l.record(sync, evs...); err != nil {
		log.Error().Err(err).Msg("alarm ledger not written; after a kill these alarms may stay open")
		m.checkpointErrors.WithLabelValues(evs[0].Stream).Inc()
	}
}

// keepOpening keeps, with one write and sync, the events among evs that
// open or carry on an alarm (a raise, escalation or acknowledgement):
// those go to the ledger before the spool, ends after it (see record).
func (l *alarmLedger) keepOpening(log zerolog.Logger, m *metrics, evs []alerts.Event) {
	if l == nil {
		return
	}
	open := make([]alerts.Event, 0, len(evs))
	for i := range evs {
		if !evs[i].State.Terminal() {
			open = append(open, evs[i])
		}
	}
	l.keep(log, m, true, open...)
}

// openOf returns the open alarms for which keep holds, oldest first.
func (l *alarmLedger) openOf(keep func(*alerts.Event) bool) []alerts.Event {
	if l == nil {
		return nil
	}
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.openOfLocked(keep)
}

// openOfLocked is openOf with l.mu held (or before l is shared).
func (l *alarmLedger) openOfLocked(keep func(*alerts.Event) bool) []alerts.Event {
	var out []alerts.Event
	for _, e := range l.open {
		if keep(&e) {
			out = append(out, e)
		}
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Time.Before(out[j].Time) })
	return out
}
