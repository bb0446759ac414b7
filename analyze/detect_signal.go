package analyze

import (
	"fmt"
	"math"
	"strings"

	"trapline/ingest"
)

// Signal detects technical conditions of one stream: signal lost, an
// implausible signal (flat line, out of physical range, clipping, reversed
// flow sign), sample gaps and a high decoder error rate. It has no clock:
// every call carries nowS, seconds on one monotonic clock chosen by the
// caller. The daemon passes the stream time extrapolated with the wall
// clock since the last sample, so that findings and alerts share the
// stream's time axis; offline analysis passes the sample time.
type Signal struct {
	cfg SignalConfig
	lim sigLimits

	started    bool
	lastS      float64 // nowS of the last sample batch
	lost       bool    // last signal-lost verdict
	disconnErr string

	// Implausibility window over sample time.
	win        sigWindow
	implaus    bool
	prevP      float64
	prevF      float64
	runP, runF int

	// Gaps within the last minute (bounded: the oldest are dropped).
	gaps []gapEntry

	// Decoder error accounting over ErrorWindowS, in one-second buckets.
	errBuckets []errBucket
}

type sigWindow struct {
	startS                 float64
	n                      int
	pMin, pMax, fMin, fMax float64
	sp, sf, spp, sff, spf  float64
	outOfRange, clipped    int
}

// sigLimits are the thresholds Samples compares every sample with that
// derive from the configuration, worked out once rather than for each
// sample (the same expressions, so the same float64 values).
type sigLimits struct {
	flowMaxLPS       float64 // FlowMaxLPM in L/s
	clipPHi, clipPLo float64 // pressures within the clipping margin of the range's ends
	clipFlowLPS      float64 // |flow| within the clipping margin of the maximum
}

func newSigLimits(c SignalConfig) sigLimits {
	flowMaxLPS := c.FlowMaxLPM / 60
	pSpan := c.PressureMaxCmH2O - c.PressureMinCmH2O
	return sigLimits{flowMaxLPS: flowMaxLPS,
		clipPHi: c.PressureMaxCmH2O - c.ClipMarginFrac*pSpan, clipPLo: c.PressureMinCmH2O + c.ClipMarginFrac*pSpan,
		clipFlowLPS: flowMaxLPS * (1 - c.ClipMarginFrac)}
}

type gapEntry struct{ tS, lenS float64 }

type errBucket struct {
	tS       float64
	bad, all uint64
}

// maxGapTimes bounds the remembered gaps; more than this many gaps in a
// minute is present anyway.
const maxGapTimes = 1024

// NewSignal returns the technical-condition detector; cfg must be valid.
func NewSignal(cfg SignalConfig) *Signal {
	s := &Signal{cfg: cfg, lim: newSigLimits(cfg)}
	s.win.reset(math.NaN())
	return s
}

func (w *sigWindow) reset(startS float64) {
	*w = sigWindow{startS: startS, pMin: math.Inf(1), pMax: math.Inf(-1), fMin: math.Inf(1), fMax: math.Inf(-1)}
}

// Conditions names the conditions Signal reports.
func (s *Signal) Conditions() []string {
	return []string{CondSignalLost, CondSignalImplausible, CondSampleGaps, CondDecoderErrors}
}

