package scaleout

import (
	"context"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/rs/zerolog"
)

// outbox holds an edge's samples from the moment a batch is cut until
// JetStream has acknowledged them, bounded in bytes (not in messages: a
// batch of five samples costs a hundred bytes, not a fixed slot).
//
// Each stream has a queue of messages and at most one of them in flight.
// A message's id (Nats-Msg-Id = <stream>/<run>/<seq>) is fixed when it is
// first sent, and so is its content, so a retry after a lost
// acknowledgement is absorbed by the samples stream's de-duplication
// window. One message in flight per stream keeps the stream's samples in
// order in the stream even when a publish fails and a later one would
// have succeeded; batches cut while a message is in flight are gathered
// into the next message (several frames in one message, which the binary
// decoder reads in turn), so throughput follows the round trip, not the
// batch period.
type outbox struct {
	maxBytes    int64
	maxMsgBytes int
	dedupe      time.Duration // retries stop this long after the first attempt
	runID       string        // this edge run, part of every message id
	log         zerolog.Logger

	mu      sync.Mutex
	pending int64 // bytes held (capacity of the queued messages)
	queues  map[string]*streamQueue
	ready   []*streamQueue
	notify  chan struct{} // a queue became ready to send
	space   chan struct{} // closed when bytes were released
	episode episode

	sent, acked, retried, failed, dropped atomic.Uint64
}

// streamQueue is the messages of one stream awaiting acknowledgement.
type streamQueue struct {
	stream, subject string
	msgs            []*outMsg // msgs[0] is in flight or next to send
	nextSeq         uint64
	busy            bool // msgs[0] is in flight or waiting for a retry
	wait            time.Duration
}

// outMsg is one message; data and seq do not change once it is sent.
type outMsg struct {
	seq   uint64
	data  []byte
	first time.Time // first attempt (zero before)
}

// episode tracks a stretch of trouble, so that it is warned about once
// when it starts and summed up when it ends.
type episode struct {
	open             bool
	retried, dropped uint64
}

func newOutbox(maxBytes int64, dedupe time.Duration, log zerolog.Logger) *outbox {
	return &outbox{
		maxBytes: maxBytes, maxMsgBytes: 64 << 10, dedupe: dedupe, log: log,
		runID:  strconv.FormatInt(time.Now().UnixMilli(), 36),
		queues: map[string]*streamQueue{}, notify: make(chan struct{}, 1), space: make(chan struct{}),
	}
}

// put queues a frame of stream's samples. When the bytes are at the bound
// it waits for room if block is set (the source can be slowed: the reader
// stops reading) until ctx ends; otherwise, or when ctx ends, the frame is
// dropped, counted and reported. It reports whether the frame was queued.
func (o *outbox) put(ctx context.Context, stream, subject string, frame []byte, block bool) bool {
	for {
		o.mu.Lock()
		if o.pending == 0 || o.pending+int64(len(frame)) <= o.maxBytes {
			o.append(stream, subject, frame)
			o.mu.Unlock()
			return true
		}
		space := o.space
		o.mu.Unlock()
		if !block {
			break
		}
		select {
		case <-space:
			continue
		case <-ctx.Done():
		}
		break
	}
	o.dropped.Add(1)
	o.trouble(func(e *episode) { e.dropped++ }, "edge buffer full: samples dropped (the source cannot be slowed)")
	return false
}

// append adds frame to the stream's last message, or starts a new one;
// the caller holds mu.
func (o *outbox) append(stream, subject string, frame []byte) {
	q := o.queues[stream]
	if q == nil {
		q = &streamQueue{stream: stream, subject: subject}
		o.queues[stream] = q
	}
	n := len(q.msgs)
	if n > 0 && !(n == 1 && q.busy) && len(q.msgs[n-1].data)+len(frame) <= o.maxMsgBytes {
		m := q.msgs[n-1]
		before := cap(m.data)
		m.data = append(m.data, frame...)
		o.pending += int64(cap(m.data) - before)
	} else {
		m := &outMsg{seq: q.nextSeq, data: make([]byte, len(frame), max(len(frame), min(o.maxMsgBytes, 4*len(frame))))}
		copy(m.data, frame)
		q.nextSeq++
		q.msgs = append(q.msgs, m)
		o.pending += int64(cap(m.data))
	}
	if !q.busy {
		q.busy = true
		o.markReady(q)
	}
}

// markReady queues q for the sender; the caller holds mu.
func (o *outbox) markReady(q *streamQueue) {
	o.ready = append(o.ready, q)
	select {
	case o.notify <- struct{}{}:
	default:
	}
}

// pendingBytes returns the bytes held.
func (o *outbox) pendingBytes() int64 {
	o.mu.Lock()
	defer o.mu.Unlock()
	return o.pending
}

