package bus

import (
	"context"
	"sync"
	"sync/atomic"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"trapline/alerts"
	"trapline/analyze"
)

// DefaultBulletinQueue bounds the breath and status messages waiting to be
// written to the connection: a minute of 30 breaths per minute on 50 streams
// with a heartbeat every 5 s, well above what a healthy link ever holds.
// A daemon of many streams adds room for their heartbeats.
const DefaultBulletinQueue = 4096

// bulletinMsg is one message waiting in the bulletin's queue.
type bulletinMsg struct {
	subject string
	data    []byte
	msgID   string // Nats-Msg-Id, or ""
	pooled  bool   // data came from recordPool
}

// Bulletin publishes breath records and status heartbeats best effort: the
// analysis hands a message over without ever waiting; when the queue is full
// or the connection refuses a message it is dropped and counted, with one
// warning per episode of drops. Breaths are plain NATS publishes on
// <prefix>.breath.<stream>, which the breaths stream stores; heartbeats go
// to <prefix>.status.<stream> and are not stored.
type Bulletin struct {
	nc   *nats.Conn
	subj alerts.Subjects
	log  zerolog.Logger
	q    chan bulletinMsg

	published, dropped atomic.Uint64

	mu          sync.Mutex
	dropping    bool   // inside an episode of drops
	episodeDrop uint64 // drops in the current episode
}

// NewBulletin returns a Bulletin for nc under the subject prefix, with a
// queue of queueLen messages (DefaultBulletinQueue when <= 0).
func NewBulletin(nc *nats.Conn, prefix string, queueLen int, log zerolog.Logger) *Bulletin {
	if queueLen <= 0 {
		queueLen = DefaultBulletinQueue
	}
	return &Bulletin{
		nc: nc, subj: alerts.Subjects{Prefix: prefix},
		log: log.With().Str("component", "bulletin").Logger(),
		q:   make(chan bulletinMsg, queueLen),
	}
}

// Breath queues the breath record (the breath record contract) for
// <prefix>.breath.<stream>.
func (b *Bulletin) Breath(br *analyze.Breath) {
	b.offer(bulletinMsg{subject: b.subj.Breath(br.Stream), data: br.AppendJSON(getRecordBuf()), pooled: true})
}

// recordPool recycles the buffers of breath records: the connection copies
// a message into its own buffer when it is published, so the record's
// buffer is free again once send returns.
var recordPool = sync.Pool{New: func() any { b := make([]byte, 0, 1024); return &b }}

func getRecordBuf() []byte { return (*recordPool.Get().(*[]byte))[:0] }

func putRecordBuf(b []byte) {
	if cap(b) <= 4096 {
		recordPool.Put(&b)
	}
}

// BreathWithID queues the breath record with a message id (Nats-Msg-Id),
// so that the breaths stream keeps one copy of a breath published again
// within its de-duplication window (a scale-out worker replaying a stretch
// after a hand-over).
func (b *Bulletin) BreathWithID(br *analyze.Breath, msgID string) {
	b.offer(bulletinMsg{subject: b.subj.Breath(br.Stream), data: br.AppendJSON(getRecordBuf()), msgID: msgID, pooled: true})
}

// Status queues a status heartbeat (JSON built by the stream) for
// <prefix>.status.<stream>.
func (b *Bulletin) Status(stream string, data []byte) {
	b.offer(bulletinMsg{subject: b.subj.Status(stream), data: data})
}

func (b *Bulletin) offer(m bulletinMsg) {
	select {
	case b.q <- m:
	default:
		m.release()
		b.drop("queue full: NATS is slow or away")
	}
}

// release returns a pooled buffer.
func (m *bulletinMsg) release() {
	if m.pooled {
		putRecordBuf(m.data)
	}
}

// drop counts a lost message and warns once per episode.
func (b *Bulletin) drop(why string) {
	b.dropped.Add(1)
	b.mu.Lock()
	defer b.mu.Unlock()
	b.episodeDrop++
	if !b.dropping {
		b.dropping = true
		b.log.Warn().Str("reason", why).Msg("dropping breath and status messages (alerts are not affected)")
	}
}

// delivered ends an episode of drops, if one is open.
func (b *Bulletin) delivered() {
	b.published.Add(1)
	b.mu.Lock()
	defer b.mu.Unlock()
	if b.dropping {
		b.log.Info().Uint64("dropped", b.episodeDrop).Msg("breath and status messages flowing again")
		b.dropping, b.episodeDrop = false, 0
	}
}

// Dropped returns the number of breath and status messages dropped so far.
func (b *Bulletin) Dropped() uint64 { return b.dropped.Load() }

// Published returns the number of messages handed to the connection.
func (b *Bulletin) Published() uint64 { return b.published.Load() }

// Run writes queued messages to the connection until ctx is cancelled, then
// writes what is still queued and flushes, bounded by one second. While the
// connection is down nats.go keeps publishes in its reconnect buffer (8 MiB)
// and sends them on reconnect; once that is full they are dropped here.
func (b *Bulletin) Run(ctx context.Context) error {
	for {
		select {
		case m := <-b.q:
			b.send(m)
		case <-ctx.Done():
			// Run is the only receiver, so the length cannot shrink
			// behind its back.
			for n := len(b.q); n > 0; n-- {
				b.send(<-b.q)
			}
			if b.nc.IsConnected() {
				_ = b.nc.FlushTimeout(time.Second)
			}
			return nil
		}
	}
}

func (b *Bulletin) send(m bulletinMsg) {
	msg := &nats.Msg{Subject: m.subject, Data: m.data}
	if m.msgID != "" {
		msg.Header = nats.Header{nats.MsgIdHdr: []string{m.msgID}}
	}
	err := b.nc.PublishMsg(msg)
	m.release()
	if err != nil {
		b.drop(err.Error())
		return
	}
	b.delivered()
}