// Samples takes a batch of samples that arrived at nowS. It clears a lost
// signal at once, and reports signal-implausible each time a window of
// WindowS seconds of samples is complete.
func (s *Signal) Samples(samples []ingest.Sample, nowS float64, dst []Finding) []Finding {
	if len(samples) == 0 {
		return dst
	}
	s.started, s.lastS = true, nowS
	if s.lost {
		// They arrive again with the first of these samples.
		s.lost = false
		dst = append(dst, Finding{Condition: CondSignalLost, Class: Technical, TimeS: samples[0].TimeS, BreathSeq: -1,
			Evidence: map[string]float64{}, Message: "samples are arriving again"})
	}
	c, lim, w := &s.cfg, &s.lim, &s.win
	for _, x := range samples {
		p, f := x.PressureCmH2O, x.FlowLPS
		// x−x is 0 for a finite x and NaN for NaN and ±Inf.
		if p-p != 0 || f-f != 0 {
			continue
		}
		if math.IsNaN(w.startS) || x.TimeS < w.startS {
			w.reset(x.TimeS)
		}
		if x.TimeS-w.startS >= c.WindowS {
			dst = append(dst, s.evalWindow(x.TimeS))
			w.reset(x.TimeS)
		}
		w.n++
		// p and f are finite here, so plain comparisons give the extremes
		// (Go's min and max also order NaNs and zeros' signs, at a cost per
		// sample; a zero's sign cannot change a range).
		if p < w.pMin {
			w.pMin = p
		}
		if p > w.pMax {
			w.pMax = p
		}
		if f < w.fMin {
			w.fMin = f
		}
		if f > w.fMax {
			w.fMax = f
		}
		w.sp += p
		w.sf += f
		w.spp += p * p
		w.sff += f * f
		w.spf += p * f
		af := math.Abs(f)
		if p < c.PressureMinCmH2O || p > c.PressureMaxCmH2O || af > lim.flowMaxLPS {
			w.outOfRange++
		}
		// Clipping: a run of identical values at the ends of the range.
		if p == s.prevP && (p >= lim.clipPHi || p <= lim.clipPLo) {
			s.runP++
		} else {
			s.runP = 1
		}
		if f == s.prevF && af >= lim.clipFlowLPS {
			s.runF++
		} else {
			s.runF = 1
		}
		if s.runP == c.ClipRun || s.runF == c.ClipRun {
			w.clipped++
		}
		s.prevP, s.prevF = p, f
	}
	return dst
}

// evalWindow judges the completed window.
func (s *Signal) evalWindow(tS float64) Finding {
	c, w := &s.cfg, &s.win
	f := Finding{Condition: CondSignalImplausible, Class: Technical, TimeS: tS, BreathSeq: -1,
		Evidence: map[string]float64{"samples": float64(w.n)}}
	var why []string
	pRange, fRangeLPM := w.pMax-w.pMin, (w.fMax-w.fMin)*60
	detPut(f.Evidence, "pressure_range_cmh2o", pRange, 2)
	detPut(f.Evidence, "flow_range_lpm", fRangeLPM, 2)
	flat := w.n > 1 && pRange < c.FlatPressureCmH2O && fRangeLPM < c.FlatFlowLPM
	if flat {
		why = append(why, "flat line")
	}
	if w.outOfRange > 0 {
		f.Evidence["out_of_range_samples"] = float64(w.outOfRange)
		why = append(why, "values outside the physical range")
	}
	if w.clipped > 0 {
		f.Evidence["clipped_runs"] = float64(w.clipped)
		why = append(why, "clipping at the end of the range")
	}
	// Pearson correlation of pressure and flow over the window.
	n := float64(w.n)
	vp, vf := w.spp-w.sp*w.sp/n, w.sff-w.sf*w.sf/n
	if !flat && vp > 0 && vf > 0 {
		r := (w.spf - w.sp*w.sf/n) / math.Sqrt(vp*vf)
		detPut(f.Evidence, "pressure_flow_corr", r, 3)
		if r < c.ReversedCorrMax {
			why = append(why, "flow sign looks reversed (pressure falls while flow is inspiratory)")
		}
	}
	s.implaus = len(why) > 0
	f.Present = s.implaus
	if f.Present {
		f.Severity = SeverityMedium
		f.Message = "implausible signal: " + strings.Join(why, "; ")
	} else {
		f.Message = "signal plausible"
	}
	return f
}

// Status takes a status event of the source at nowS. Gaps count towards
// sample-gaps; a disconnection is remembered as evidence for signal-lost
// (the condition itself is time-based, so a quick reconnection does not
// raise it).
func (s *Signal) Status(st ingest.Status, gapS float64, err error, nowS float64) {
	switch st {
	case ingest.StatusGap:
		if len(s.gaps) == maxGapTimes {
			s.gaps = append(s.gaps[:0], s.gaps[1:]...)
		}
		s.gaps = append(s.gaps, gapEntry{tS: nowS, lenS: max(gapS, 0)})
	case ingest.StatusDisconnected:
		s.disconnErr = "disconnected"
		if err != nil {
			s.disconnErr = err.Error()
		}
	case ingest.StatusConnected:
		s.disconnErr = ""
	}
}

