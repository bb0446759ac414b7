package alerts

import (
	"math"
	"time"

	"trapline/analyze"
	"trapline/ingest"
)

// Judge runs one stream's detectors and passes every finding through the
// stream's alarm lifecycle: the step from findings to alert events that the
// daemon, `trapline analyze` and the detector sweep share, so that each of
// them judges a stream exactly alike. It is used from one goroutine.
type Judge struct {
	det     *analyze.Detectors
	life    *Lifecycle
	scratch []analyze.Finding
	// version and digest are stamped on every event (SetProvenance).
	version, digest string
}

// SetProvenance sets the program version and configuration digest that
// every event of the judge carries from now on.
func (j *Judge) SetProvenance(version, digest string) { j.version, j.digest = version, digest }

// Stamp writes the judge's provenance into e.
func (j *Judge) Stamp(e *Event) { e.TraplineVersion, e.ConfigDigest = j.version, j.digest }

// NewJudge returns the judge of stream; the configurations must be valid.
func NewJudge(stream string, dcfg analyze.DetectorConfig, lcfg LifecycleConfig) *Judge {
	return &Judge{
		det:     analyze.NewDetectors(dcfg),
		life:    NewLifecycle(stream, lcfg),
		scratch: make([]analyze.Finding, 0, 16),
	}
}

// Lifecycle returns the alarm lifecycle, for acknowledgements and
// snapshots.
func (j *Judge) Lifecycle() *Lifecycle { return j.life }

// SetLifecycle replaces the alarm lifecycle, as a worker does when it takes
// a stream over and restores the alarm state of the previous owner.
func (j *Judge) SetLifecycle(l *Lifecycle) { j.life = l }

// update passes the findings gathered in scratch to the lifecycle.
func (j *Judge) update(wall time.Time, emit func(*Event)) { j.updateWith(j.scratch, wall, emit) }

// updateWith passes findings to the lifecycle at wall.
func (j *Judge) updateWith(findings []analyze.Finding, wall time.Time, emit func(*Event)) {
	for _, f := range findings {
		evs := j.life.Update(f, wall)
		for i := range evs {
			j.Stamp(&evs[i])
			emit(&evs[i])
		}
	}
}

// Samples judges samples that arrived at stream time nowS (the technical
// conditions: implausible signal, gaps).
func (j *Judge) Samples(ss []ingest.Sample, nowS float64, wall time.Time, emit func(*Event)) {
	j.scratch = j.det.Samples(ss, nowS, j.scratch[:0])
	j.update(wall, emit)
}

// SamplesRun is Samples for a caller whose wall time is a function of the
// stream time (offline, see OfflineClock.Wall), for a run of samples with
// finite times that nothing else is judged between (no breath, no tick).
// Each finding reaches the lifecycle at the wall time of its own sample,
// as if the samples had come one at a time, and wallOf is called only when
// there is a finding, not for every sample.
func (j *Judge) SamplesRun(ss []ingest.Sample, wallOf func(float64) time.Time, emit func(*Event)) {
	if len(ss) == 0 {
		return
	}
	j.scratch = j.det.Samples(ss, ss[len(ss)-1].TimeS, j.scratch[:0])
	// The findings come in the order of their samples; those of one
	// sample share its time.
	for k := 0; k < len(j.scratch); {
		n := k + 1
		for n < len(j.scratch) && j.scratch[n].TimeS == j.scratch[k].TimeS {
			n++
		}
		j.updateWith(j.scratch[k:n], wallOf(j.scratch[k].TimeS), emit)
		k = n
	}
}

// Breath judges a completed breath (the physiological conditions).
func (j *Judge) Breath(b *analyze.Breath, wall time.Time, emit func(*Event)) {
	j.scratch = j.det.Breath(b, j.scratch[:0])
	j.update(wall, emit)
}

// Tick judges the time-based conditions (signal lost, decoder error rate)
// at stream time nowS.
func (j *Judge) Tick(nowS float64, wall time.Time, emit func(*Event)) {
	j.scratch = j.det.Tick(nowS, j.scratch[:0])
	j.update(wall, emit)
}

// Finding passes a finding made outside the detectors (a condition of the
// program itself, such as an impaired recording) to the lifecycle.
func (j *Judge) Finding(f analyze.Finding, wall time.Time, emit func(*Event)) {
	j.scratch = append(j.scratch[:0], f)
	j.update(wall, emit)
}

// Status takes a change of the source's condition at stream time nowS.
func (j *Judge) Status(ev *ingest.Event, nowS float64) { j.det.Status(ev, nowS) }

// Decoder takes the source's counters accumulated since the last call.
func (j *Judge) Decoder(delta ingest.Stats, nowS float64) { j.det.Decoder(delta, nowS) }

// OfflineTickS is the period of the ticks made up for a recording: the
// daemon's default tick period.
const OfflineTickS = 1.0

// maxOfflineTicks bounds the ticks made up in one gap: an hour's worth.
// After an hour of silence nothing new happens each second, and a corrupt
// time stamp must not loop for ever.
const maxOfflineTicks = 3600

// OfflineClock makes, for a recording or a simulation, the ticks the live
// daemon would have made once a second, on the stream's own time axis and
// through gaps too, and maps stream time to a wall time: Epoch + t. That
// makes offline output, alert ids included, a deterministic function of
// the input.
type OfflineClock struct {
	// Epoch is the wall time of stream time 0.
	Epoch   time.Time
	started bool
	nextS   float64
}

// Wall returns the wall time of stream time tS.
func (c *OfflineClock) Wall(tS float64) time.Time {
	return c.Epoch.Add(time.Duration(tS * float64(time.Second)))
}

// Due reports whether Until(tS, …) has anything to do: the first call, a
// clock that went back, or a tick due. A caller that feeds every sample
// asks it first, so that it makes no tick function for the samples between
// ticks.
func (c *OfflineClock) Due(tS float64) bool {
	return !c.started || tS < c.nextS-OfflineTickS || c.nextS <= tS
}

// Window returns the stream times [fromS, toS) at which no tick is due
// (Due is false); before the first call of Until, none (NaN bounds).
func (c *OfflineClock) Window() (fromS, toS float64) {
	if !c.started {
		return math.NaN(), math.NaN()
	}
	return c.nextS - OfflineTickS, c.nextS
}

// Until calls tick for every tick due up to stream time tS, in order. A
// clock that went back restarts the ticks; a gap longer than an hour gets an
// hour of ticks, then the ticks jump to the present.
func (c *OfflineClock) Until(tS float64, tick func(tickS float64)) {
	if !c.started || tS < c.nextS-OfflineTickS {
		c.started, c.nextS = true, tS+OfflineTickS
		return
	}
	for n := 0; c.nextS <= tS; n++ {
		if n == maxOfflineTicks {
			c.nextS = tS + OfflineTickS
			return
		}
		tick(c.nextS)
		c.nextS += OfflineTickS
	}
}

// Warm passes a breath to the detectors only, without judging the
// findings: a restored pipeline replays its recent breaths this way so that
// the detectors' windows are as they were, while the alarm lifecycle is
// restored from the snapshot.
func (j *Judge) Warm(b *analyze.Breath) { j.scratch = j.det.Breath(b, j.scratch[:0]) }