// run sends ready messages until ctx ends. Each message in flight has a
// goroutine of its own waiting for its acknowledgement (bounded by the
// publish timeout of js, and by the streams: one message in flight each),
// so that a late acknowledgement holds up only its own stream.
func (o *outbox) run(ctx context.Context, js jetstream.JetStream) {
	var wg sync.WaitGroup
	defer wg.Wait()
	for {
		select {
		case <-ctx.Done():
			return
		case <-o.notify:
		}
		o.mu.Lock()
		batch := o.ready
		o.ready = nil
		o.mu.Unlock()
		for _, q := range batch {
			o.mu.Lock()
			m := q.msgs[0]
			if m.first.IsZero() {
				m.first = time.Now()
				o.sent.Add(1)
			}
			o.mu.Unlock()
			msg := &nats.Msg{Subject: q.subject, Data: m.data, Header: nats.Header{}}
			msg.Header.Set(jetstream.MsgIDHeader, q.stream+"/"+o.runID+"/"+strconv.FormatUint(m.seq, 10))
			fut, err := js.PublishMsgAsync(msg)
			if err != nil {
				o.done(q, err)
				continue
			}
			wg.Add(1)
			go func() {
				defer wg.Done()
				select {
				case <-fut.Ok():
					o.done(q, nil)
				case err := <-fut.Err():
					o.done(q, err)
				}
			}()
		}
	}
}

// done settles the stream's message in flight: acknowledged, it is
// released and the next one goes; failed, it is sent again after a pause
// (the same id), unless its first attempt is older than the
// de-duplication window, when a retry could store it twice: then it is
// counted failed and given up.
func (o *outbox) done(q *streamQueue, err error) {
	o.mu.Lock()
	defer o.mu.Unlock()
	m := q.msgs[0]
	if err == nil || time.Since(m.first) > o.dedupe {
		if err == nil {
			o.acked.Add(1)
			q.wait = 0
		} else {
			o.failed.Add(1)
			o.log.Error().Err(err).Str("stream", q.stream).Uint64("batch", m.seq).
				Msg("samples message not stored within the de-duplication window; given up")
		}
		o.pending -= int64(cap(m.data))
		q.msgs[0] = nil
		q.msgs = q.msgs[1:]
		close(o.space)
		o.space = make(chan struct{})
		if err == nil && o.episode.open && o.pending <= o.maxBytes/2 {
			o.log.Info().Uint64("retried", o.episode.retried).Uint64("dropped", o.episode.dropped).
				Msg("samples acknowledged again")
			o.episode = episode{}
		}
		if len(q.msgs) == 0 {
			q.busy = false
			return
		}
		o.markReady(q)
		return
	}
	o.retried.Add(1)
	o.troubleLocked(func(e *episode) { e.retried++ }, "samples not acknowledged; retrying with the same message ids", err)
	q.wait = min(max(2*q.wait, 100*time.Millisecond), 2*time.Second)
	time.AfterFunc(q.wait, func() {
		o.mu.Lock()
		defer o.mu.Unlock()
		o.markReady(q)
	})
}

// trouble counts into the current episode, warning when it opens.
func (o *outbox) trouble(count func(*episode), why string) {
	o.mu.Lock()
	defer o.mu.Unlock()
	o.troubleLocked(count, why, nil)
}

func (o *outbox) troubleLocked(count func(*episode), why string, err error) {
	count(&o.episode)
	if !o.episode.open {
		o.episode.open = true
		o.log.Warn().Err(err).Int64("pending_bytes", o.pending).Msg(why)
	}
}

// drain waits until every queued message is settled or ctx ends, and
// reports whether the outbox is empty.
func (o *outbox) drain(ctx context.Context) bool {
	t := time.NewTicker(20 * time.Millisecond)
	defer t.Stop()
	for o.pendingBytes() > 0 {
		select {
		case <-ctx.Done():
			return false
		case <-t.C:
		}
	}
	return true
}

// collector exposes the outbox's counters as Prometheus metrics.
func (o *outbox) collector() prometheus.Collector { return outboxCollector{o} }

type outboxCollector struct{ o *outbox }

var outboxDescs = struct{ sent, acked, retried, failed, dropped, pending *prometheus.Desc }{
	sent:    prometheus.NewDesc("trapline_edge_messages_sent_total", "Sample messages sent to JetStream (first attempts).", nil, nil),
	acked:   prometheus.NewDesc("trapline_edge_messages_acknowledged_total", "Sample messages acknowledged by JetStream.", nil, nil),
	retried: prometheus.NewDesc("trapline_edge_messages_retried_total", "Sample message attempts repeated with the same id.", nil, nil),
	failed:  prometheus.NewDesc("trapline_edge_messages_failed_total", "Sample messages given up after the de-duplication window.", nil, nil),
	dropped: prometheus.NewDesc("trapline_edge_batches_dropped_total", "Sample batches dropped because the edge buffer was full.", nil, nil),
	pending: prometheus.NewDesc("trapline_edge_pending_bytes", "Bytes of samples held until JetStream acknowledges them.", nil, nil),
}

func (c outboxCollector) Describe(ch chan<- *prometheus.Desc) {
	d := outboxDescs
	for _, x := range []*prometheus.Desc{d.sent, d.acked, d.retried, d.failed, d.dropped, d.pending} {
		ch <- x
	}
}

func (c outboxCollector) Collect(ch chan<- prometheus.Metric) {
	d, o := outboxDescs, c.o
	for _, x := range []struct {
		d *prometheus.Desc
		v uint64
	}{{d.sent, o.sent.Load()}, {d.acked, o.acked.Load()}, {d.retried, o.retried.Load()}, {d.failed, o.failed.Load()}, {d.dropped, o.dropped.Load()}} {
		ch <- prometheus.MustNewConstMetric(x.d, prometheus.CounterValue, float64(x.v))
	}
	ch <- prometheus.MustNewConstMetric(d.pending, prometheus.GaugeValue, float64(o.pendingBytes()))
}
