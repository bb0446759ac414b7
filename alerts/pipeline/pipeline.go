// Package pipeline is the analysis of one stream: samples go through the
// breath analyzer, breaths and samples through the detectors, and findings
// through the alarm lifecycle. The daemon, the scale-out worker, `trapline
// analyze` and the sweep all drive this one type.
package pipeline

import (
	"math"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/config"
	"trapline/ingest"
)

// Sink receives what a pipeline produces, in the order it happens: a breath
// record before the alert events it causes. The pointers are only valid
// during the call; a sink that keeps them copies the values.
type Sink interface {
	Breath(b *analyze.Breath)
	Alert(e *alerts.Event)
}

// Output is what one step of a stream's analysis produced. *Output is a
// Sink that gathers.
type Output struct {
	Breaths []analyze.Breath
	Alerts  []alerts.Event
}

// Breath appends a copy of b.
func (o *Output) Breath(b *analyze.Breath) { o.Breaths = append(o.Breaths, *b) }

// Alert appends a copy of e.
func (o *Output) Alert(e *alerts.Event) { o.Alerts = append(o.Alerts, *e) }

// Discard is a Sink that throws everything away.
type Discard struct{}

// Breath does nothing.
func (Discard) Breath(*analyze.Breath) {}

// Alert does nothing.
func (Discard) Alert(*alerts.Event) {}

// Options configure a pipeline; the configurations must be valid.
type Options struct {
	// Stream is the stream id written into breath records and alert events.
	Stream    string
	Analysis  analyze.Config
	Detectors analyze.DetectorConfig
	Alarms    alerts.LifecycleConfig
	// Now is the live wall clock (default time.Now). The worker passes the
	// store time of the message it analyses.
	Now func() time.Time
	// Stats, when set, reads the source's counters for the decoder error
	// rate; they are sampled on every tick.
	Stats func() ingest.Stats
	// Version is the program version stamped on every breath record and
	// alert event; empty means config.ProgramVersion().
	Version string
	// KeepBreaths is how many recent breaths Checkpoint carries (see
	// KeepBreaths); 0 keeps none.
	KeepBreaths int
	// Digest is config.AnalysisDigest of Analysis, Detectors and Alarms
	// when the caller has it already (the streams of one source share it,
	// and a ward admits thousands at once); empty means New computes it.
	Digest string
}

// digest returns the configuration digest of o.
func (o *Options) digest() string {
	if o.Digest != "" {
		return o.Digest
	}
	return config.AnalysisDigest(o.Analysis, o.Detectors, o.Alarms)
}

// Pipeline is the analysis of one stream. It owns the analyzer, the
// detectors and the alarm lifecycle, and is used from one goroutine.
//
// Wall time: live, every step takes the wall clock (Options.Now, or the
// time the caller passes), and the technical detectors run on the stream
// time extrapolated with the wall clock since the last sample, so that a
// signal-lost alert carries a t_s on the stream's own axis. Offline
// (NewOffline) the wall time of anything at stream time t is start + t,
// which makes the output, alert ids included, a deterministic function of
// the recording, and the pipeline makes the ticks the live daemon would
// have made, once a second of stream time, so that a gap in a recording
// raises signal-lost too.
type Pipeline struct {
	stream string
	an     *analyze.Analyzer
	judge  *alerts.Judge
	alarms alerts.LifecycleConfig

	// version and digest are the provenance of every record.
	version, digest string

	now   func() time.Time
	clock *alerts.OfflineClock // set offline
	// wallOf is clock.Wall, made once: a method value made for every
	// sample would cost an allocation.
	wallOf func(float64) time.Time
	stats  func() ingest.Stats
	last   ingest.Stats

	haveSample bool
	lastS      float64   // stream time of the last sample
	lastWall   time.Time // wall time it arrived
	created    time.Time
	lastBreath int // the analyzer's number of the last breath, -1 before any
	// breath holds the last completed breath: a field rather than a local,
	// so that handing its address to the sink does not move every analyzed
	// sample's record to the heap.
	breath analyze.Breath
	one    [1]ingest.Sample
	out    Output // gathers for Samples and Tick

	// Continuity (resume.go): recent breaths and terminal ids for the
	// checkpoint, the offset of breath numbers after a resume, and the
	// sink of the current step with the alert function that notes ids.
	keep     int
	recent   []analyze.Breath
	terminal []Terminal
	seqBase  int
	reserved int // first breath number not reserved by a checkpoint
	sink     Sink
	alertFn  func(*alerts.Event)
}

