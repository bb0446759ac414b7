package scaleout

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strconv"
	"strings"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"trapline/alerts"
)

// partitionCheckpoint is the record p.<partition> of the state bucket:
// every message of the partition up to Seq has been analysed and its
// alerts acknowledged by JetStream.
type partitionCheckpoint struct {
	Owner string    `json:"owner"`
	Seq   uint64    `json:"seq"`
	Time  time.Time `json:"time"`
}

// streamCheckpoint is the record s.<partition>.<stream>: the stream's
// alarm state after the message Seq, and the last breath number published.
type streamCheckpoint struct {
	Owner     string                `json:"owner"`
	Seq       uint64                `json:"seq"`
	Time      time.Time             `json:"time"`
	BreathSeq int                   `json:"breath_seq"`
	Life      alerts.LifecycleState `json:"lifecycle"`
}

// fencedPut writes key only if it is still at revision rev (0: only if it
// does not exist) and returns the new revision; a conflict is errFenced.
//
// A write whose answer was lost (a timeout during a leader election) may
// have been stored all the same, and the next write, at the old revision,
// would then conflict with this worker's own record. So a conflict is
// looked at: if the record names this worker, it is ours, and the write is
// made again at its revision. Only one runner of a partition runs in a
// worker at a time, so a record of ours is never another runner's.
func (w *worker) fencedPut(ctx context.Context, key string, v any, rev uint64) (uint64, error) {
	data, err := json.Marshal(v)
	if err != nil {
		return rev, fmt.Errorf("encode %s: %w", key, err)
	}
	nrev, err := w.put(ctx, key, data, rev)
	if errors.Is(err, errFenced) {
		var cur struct {
			Owner string `json:"owner"`
		}
		if crev, gerr := w.getJSON(ctx, key, &cur); gerr == nil && crev != 0 && crev != rev && cur.Owner == w.id {
			nrev, err = w.put(ctx, key, data, crev)
		}
	}
	if err != nil {
		return rev, fmt.Errorf("write %s: %w", key, err)
	}
	return nrev, nil
}

// put is one fenced write of data at revision rev; a conflict is errFenced.
func (w *worker) put(ctx context.Context, key string, data []byte, rev uint64) (uint64, error) {
	cctx, cancel := context.WithTimeout(ctx, w.cfg.NATS.PublishTimeout+time.Second)
	defer cancel()
	var nrev uint64
	var err error
	if rev == 0 {
		nrev, err = w.state.Create(cctx, key, data)
	} else {
		nrev, err = w.state.Update(cctx, key, data, rev)
	}
	var apiErr *jetstream.APIError
	// A replicated bucket reports a revision conflict with code 10164,
	// a single-replica one with 10071; both mean another writer won.
	if errors.Is(err, jetstream.ErrKeyExists) || errors.Is(err, jetstream.ErrKeyRevisionMismatch) ||
		errors.As(err, &apiErr) && (apiErr.ErrorCode == jetstream.JSErrCodeStreamWrongLastSequence ||
			apiErr.ErrorCode == jetstream.JSErrCodeStreamWrongLastSequenceConstant) {
		return rev, errFenced
	}
	return nrev, err
}

// getJSON reads key into v and returns its revision (0 when absent).
func (w *worker) getJSON(ctx context.Context, key string, v any) (uint64, error) {
	cctx, cancel := context.WithTimeout(ctx, w.cfg.NATS.PublishTimeout+time.Second)
	defer cancel()
	e, err := w.state.Get(cctx, key)
	if errors.Is(err, jetstream.ErrKeyNotFound) {
		return 0, nil
	}
	if err != nil {
		return 0, fmt.Errorf("read %s: %w", key, err)
	}
	if err := json.Unmarshal(e.Value(), v); err != nil {
		return 0, fmt.Errorf("decode %s: %w", key, err)
	}
	return e.Revision(), nil
}

// claim takes the partition over: its checkpoint names this worker as the
// owner, fenced by the revision read. It returns the previous owner.
func (pt *partition) claim(ctx context.Context) (string, error) {
	w := pt.w
	pkey := "p." + strconv.Itoa(pt.p)
	rev, err := w.getJSON(ctx, pkey, &pt.rec)
	if err != nil {
		return "", err
	}
	claim := pt.rec
	claim.Owner = w.id
	if pt.rev, err = w.fencedPut(ctx, pkey, claim, rev); err != nil {
		return "", err
	}
	pt.lastSeq, pt.lastT = pt.rec.Seq, pt.rec.Time
	return pt.rec.Owner, nil
}

