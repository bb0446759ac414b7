package ingest

import (
	"errors"
	"math"
	"slices"
)

// ErrClockReset explains a StatusGap whose length is unknown: the device's
// time went back by more than OutOfOrderWindowS, as when it restarts its
// clock, and the stream goes on from where it was.
var ErrClockReset = errors.New("device clock went back: gap length unknown")

// OutOfOrderWindowS is how far back in time a sample may be and still count
// as out of order (dropped); further back is a clock reset.
const OutOfOrderWindowS = 1.0

// DriftTolerance is the relative difference between the measured and the
// declared (or first estimated) sample rate beyond which the rate is said
// to drift; the episode ends below half of it.
const DriftTolerance = 0.01

// verdict is what the timing layer decides about one sample.
type verdict uint8

const (
	keep           verdict = iota // deliver
	keepAfterGap                  // deliver, after a StatusGap
	keepAfterReset                // deliver, after a StatusGap of unknown length
	duplicate                     // drop: same time as the last sample
	outOfOrder                    // drop: older than the last sample
)

// timeline checks the time stamps of one stream: it detects gaps,
// duplicates, backward jumps and rate drift, drops samples that are out of
// order, and keeps the delivered time monotonic. The time it checks is the
// device's (or the counter's over the declared rate), never the arrival
// time.
type timeline struct {
	periodS float64 // expected sample period; 0 until known
	// steady's bounds, set with the period (setPeriod): an ordinary
	// interval is in (lowS, highS], and the drift mean within tolS of it.
	// lowS is +Inf, so that no interval is steady, until the drift mean
	// runs (admit).
	lowS, highS, tolS float64
	declared          bool    // periodS comes from a declared rate
	lastS             float64 // last delivered time, in delivered time
	have              bool
	offsetS           float64   // added to device time after clock resets
	first             []float64 // first intervals, to estimate the period
	meanS             float64   // running mean of ordinary intervals, for drift
	nMean             int
	drifting          bool
}

func newTimeline(rateHz float64) *timeline {
	t := &timeline{}
	if rateHz > 0 {
		t.setPeriod(1 / rateHz)
		t.declared = true
	}
	return t
}

// admit checks the sample time tS and returns its delivered time, the
// verdict, the gap length for keepAfterGap, and whether a drift episode
// started with this sample.
func (t *timeline) admit(tS float64) (out float64, v verdict, gapS float64, driftStarted bool) {
	out = tS + t.offsetS
	if !t.have {
		t.lastS, t.have = out, true
		return out, keep, 0, false
	}
	d := out - t.lastS
	p := t.periodS
	switch {
	case d == 0 || p > 0 && math.Abs(d) <= p/4:
		return out, duplicate, 0, false
	case d < 0 && -d <= OutOfOrderWindowS:
		return out, outOfOrder, 0, false
	case d < 0:
		// The device went back in time: continue one period after the
		// last sample so that delivered time stays monotonic.
		step := p
		if step == 0 {
			step = 1e-3
		}
		t.offsetS += t.lastS + step - out
		out = t.lastS + step
		t.lastS = out
		return out, keepAfterReset, 0, false
	}
	t.lastS = out
	if p == 0 {
		// Estimate the period from the median of the first intervals, as a
		// gap among them must not set it.
		t.first = append(t.first, d)
		if len(t.first) == 9 {
			s := slices.Clone(t.first)
			slices.Sort(s)
			t.setPeriod(s[4])
			t.first = nil
		}
		return out, keep, 0, false
	}
	if d > 1.5*p {
		return out, keepAfterGap, d - p, false
	}
	// Rate drift: compare the mean of ordinary intervals with the period.
	if t.nMean++; t.nMean == driftWindow-1 {
		t.lowS = t.periodS / 4 // the drift mean runs: steady may take over
	}
	if t.nMean >= driftWindow {
		// driftWindow is a power of two: multiplying by its reciprocal
		// gives the same float64 as dividing, without a division per
		// sample.
		t.meanS += (d - t.meanS) * (1.0 / driftWindow)
		return out, keep, 0, t.driftVerdict(p)
	}
	t.meanS += (d - t.meanS) / float64(t.nMean)
	return out, keep, 0, false
}

// driftWindow is how many ordinary intervals the running mean of the drift
// check weighs, once it has seen that many.
const driftWindow = 512

