package web

import (
	"math"
	"sort"
	"sync"
	"sync/atomic"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
)

// HubConfig bounds what the hub keeps and how often it sends. The zero
// value of a field takes its default (DefaultHubConfig).
type HubConfig struct {
	// DisplayRateHz is the rate the waveform is thinned to for display.
	DisplayRateHz float64
	// WaveWindowS is how much waveform each stream keeps (and a new page
	// receives), in seconds.
	WaveWindowS float64
	// TrendWindowS is how far back the breath trends reach, in seconds.
	TrendWindowS float64
	// MaxTrendBreaths caps the breath records kept per stream whatever the
	// rate (a stream breathing faster than this per TrendWindowS shows a
	// shorter trend).
	MaxTrendBreaths int
	// MaxEvents is the length of each stream's alarm timeline.
	MaxEvents int
	// MaxStreams caps the number of streams; the samples, breaths and
	// alerts of any further stream are counted and dropped.
	MaxStreams int
	// Frame is the interval between two messages to the pages.
	Frame time.Duration
	// ClientQueue is how many messages may wait for one page; a page
	// that falls this far behind is disconnected (its browser reconnects
	// and starts from a fresh snapshot).
	ClientQueue int
	// MaxClients caps the pages connected at once.
	MaxClients int
	// SilentAfter is how long without samples makes a stream "silent".
	SilentAfter time.Duration
	// Now is the wall clock; time.Now when nil.
	Now func() time.Time
}

// DefaultHubConfig returns the defaults: 50 Hz display rate, 30 s of
// waveform, one hour (at most 3600 breaths) of trends, 100 alarm events,
// 1000 streams, 10 frames a second, 50 queued frames and 32 pages.
func DefaultHubConfig() HubConfig {
	return HubConfig{
		DisplayRateHz: 50, WaveWindowS: 30, TrendWindowS: 3600, MaxTrendBreaths: 3600,
		MaxEvents: 100, MaxStreams: 1000, Frame: 100 * time.Millisecond,
		ClientQueue: 50, MaxClients: 32, SilentAfter: 3 * time.Second, Now: time.Now,
	}
}

func (c HubConfig) withDefaults() HubConfig {
	d := DefaultHubConfig()
	pos := func(v *float64, dv float64) {
		if !(*v > 0) || math.IsInf(*v, 0) {
			*v = dv
		}
	}
	posInt := func(v *int, dv int) {
		if *v <= 0 {
			*v = dv
		}
	}
	pos(&c.DisplayRateHz, d.DisplayRateHz)
	pos(&c.WaveWindowS, d.WaveWindowS)
	pos(&c.TrendWindowS, d.TrendWindowS)
	posInt(&c.MaxTrendBreaths, d.MaxTrendBreaths)
	posInt(&c.MaxEvents, d.MaxEvents)
	posInt(&c.MaxStreams, d.MaxStreams)
	posInt(&c.ClientQueue, d.ClientQueue)
	posInt(&c.MaxClients, d.MaxClients)
	if c.Frame <= 0 {
		c.Frame = d.Frame
	}
	if c.SilentAfter <= 0 {
		c.SilentAfter = d.SilentAfter
	}
	if c.Now == nil {
		c.Now = d.Now
	}
	return c
}

// Stats are the hub's counters since it was made.
type Stats struct {
	SamplesIn, SamplesKept        uint64 // samples fed; kept for display after thinning
	BreathsIn, AlertsIn           uint64
	RefusedStreams                uint64 // feeds for a stream beyond MaxStreams or without an id
	ClientsServed, ClientsDropped uint64 // pages connected; disconnected for being too slow
	ClientsRefused                uint64 // pages turned away beyond MaxClients
	Frames                        uint64 // frames built
}

// Hub holds the recent display data of every stream and sends it to the
// connected pages. The daemon feeds it from its analysis goroutines with
// Samples, Breath, Alert and Status; none of them waits for a page or for
// I/O: each takes only the lock of its own stream, for the time of a copy
// into a fixed-size ring (the oldest display data is overwritten). Run
// sends a frame to every page every Frame interval.
type Hub struct {
	cfg     HubConfig
	periodS float64 // display sample period

	mu      sync.RWMutex // guards streams
	streams map[string]*stream

	// sendMu serialises the frames with the arrival of pages, so that a
	// new page's snapshot ends exactly where the next frame begins; it
	// guards clients and the sent cursors of every stream.
	sendMu  sync.Mutex
	clients map[*client]struct{}

	done chan struct{} // closed when Run returns
	runs atomic.Bool

	nSamplesIn, nSamplesKept, nBreaths, nAlerts, nRefused atomic.Uint64
	nServed, nDropped, nClientsRefused, nFrames           atomic.Uint64
}