// New returns a live pipeline.
func New(o Options) *Pipeline {
	now := o.Now
	if now == nil {
		now = time.Now
	}
	if o.Version == "" {
		o.Version = config.ProgramVersion()
	}
	p := &Pipeline{
		stream:     o.Stream,
		an:         analyze.NewAnalyzer(o.Stream, o.Analysis),
		judge:      alerts.NewJudge(o.Stream, o.Detectors, o.Alarms),
		alarms:     o.Alarms,
		version:    o.Version,
		digest:     o.digest(),
		now:        now,
		stats:      o.Stats,
		created:    now(),
		lastBreath: -1,
		keep:       o.KeepBreaths,
	}
	p.judge.SetProvenance(p.version, p.digest)
	p.alertFn = p.alert
	return p
}

// alert notes an event's id and passes it to the current step's sink.
func (p *Pipeline) alert(e *alerts.Event) {
	p.note(e)
	p.sink.Alert(e)
}

// NewOffline returns a pipeline for a recording whose stream time 0 is wall
// time start; Options.Now is not used.
func NewOffline(o Options, start time.Time) *Pipeline {
	p := New(o)
	p.clock, p.created = &alerts.OfflineClock{Epoch: start}, start
	p.wallOf = p.clock.Wall
	return p
}

// Stream returns the stream id.
func (p *Pipeline) Stream() string { return p.stream }

func (p *Pipeline) offline() bool { return p.clock != nil }

// streamNow maps a wall time to the stream's time axis: the last sample's
// time plus the wall time since it arrived (before any sample, the wall
// time since the pipeline started).
func (p *Pipeline) streamNow(wall time.Time) float64 {
	if !p.haveSample {
		return wall.Sub(p.created).Seconds()
	}
	if p.offline() {
		// Offline the last sample's wall time is not kept: it is a
		// function of its stream time.
		return p.lastS + wall.Sub(p.clock.Wall(p.lastS)).Seconds()
	}
	return p.lastS + wall.Sub(p.lastWall).Seconds()
}

// Samples analyses a batch of samples in time order and gathers the output.
// Live, all of it is stamped with the wall time of the call.
func (p *Pipeline) Samples(ss []ingest.Sample) Output {
	p.Push(ss, &p.out)
	return p.takeOut()
}

// takeOut returns what p.out gathered and empties it. Gathering into a
// field rather than a local keeps the sink from costing an allocation.
func (p *Pipeline) takeOut() Output {
	out := p.out
	p.out = Output{}
	return out
}

// PushOne is Push for a single sample, without a slice from the caller.
func (p *Pipeline) PushOne(s ingest.Sample, sink Sink) {
	p.one[0] = s
	p.Push(p.one[:], sink)
}

// Push is Samples with the output going to sink as it happens. It does not
// allocate per sample.
func (p *Pipeline) Push(ss []ingest.Sample, sink Sink) {
	p.sink = sink
	if p.offline() {
		p.pushOffline(ss, sink)
		return
	}
	// The technical checks take the samples in runs, one call for the
	// samples between two breaths rather than one per sample; a run is
	// judged before the breath it ends, so the lifecycle sees the findings
	// in the same order, all at the same wall time.
	wall := p.now()
	start := 0
	for i := range ss {
		s := ss[i]
		if math.IsNaN(s.TimeS) || math.IsInf(s.TimeS, 0) {
			// No place on the time axis; the analyzer skips it too.
			p.judgeRun(ss[start:i], wall)
			start = i + 1
			continue
		}
		p.haveSample, p.lastS, p.lastWall = true, s.TimeS, wall
		if b := p.an.Next(s); b != nil {
			p.judgeRun(ss[start:i+1], wall)
			start = i + 1
			p.breathOut(b, wall, sink)
		}
	}
	p.judgeRun(ss[start:], wall)
}

// judgeRun passes a run of samples with finite times, read at wall, to the
// technical checks.
func (p *Pipeline) judgeRun(run []ingest.Sample, wall time.Time) {
	if len(run) > 0 {
		p.judge.Samples(run, run[len(run)-1].TimeS, wall, p.alertFn)
	}
}

// pushOffline is Push for an offline pipeline: the ticks due before each
// sample, on the stream's time axis, and wall times made only when
// something needs them (see streamNow). The technical checks take the
// samples in runs between breaths and ticks, one call a run, each finding
// at its own sample's time (Judge.SamplesRun): the same events, at the
// same times and in the same order, as one sample at a time.
func (p *Pipeline) pushOffline(ss []ingest.Sample, sink Sink) {
	start := 0
	for i := 0; i < len(ss); {
		t := ss[i].TimeS
		if t-t != 0 { // NaN or ±Inf: no place on the time axis; the analyzer skips it too
			p.judge.SamplesRun(ss[start:i], p.wallOf, p.alertFn)
			i++
			start = i
			continue
		}
		if p.clock.Due(t) {
			p.judge.SamplesRun(ss[start:i], p.wallOf, p.alertFn)
			start = i
			p.clock.Until(t, func(tickS float64) { p.TickTo(p.clock.Wall(tickS), sink) })
		}
		// The analyzer takes the samples up to the next tick, a time
		// that is not finite or a breath, in one call. ss[i] goes to it
		// in any case, as with one sample at a time: the clock's window
		// can leave out by rounding the time it was just started at.
		fromS, toS := p.clock.Window()
		n, b := p.an.NextIn(ss[i:], fromS, toS)
		if n == 0 {
			n, b = 1, p.an.Next(ss[i])
		}
		i += n
		p.haveSample, p.lastS = true, ss[i-1].TimeS
		if b != nil {
			p.judge.SamplesRun(ss[start:i], p.wallOf, p.alertFn)
			start = i
			p.breathOut(b, p.clock.Wall(p.lastS), sink)
		}
	}
	p.judge.SamplesRun(ss[start:], p.wallOf, p.alertFn)
}