// steady is admit's common case: an ordinary interval (more than a
// quarter and at most one and a half periods) once the drift check's mean
// is running and stays well within tolerance. It makes the same changes to
// t as admit and returns the delivered time; for any other sample it
// changes nothing and reports false, and admit takes the sample. Its
// bounds are worked out with the period (setPeriod) and its test has no
// call, so that it is small enough to be inlined into AdmitRun's loop.
func (t *timeline) steady(tS float64) (float64, bool) {
	out := tS + t.offsetS
	d := out - t.lastS
	mean := t.meanS + (d-t.meanS)*(1.0/driftWindow)
	// A finite lowS implies a running mean, a first sample and a period.
	if !(d > t.lowS && d <= t.highS && mean-t.periodS <= t.tolS && t.periodS-mean <= t.tolS) {
		return 0, false
	}
	t.lastS, t.meanS, t.drifting = out, mean, false
	t.nMean++
	return out, true
}

// setPeriod sets the expected sample period and steady's bounds from it,
// the same expressions admit and driftVerdict use, so the same float64
// values.
func (t *timeline) setPeriod(p float64) {
	t.periodS, t.lowS, t.highS, t.tolS = p, math.Inf(1), 1.5*p, 0.8*(DriftTolerance/2)*p
}

// driftVerdict updates the drift episode from the running mean interval and
// reports whether one started.
func (t *timeline) driftVerdict(p float64) bool {
	if math.Abs(t.meanS-p) <= 0.8*(DriftTolerance/2)*p {
		// The mean is well within both thresholds (a fifth below the
		// lower one, far beyond rounding), as on almost every sample: the
		// relative deviation, a division, would not change the verdict,
		// which is no drift.
		t.drifting = false
		return false
	}
	dev := math.Abs(t.meanS/p - 1)
	switch {
	case !t.drifting && dev > DriftTolerance:
		t.drifting = true
		return true
	case t.drifting && dev < DriftTolerance/2:
		t.drifting = false
	}
	return false
}

// Timelines applies to offline input (a file or a recording read by
// `trapline analyze`) the same timing checks that a live source makes, one
// timeline per stream, so that re-analysis sees the samples the live
// analysis saw: duplicates and out-of-order samples dropped, the time kept
// monotonic across clock resets, and a StatusGap before the first sample
// after a gap.
type Timelines struct {
	rateHz float64
	tls    StreamIndex[*timeline]
}

// NewTimelines returns the timelines of input with the declared sample
// rate rateHz (0 = none), as ingest.Options.RateHz.
func NewTimelines(rateHz float64) *Timelines {
	return &Timelines{rateHz: rateHz}
}

// Admit checks one sample of stream. It returns the sample with its
// delivered time, a StatusGap event to hand on before it (nil when there
// was no gap), and false when the sample is dropped.
func (t *Timelines) Admit(stream string, smp Sample) (Sample, *Event, bool) {
	return t.of(stream).check(stream, smp)
}

// AdmitRun checks a run of samples of stream in order, as Admit checks
// one, in a single call. It moves the samples it keeps, with their
// delivered times, to the front of ss and returns them, and the number it
// dropped. Before a sample that follows a gap it calls gap with the samples
// kept before that one, which the caller hands on first, and the gap's
// event; those kept after it start again at the front of ss, so gap must
// not keep its slice.
func (t *Timelines) AdmitRun(stream string, ss []Sample, gap func(before []Sample, ev *Event)) (kept []Sample, dropped int) {
	tl := t.of(stream)
	k := 0
	for i := range ss {
		if out, ok := tl.steady(ss[i].TimeS); ok {
			// The common case writes the time alone, and moves the sample
			// only once one was dropped or a gap handed on.
			if k != i {
				ss[k] = ss[i] // k < i: a sample already read
			}
			ss[k].TimeS = out
			k++
			continue
		}
		smp, ev, keep := tl.check(stream, ss[i])
		if !keep {
			dropped++
			continue
		}
		if ev != nil {
			gap(ss[:k], ev)
			k = 0
		}
		ss[k] = smp
		k++
	}
	return ss[:k], dropped
}

// of returns the timeline of stream, made with its first sample.
func (t *Timelines) of(stream string) *timeline {
	tl, ok := t.tls.Get(stream)
	if !ok {
		tl = newTimeline(t.rateHz)
		t.tls.Put(stream, tl)
	}
	return tl
}

// check is Admit on stream's timeline.
func (tl *timeline) check(stream string, smp Sample) (Sample, *Event, bool) {
	if out, ok := tl.steady(smp.TimeS); ok {
		smp.TimeS = out
		return smp, nil, true
	}
	out, v, gapS, _ := tl.admit(smp.TimeS)
	var ev *Event
	switch v {
	case duplicate, outOfOrder:
		return smp, nil, false
	case keepAfterGap:
		ev = &Event{Stream: stream, Status: StatusGap, GapS: gapS}
	case keepAfterReset:
		ev = &Event{Stream: stream, Status: StatusGap, Err: ErrClockReset}
	}
	smp.TimeS = out
	return smp, ev, true
}
