package daemon

import (
	"math"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
)

// pipeline is the analysis of one stream, shared by the daemon and by
// `trapline analyze`: samples go through the breath analyzer, breaths and
// samples through the detectors, and findings through the alarm lifecycle.
// It owns all three and is used from one goroutine.
//
// Wall time: live, every step takes the wall clock (p.now, or the time the
// caller passes), and the technical detectors run on the stream time
// extrapolated with the wall clock since the last sample, so that a
// signal-lost alert carries a t_s on the stream's own axis. Offline (start
// set by newOfflinePipeline) the wall time of anything at stream time t is
// start + t, which makes the output, alert ids included, a deterministic
// function of the file, and the pipeline makes the ticks the live daemon
// would have made, once a second of stream time, so that a gap in a
// recording raises signal-lost too.
type pipeline struct {
	stream string
	an     *analyze.Analyzer
	judge  *alerts.Judge

	// now is the live wall clock (time.Now); unused offline.
	now func() time.Time
	// clock, when set, makes the pipeline offline: it maps stream time to
	// wall time and makes up the daemon's ticks.
	clock *alerts.OfflineClock
	// stats, when set, reads the source's counters for the decoder error
	// rate; they are sampled on every Tick.
	stats     func() ingest.Stats
	lastStats ingest.Stats

	haveSample bool
	lastS      float64   // stream time of the last sample
	lastWall   time.Time // wall time it arrived
	created    time.Time
	// breath holds the last completed breath: a field rather than a local,
	// so that handing its address to the emitter does not move every
	// analyzed sample's record to the heap.
	breath analyze.Breath
}

var _ streamPipeline = (*pipeline)(nil)

// newPipeline returns the live pipeline of stream; the configurations must
// be valid.
func newPipeline(stream string, acfg analyze.Config, dcfg analyze.DetectorConfig, lcfg alerts.LifecycleConfig) *pipeline {
	return &pipeline{
		stream:  stream,
		an:      analyze.NewAnalyzer(stream, acfg),
		judge:   alerts.NewJudge(stream, dcfg, lcfg),
		now:     time.Now,
		created: time.Now(),
	}
}

// newOfflinePipeline returns a pipeline for a recording whose stream time 0
// is wall time start.
func newOfflinePipeline(stream string, start time.Time, acfg analyze.Config, dcfg analyze.DetectorConfig, lcfg alerts.LifecycleConfig) *pipeline {
	p := newPipeline(stream, acfg, dcfg, lcfg)
	p.clock, p.created = &alerts.OfflineClock{Epoch: start}, start
	return p
}

func (p *pipeline) offline() bool { return p.clock != nil }

// streamNow maps a wall time to the stream's time axis: the last sample's
// time plus the wall time since it arrived (before any sample, the wall
// time since the pipeline started).
func (p *pipeline) streamNow(wall time.Time) float64 {
	if !p.haveSample {
		return wall.Sub(p.created).Seconds()
	}
	return p.lastS + wall.Sub(p.lastWall).Seconds()
}

// emitter receives what the pipeline produces, in the order it happens.
type emitter struct {
	breath func(*analyze.Breath)
	alert  func(*alerts.Event)
}

// collect returns an emitter that gathers into out.
func collect(out *stageOutput) emitter {
	return emitter{
		breath: func(b *analyze.Breath) { out.Breaths = append(out.Breaths, *b) },
		alert:  func(e *alerts.Event) { out.Alerts = append(out.Alerts, *e) },
	}
}

// Samples analyses a batch of samples in time order. Live, all of it is
// stamped with the wall time of the call.
func (p *pipeline) Samples(ss []ingest.Sample) stageOutput {
	var out stageOutput
	p.process(ss, collect(&out))
	return out
}

// process is Samples with the output going to em as it happens: a breath
// record before the alerts it causes.
func (p *pipeline) process(ss []ingest.Sample, em emitter) {
	wall := time.Time{}
	if !p.offline() {
		wall = p.now()
	}
	for i := range ss {
		s := ss[i]
		if math.IsNaN(s.TimeS) || math.IsInf(s.TimeS, 0) {
			continue // no place on the time axis; the analyzer skips it too
		}
		if p.offline() {
			p.clock.Until(s.TimeS, func(tickS float64) { p.tick(p.clock.Wall(tickS), em) })
			wall = p.clock.Wall(s.TimeS)
		}
		p.judge.Samples(ss[i:i+1], s.TimeS, wall, em.alert)
		p.haveSample, p.lastS, p.lastWall = true, s.TimeS, wall
		b, ok := p.an.Push(s)
		if !ok {
			continue
		}
		p.breath = b
		p.breath.Stream = p.stream
		em.breath(&p.breath)
		p.judge.Breath(&p.breath, wall, em.alert)
	}
}

// Status takes a change of the source's condition. A disconnection resets
// the breath analyzer so that no breath spans it; signal-lost itself is
// judged by Tick from the time without samples.
func (p *pipeline) Status(ev ingest.Event, now time.Time) stageOutput {
	if p.offline() {
		now = p.clock.Wall(p.lastS)
	}
	p.judge.Status(&ev, p.streamNow(now))
	if ev.Status == ingest.StatusDisconnected {
		p.an.Reset()
	}
	return stageOutput{}
}

// Tick evaluates the time-based conditions at wall time now; the daemon
// calls it about once a second.
func (p *pipeline) Tick(now time.Time) stageOutput {
	var out stageOutput
	p.tick(now, collect(&out))
	return out
}

func (p *pipeline) tick(now time.Time, em emitter) {
	nowS := p.streamNow(now)
	if p.stats != nil {
		st := p.stats()
		p.judge.Decoder(ingest.Stats{
			Samples:   st.Samples - p.lastStats.Samples,
			BadLines:  st.BadLines - p.lastStats.BadLines,
			BadFrames: st.BadFrames - p.lastStats.BadFrames,
		}, nowS)
		p.lastStats = st
	}
	p.judge.Tick(nowS, now, em.alert)
}

// Ack acknowledges the alarm with id on behalf of by (may be empty).
func (p *pipeline) Ack(id, by string, now time.Time) (stageOutput, error) {
	evs, err := p.judge.Lifecycle().AckBy(id, by, now)
	return stageOutput{Alerts: evs}, err
}

// Flush ends the stream: an open breath is incomplete and is not reported,
// and alarms keep their state (nothing is held back in the pipeline).
func (p *pipeline) Flush() stageOutput { return stageOutput{} }