// breathOut stamps a completed breath with the stream and provenance,
// hands it to sink and judges it.
func (p *Pipeline) breathOut(b *analyze.Breath, wall time.Time, sink Sink) {
	p.breath = *b
	p.breath.Stream = p.stream
	p.breath.TraplineVersion, p.breath.ConfigDigest = p.version, p.digest
	p.breath.Seq += p.seqBase
	p.lastBreath = p.breath.Seq
	p.remember(&p.breath)
	sink.Breath(&p.breath)
	p.judge.Breath(&p.breath, wall, p.alertFn)
}

// Status takes a change of the source's condition. A disconnection resets
// the breath analyzer so that no breath spans it; signal-lost itself is
// judged by Tick from the time without samples.
func (p *Pipeline) Status(ev ingest.Event, now time.Time) Output {
	if p.offline() {
		now = p.clock.Wall(p.lastS)
	}
	p.judge.Status(&ev, p.streamNow(now))
	if ev.Status == ingest.StatusDisconnected {
		p.an.Reset()
	}
	return Output{}
}

// Tick evaluates the time-based conditions at wall time now; the daemon
// calls it about once a second.
func (p *Pipeline) Tick(now time.Time) Output {
	p.TickTo(now, &p.out)
	return p.takeOut()
}

// TickTo is Tick with the output going to sink.
func (p *Pipeline) TickTo(now time.Time, sink Sink) {
	nowS := p.streamNow(now)
	if p.stats != nil {
		st := p.stats()
		p.judge.Decoder(ingest.Stats{
			Samples:   st.Samples - p.last.Samples,
			BadLines:  st.BadLines - p.last.BadLines,
			BadFrames: st.BadFrames - p.last.BadFrames,
		}, nowS)
		p.last = st
	}
	p.sink = sink
	p.judge.Tick(nowS, now, p.alertFn)
}

// Finish makes the ticks due up to stream time tS, the end of a
// recording; only an offline pipeline makes up ticks.
func (p *Pipeline) Finish(tS float64, sink Sink) {
	if p.offline() {
		p.clock.Until(tS, func(tickS float64) { p.TickTo(p.clock.Wall(tickS), sink) })
	}
}

// Ack acknowledges the alarm with id on behalf of by (may be empty).
func (p *Pipeline) Ack(id, by string, now time.Time) (Output, error) {
	evs, err := p.judge.Lifecycle().AckBy(id, by, now)
	for i := range evs {
		p.judge.Stamp(&evs[i])
		p.note(&evs[i])
	}
	return Output{Alerts: evs}, p.ackAnswer(id, err)
}

// Finding passes a finding about the program itself (not the signal),
// such as an impaired recording, through the stream's alarm lifecycle at
// wall time now.
func (p *Pipeline) Finding(f analyze.Finding, now time.Time) Output {
	if p.offline() {
		now = p.clock.Wall(p.lastS)
	}
	f.TimeS, f.BreathSeq = p.streamNow(now), -1
	p.sink = &p.out
	p.judge.Finding(f, now, p.alertFn)
	return p.takeOut()
}

// Flush ends the stream: an open breath is incomplete and is not reported,
// and alarms keep their state (nothing is held back in the pipeline).
func (p *Pipeline) Flush() Output { return Output{} }

// EndAlarms ends every open alarm of the stream at wall time now with
// reason (alerts.EndAll, at the stream's last time) and returns their
// Ended events; an acknowledgement of one of them then answers what became
// of it. For a stream that stops being monitored and keeps no checkpoint
// to resume its alarms from: without it they stayed open for every
// subscriber, and nothing would ever end them.
func (p *Pipeline) EndAlarms(now time.Time, reason string) Output {
	var out Output
	for _, e := range p.judge.Lifecycle().EndAll(now, p.lastS, reason) {
		p.note(&e)
		out.Alerts = append(out.Alerts, e)
	}
	return out
}
