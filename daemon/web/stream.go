package web

import (
	"math"
	"slices"
	"sync"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
)

// wavePoint is one displayed sample. Values are float32: display needs no
// more, and it halves the ring.
type wavePoint struct {
	tS      float64
	pCmH2O  float32
	flowLPM float32
}

// trendPoint is the part of a breath record the trends show, at the
// breath's end; NaN where the breath has no value.
type trendPoint struct {
	tS           float64
	peepiCmH2O   float32
	trappedML    float32
	rCmH2OSPerL  float32
	cMLPerCmH2O  float32
	peakCmH2O    float32
	plateauCmH2O float32
}

// stream is the display state of one stream. Fields above the line are
// guarded by mu and written by the feed methods; the sent cursors are
// guarded by the hub's sendMu.
type stream struct {
	id string

	mu         sync.Mutex
	wave       ring[wavePoint]
	trend      ring[trendPoint]
	events     ring[alerts.Event]
	active     []alerts.Event // current alarms, in order of raise
	haveSample bool
	originS    float64 // stream time the display periods count from
	lastPeriod int64   // display period of the last sample kept
	lastTS     float64
	lastWall   time.Time // wall time of the last sample
	status     ingest.Status
	breaths    int
	last       trendPoint
	version    uint64 // bumped by every change the summary shows

	// ----- guarded by Hub.sendMu
	sentWave, sentTrend, sentEvents uint64
	sentVersion                     uint64
	sentState                       string
}

func newStream(id string, cfg *HubConfig) *stream {
	return &stream{
		id:     id,
		wave:   newRing[wavePoint](int(math.Ceil(cfg.WaveWindowS * cfg.DisplayRateHz))),
		trend:  newRing[trendPoint](cfg.MaxTrendBreaths),
		events: newRing[alerts.Event](cfg.MaxEvents),
		last:   nanTrend(),
	}
}

func nanTrend() trendPoint {
	n := float32(math.NaN())
	return trendPoint{tS: math.NaN(), peepiCmH2O: n, trappedML: n, rCmH2OSPerL: n, cMLPerCmH2O: n, peakCmH2O: n, plateauCmH2O: n}
}

// addSamples thins ss to the first sample of each display period (periods
// counted from the stream's first sample) and returns how many it kept. A
// stream clock that goes back (a restarted device) starts the waveform
// afresh, so that the displayed time axis never runs backwards.
func (s *stream) addSamples(ss []ingest.Sample, periodS float64, now time.Time) int {
	kept := 0
	for i := range ss {
		x := &ss[i]
		if math.IsNaN(x.TimeS) || math.IsInf(x.TimeS, 0) {
			continue
		}
		if !s.haveSample || x.TimeS < s.lastTS {
			if s.haveSample {
				s.wave.reset()
			}
			s.originS, s.lastPeriod = x.TimeS, -1
		}
		s.haveSample, s.lastTS = true, x.TimeS
		// The small allowance keeps a sample that falls on a period
		// boundary in that period despite rounding (0.12/0.02 < 6).
		k := int64(math.Floor((x.TimeS-s.originS)/periodS + 1e-6))
		if k <= s.lastPeriod {
			continue
		}
		s.lastPeriod = k
		s.wave.push(wavePoint{tS: x.TimeS, pCmH2O: float32(x.PressureCmH2O), flowLPM: float32(x.FlowLPS * 60)})
		kept++
	}
	s.lastWall = now
	return kept
}

// addBreath appends the breath to the trends.
func (s *stream) addBreath(b *analyze.Breath) {
	t := b.EndS
	if math.IsNaN(t) || math.IsInf(t, 0) {
		t = b.StartS
	}
	if math.IsNaN(t) || math.IsInf(t, 0) {
		return
	}
	p := trendPoint{
		tS: t, peepiCmH2O: float32(b.PEEPiCmH2O), trappedML: float32(b.TrappedML),
		rCmH2OSPerL: float32(b.RCmH2OSPerL), cMLPerCmH2O: float32(b.CMLPerCmH2O),
		peakCmH2O: float32(b.PeakCmH2O), plateauCmH2O: float32(b.PlateauCmH2O),
	}
	if s.trend.total > s.trend.oldest() && t < s.trend.at(s.trend.total-1).tS {
		s.trend.reset() // the stream's clock went back
	}
	s.trend.push(p)
	s.breaths++
	s.last = p
	s.version++
}

// maxActive caps the current alarms kept per stream: the lifecycle has
// at most one per condition, and there are a handful of conditions.
const maxActive = 32

// addAlert records the event in the timeline and updates the current
// alarms, one per condition as in the alarm lifecycle: a raise sets the
// condition's alarm (replacing the one it supersedes), a clear of that
// alarm removes it, any other state updates it.
func (s *stream) addAlert(ev *alerts.Event) {
	s.events.push(*ev)
	s.version++
	i := slices.IndexFunc(s.active, func(a alerts.Event) bool { return a.Condition == ev.Condition })
	switch {
	case ev.State.Terminal():
		if i >= 0 && s.active[i].ID == ev.ID {
			s.active = slices.Delete(s.active, i, i+1)
		}
	case i >= 0:
		s.active[i] = *ev
	case len(s.active) < maxActive:
		s.active = append(s.active, *ev)
	}
}

// state names the stream's condition at wall time now: waiting (nothing
// yet), live, silent (no sample for silentAfter) or disconnected.
func (s *stream) state(now time.Time, silentAfter time.Duration) string {
	switch {
	case s.status == ingest.StatusDisconnected:
		return "disconnected"
	case !s.haveSample:
		return "waiting"
	case now.Sub(s.lastWall) > silentAfter:
		return "silent"
	}
	return "live"
}