// loadStreams starts the analysis of every stream that has a checkpoint in
// the partition and returns the earliest time to replay from (zero: from
// the start).
func (pt *partition) loadStreams(ctx context.Context) (time.Time, error) {
	w := pt.w
	start := pt.rec.Time
	lister, err := w.state.ListKeysFiltered(ctx, "s."+strconv.Itoa(pt.p)+".*")
	if err != nil && !errors.Is(err, jetstream.ErrNoKeysFound) {
		return start, fmt.Errorf("list stream checkpoints: %w", err)
	}
	if lister == nil {
		return start, nil
	}
	var keys []string
	for k := range lister.Keys() {
		keys = append(keys, k)
	}
	_ = lister.Stop()
	for _, k := range keys {
		var rec streamCheckpoint
		rev, err := w.getJSON(ctx, k, &rec)
		if err != nil {
			return start, err
		}
		if rev == 0 {
			continue
		}
		if pt.expired(rec.Time) {
			pt.forget(ctx, k, rev)
			continue
		}
		sr, err := pt.newStream(k[strings.LastIndexByte(k, '.')+1:])
		if err != nil {
			return start, err
		}
		sr.rec, sr.rev, sr.had = rec, rev, true
		sr.until = max(sr.until, rec.Seq)
		if start.IsZero() || rec.Time.Before(start) {
			start = rec.Time
		}
	}
	return start, nil
}

// saveStream writes a stream's checkpoint, fenced by its revision.
func (pt *partition) saveStream(ctx context.Context, sr *streamRun) error {
	rec := streamCheckpoint{Owner: pt.w.id, Seq: sr.seq, Time: sr.wall, BreathSeq: sr.lastBreath, Life: sr.pl.Alarms()}
	rev, err := pt.w.fencedPut(ctx, sr.key, rec, sr.rev)
	if err != nil {
		return err
	}
	sr.rec, sr.rev, sr.had, sr.dirty = rec, rev, true, false
	return nil
}

// checkpoint writes the changed streams and then the partition's position.
func (pt *partition) checkpoint(ctx context.Context) error {
	if pt.lastSeq <= pt.rec.Seq {
		return nil // still replaying what is already covered
	}
	for id, sr := range pt.streams {
		if !sr.dirty && sr.had && pt.expired(sr.wall) {
			pt.forget(ctx, sr.key, sr.rev)
			delete(pt.streams, id)
			pt.w.routes.CompareAndDelete(id, pt.acks)
			continue
		}
		if sr.dirty {
			if err := pt.saveStream(ctx, sr); err != nil {
				return err
			}
		}
	}
	rec := partitionCheckpoint{Owner: pt.w.id, Seq: pt.lastSeq, Time: pt.lastT}
	rev, err := pt.w.fencedPut(ctx, "p."+strconv.Itoa(pt.p), rec, pt.rev)
	if err != nil {
		return err
	}
	pt.rec, pt.rev = rec, rev
	return nil
}

// expired tells whether a stream last stored samples longer than
// scaleout.state_expiry before now: it has been removed or renamed.
func (pt *partition) expired(last time.Time) bool {
	return !last.IsZero() && time.Since(last) > pt.w.cfg.ScaleOut.StateExpiry
}

// forget deletes an expired stream's checkpoint, fenced by its revision
// (a stream that came back in the meantime keeps it).
func (pt *partition) forget(ctx context.Context, key string, rev uint64) {
	cctx, cancel := context.WithTimeout(ctx, pt.w.cfg.NATS.PublishTimeout+time.Second)
	defer cancel()
	if err := pt.w.state.Delete(cctx, key, jetstream.LastRevision(rev)); err != nil {
		pt.log.Warn().Err(err).Str("key", key).Msg("could not remove the state of an expired stream")
		return
	}
	pt.log.Info().Str("key", key).Dur("state_expiry", pt.w.cfg.ScaleOut.StateExpiry).Msg("state of a stream silent too long removed")
}