// Decoder takes the change of the source's counters since the previous call
// (samples delivered, bad lines, bad frames) at nowS.
func (s *Signal) Decoder(delta ingest.Stats, nowS float64) {
	bad := delta.BadLines + delta.BadFrames
	all := bad + delta.Samples
	if all == 0 {
		return
	}
	if k := len(s.errBuckets); k > 0 && nowS-s.errBuckets[k-1].tS < 1 {
		s.errBuckets[k-1].bad += bad
		s.errBuckets[k-1].all += all
		return
	}
	s.errBuckets = append(s.errBuckets, errBucket{tS: nowS, bad: bad, all: all})
	// Bounded even when Tick is never called: drop buckets out of the window.
	drop := 0
	for drop < len(s.errBuckets) && nowS-s.errBuckets[drop].tS > s.cfg.ErrorWindowS {
		drop++
	}
	s.errBuckets = append(s.errBuckets[:0], s.errBuckets[drop:]...)
}

// Tick evaluates the time-based conditions at nowS and appends one finding
// each for signal-lost, sample-gaps and decoder-errors. Call it about once a
// second whether or not samples arrive.
func (s *Signal) Tick(nowS float64, dst []Finding) []Finding {
	c := &s.cfg
	if !s.started {
		// Time since the first call counts as silence.
		s.started, s.lastS = true, nowS
	}
	silence := nowS - s.lastS
	s.lost = silence >= c.LostAfterS
	lost := Finding{Condition: CondSignalLost, Class: Technical, TimeS: nowS, BreathSeq: -1, Present: s.lost,
		Evidence: map[string]float64{"lost_after_s": c.LostAfterS}}
	detPut(lost.Evidence, "silence_s", max(silence, 0), 1)
	if s.lost {
		lost.Severity = SeverityMedium
		lost.Message = fmt.Sprintf("no samples for %.0f s", silence)
		if s.disconnErr != "" {
			lost.Message += " (" + s.disconnErr + ")"
			lost.Evidence["disconnected"] = 1
		}
	} else {
		lost.Message = "samples arriving"
	}
	dst = append(dst, lost)

	// Gaps in the last minute.
	keep, longest := s.gaps[:0], 0.0
	for _, g := range s.gaps {
		if nowS-g.tS <= 60 && g.tS <= nowS {
			keep = append(keep, g)
			longest = max(longest, g.lenS)
		}
	}
	s.gaps = keep
	gaps := Finding{Condition: CondSampleGaps, Class: Technical, TimeS: nowS, BreathSeq: -1,
		Evidence: map[string]float64{"gaps_last_min": float64(len(s.gaps))}}
	detPut(gaps.Evidence, "longest_gap_s", longest, 3)
	gaps.Present = len(s.gaps) >= c.GapsPerMin || longest >= c.GapS
	if gaps.Present {
		gaps.Severity = SeverityLow
		noun := "sample gaps"
		if len(s.gaps) == 1 {
			noun = "sample gap"
		}
		gaps.Message = fmt.Sprintf("%d %s in the last minute, the longest %.2f s", len(s.gaps), noun, longest)
	} else {
		gaps.Message = "no significant sample gaps"
	}
	dst = append(dst, gaps)

	// Decoder errors over the window.
	var bad, all uint64
	kb := s.errBuckets[:0]
	for _, e := range s.errBuckets {
		if nowS-e.tS <= c.ErrorWindowS && e.tS <= nowS {
			kb = append(kb, e)
			bad += e.bad
			all += e.all
		}
	}
	s.errBuckets = kb
	dec := Finding{Condition: CondDecoderErrors, Class: Technical, TimeS: nowS, BreathSeq: -1,
		Evidence: map[string]float64{"bad": float64(bad), "decoded": float64(all)}}
	if all > 0 {
		rate := float64(bad) / float64(all)
		detPut(dec.Evidence, "error_rate", rate, 4)
		dec.Present = rate >= c.ErrorRate && bad >= uint64(c.ErrorMinCount)
	}
	if dec.Present {
		dec.Severity = SeverityLow
		dec.Message = fmt.Sprintf("%d of %d lines or frames failed to decode in the last %.0f s", bad, all, c.ErrorWindowS)
	} else {
		dec.Message = "decoder error rate normal"
	}
	return append(dst, dec)
}