// NewHub returns a hub; call Run to send to pages.
func NewHub(cfg HubConfig) *Hub {
	cfg = cfg.withDefaults()
	return &Hub{
		cfg: cfg, periodS: 1 / cfg.DisplayRateHz,
		streams: map[string]*stream{}, clients: map[*client]struct{}{},
		done: make(chan struct{}),
	}
}

// Stats returns the counters so far; safe to call concurrently.
func (h *Hub) Stats() Stats {
	return Stats{
		SamplesIn: h.nSamplesIn.Load(), SamplesKept: h.nSamplesKept.Load(),
		BreathsIn: h.nBreaths.Load(), AlertsIn: h.nAlerts.Load(), RefusedStreams: h.nRefused.Load(),
		ClientsServed: h.nServed.Load(), ClientsDropped: h.nDropped.Load(),
		ClientsRefused: h.nClientsRefused.Load(), Frames: h.nFrames.Load(),
	}
}

// get returns the stream id, created on first use; nil beyond MaxStreams
// and for an empty id.
func (h *Hub) get(id string) *stream {
	if id == "" {
		h.nRefused.Add(1)
		return nil
	}
	h.mu.RLock()
	s := h.streams[id]
	h.mu.RUnlock()
	if s != nil {
		return s
	}
	h.mu.Lock()
	defer h.mu.Unlock()
	if s = h.streams[id]; s != nil {
		return s
	}
	if len(h.streams) >= h.cfg.MaxStreams {
		h.nRefused.Add(1)
		return nil
	}
	s = newStream(id, &h.cfg)
	h.streams[id] = s
	return s
}

// sorted returns the streams in order of id.
func (h *Hub) sorted() []*stream {
	h.mu.RLock()
	out := make([]*stream, 0, len(h.streams))
	for _, s := range h.streams {
		out = append(out, s)
	}
	h.mu.RUnlock()
	sort.Slice(out, func(i, j int) bool { return out[i].id < out[j].id })
	return out
}

func (h *Hub) lookup(id string) *stream {
	h.mu.RLock()
	defer h.mu.RUnlock()
	return h.streams[id]
}

// Samples takes a batch of samples of stream in time order. They are
// thinned to DisplayRateHz (the first sample of each display period is
// kept) into the stream's waveform ring. The slice is not kept.
func (h *Hub) Samples(streamID string, ss []ingest.Sample) {
	if len(ss) == 0 {
		return
	}
	h.nSamplesIn.Add(uint64(len(ss)))
	s := h.get(streamID)
	if s == nil {
		return
	}
	now := h.cfg.Now()
	s.mu.Lock()
	kept := s.addSamples(ss, h.periodS, now)
	s.mu.Unlock()
	h.nSamplesKept.Add(uint64(kept))
}

// Breath takes a completed breath record; its Stream names the stream.
func (h *Hub) Breath(b analyze.Breath) {
	h.nBreaths.Add(1)
	s := h.get(b.Stream)
	if s == nil {
		return
	}
	s.mu.Lock()
	s.addBreath(&b)
	s.mu.Unlock()
}

// Alert takes an alert event (any state) for the stream it names.
func (h *Hub) Alert(ev alerts.Event) {
	h.nAlerts.Add(1)
	s := h.get(ev.Stream)
	if s == nil {
		return
	}
	s.mu.Lock()
	s.addAlert(&ev)
	s.mu.Unlock()
}

// Status takes a change of a stream's source condition (connected,
// disconnected); StatusNone and gaps leave the shown condition alone.
func (h *Hub) Status(streamID string, st ingest.Status) {
	if st != ingest.StatusConnected && st != ingest.StatusDisconnected {
		return
	}
	s := h.get(streamID)
	if s == nil {
		return
	}
	s.mu.Lock()
	s.status = st
	s.version++
	s.mu.Unlock()
}
