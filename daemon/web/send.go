package web

import (
	"context"
	"errors"
	"math"
	"time"
)

// client is one connected page. The hub writes frames into q without
// waiting; a page whose queue is full is dropped: the hub closes gone and
// forgets it, and the page's own goroutine (serveEvents) returns.
type client struct {
	stream string // the stream whose details the page shows; "" for none
	q      chan []byte
	gone   chan struct{}
}

var (
	errHubStopped = errors.New("live view stopped")
	errTooMany    = errors.New("too many live view pages open")
)

// Run sends a frame to every connected page each Frame interval until ctx
// is cancelled; then it disconnects every page and returns nil. It may be
// called once.
func (h *Hub) Run(ctx context.Context) error {
	if !h.runs.CompareAndSwap(false, true) {
		return errors.New("live view hub: Run called twice")
	}
	defer close(h.done)
	t := time.NewTicker(h.cfg.Frame)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			h.dropAll()
			return nil
		case <-t.C:
			h.frame()
		}
	}
}

func (h *Hub) dropAll() {
	h.sendMu.Lock()
	defer h.sendMu.Unlock()
	for c := range h.clients {
		delete(h.clients, c)
		close(c.gone)
	}
}

// sse wraps a JSON document as one Server-Sent Events message.
func sse(doc []byte) []byte {
	msg := make([]byte, 0, len(doc)+8)
	msg = append(msg, "data: "...)
	msg = append(msg, doc...)
	return append(msg, '\n', '\n')
}

// frame sends what changed since the last frame: the list lines of the
// streams whose summary or state changed, and to each page the new
// waveform points, breaths and events of the stream it shows.
func (h *Hub) frame() {
	h.sendMu.Lock()
	defer h.sendMu.Unlock()
	h.nFrames.Add(1)
	now := h.cfg.Now()
	shown := map[string][]byte{}
	for c := range h.clients {
		shown[c.stream] = nil
	}
	head := append(frameHead(nil, now, false), `,"streams":[`...)
	n := 0
	for _, s := range h.sorted() {
		s.mu.Lock()
		st := s.state(now, h.cfg.SilentAfter)
		if s.version != s.sentVersion || st != s.sentState {
			if n > 0 {
				head = append(head, ',')
			}
			head = s.appendSummary(head, st)
			s.sentVersion, s.sentState = s.version, st
			n++
		}
		if _, ok := shown[s.id]; ok {
			shown[s.id] = s.appendDetail(nil, &detailSpans{
				wave:       span{s.sentWave, s.wave.total},
				trend:      span{s.sentTrend, s.trend.total},
				events:     span{s.sentEvents, s.events.total},
				trendFromS: math.Inf(-1),
			})
		}
		s.sentWave, s.sentTrend, s.sentEvents = s.wave.total, s.trend.total, s.events.total
		s.mu.Unlock()
	}
	head = append(head, ']')
	msgs := make(map[string][]byte, len(shown))
	for c := range h.clients {
		msg, ok := msgs[c.stream]
		if !ok {
			msg = closeFrame(head, shown[c.stream])
			msgs[c.stream] = msg
		}
		select {
		case c.q <- msg:
		default:
			delete(h.clients, c)
			close(c.gone)
			h.nDropped.Add(1)
		}
	}
}

// closeFrame ends a frame begun by head with the detail of one stream
// (when there is one) and wraps it for the event stream.
func closeFrame(head, detail []byte) []byte {
	doc := make([]byte, 0, len(head)+len(detail)+16)
	doc = append(doc, head...)
	if detail != nil {
		doc = append(doc, `,"detail":`...)
		doc = append(doc, detail...)
	}
	return sse(append(doc, '}'))
}

// register connects a page showing stream sel (the first stream when sel
// is empty) and queues its snapshot: every stream's summary and the shown
// stream's held waveform, last TrendWindowS of breaths and alarm timeline,
// up to exactly where the next frame starts.
func (h *Hub) register(sel string) (*client, error) {
	h.sendMu.Lock()
	defer h.sendMu.Unlock()
	select {
	case <-h.done:
		return nil, errHubStopped
	default:
	}
	if len(h.clients) >= h.cfg.MaxClients {
		h.nClientsRefused.Add(1)
		return nil, errTooMany
	}
	now := h.cfg.Now()
	streams := h.sorted()
	if sel == "" && len(streams) > 0 {
		sel = streams[0].id
	}
	head := append(frameHead(nil, now, true), `,"streams":[`...)
	var detail []byte
	for i, s := range streams {
		s.mu.Lock()
		if i > 0 {
			head = append(head, ',')
		}
		head = s.appendSummary(head, s.state(now, h.cfg.SilentAfter))
		if s.id == sel {
			from := math.Inf(-1)
			if s.sentTrend > s.trend.oldest() {
				from = s.trend.at(s.sentTrend-1).tS - h.cfg.TrendWindowS
			}
			detail = s.appendDetail(nil, &detailSpans{
				wave:   span{0, s.sentWave},
				trend:  span{0, s.sentTrend},
				events: span{0, s.sentEvents},
				full:   true, trendFromS: from,
			})
		}
		s.mu.Unlock()
	}
	c := &client{stream: sel, q: make(chan []byte, h.cfg.ClientQueue), gone: make(chan struct{})}
	c.q <- closeFrame(append(head, ']'), detail)
	h.clients[c] = struct{}{}
	h.nServed.Add(1)
	return c, nil
}

// unregister forgets a page that went away by itself.
func (h *Hub) unregister(c *client) {
	h.sendMu.Lock()
	defer h.sendMu.Unlock()
	if _, ok := h.clients[c]; ok {
		delete(h.clients, c)
		close(c.gone)
	}
}

// serveEvents streams frames to one page until the page goes away, the
// page falls too far behind, or the hub stops.
func (h *Hub) serveEvents(ctx context.Context, write func([]byte) error, c *client) {
	for {
		select {
		case <-ctx.Done():
			return
		case <-h.done:
			return
		case <-c.gone:
			return
		case msg := <-c.q:
			if write(msg) != nil {
				return
			}
		}
	}
}
