package web

import (
	"strconv"
	"time"

	"trapline/alerts"
)

// appendLast writes the latest breath's trend values.
func appendLast(dst []byte, p *trendPoint) []byte {
	dst = appendNum(appendKey(append(dst, '{'), "t_s", true), p.tS, 3)
	dst = appendNum(appendKey(dst, "peepi_cmh2o", false), float64(p.peepiCmH2O), 2)
	dst = appendNum(appendKey(dst, "trapped_ml", false), float64(p.trappedML), 1)
	dst = appendNum(appendKey(dst, "r_cmh2o_s_per_l", false), float64(p.rCmH2OSPerL), 2)
	dst = appendNum(appendKey(dst, "c_ml_per_cmh2o", false), float64(p.cMLPerCmH2O), 2)
	dst = appendNum(appendKey(dst, "pip_cmh2o", false), float64(p.peakCmH2O), 2)
	dst = appendNum(appendKey(dst, "pplat_cmh2o", false), float64(p.plateauCmH2O), 2)
	return append(dst, '}')
}

// appendSummary writes the line of the stream list: its state, breath
// count, latest breath values and current alarms. s.mu must be held.
func (s *stream) appendSummary(dst []byte, state string) []byte {
	dst = appendString(appendKey(append(dst, '{'), "id", true), s.id)
	dst = appendString(appendKey(dst, "state", false), state)
	dst = strconv.AppendInt(appendKey(dst, "breaths", false), int64(s.breaths), 10)
	dst = appendKey(dst, "last_sample_ms", false)
	if s.haveSample {
		dst = strconv.AppendInt(dst, s.lastWall.UnixMilli(), 10)
	} else {
		dst = append(dst, "null"...)
	}
	dst = appendLast(appendKey(dst, "last", false), &s.last)
	dst = append(appendKey(dst, "active", false), '[')
	for i := range s.active {
		if i > 0 {
			dst = append(dst, ',')
		}
		dst = appendEvent(dst, &s.active[i])
	}
	return append(dst, ']', '}')
}

// span is a range of ring numbers [from, upto).
type span struct{ from, upto uint64 }

// detailSpans says which waveform points, breaths and events a detail
// carries.
type detailSpans struct {
	wave, trend, events span
	full                bool    // a snapshot: the page starts afresh
	trendFromS          float64 // breaths before this stream time are left out
}

// appendDetail writes the selected stream's waveform, trends and alarm
// timeline for the given spans. s.mu must be held.
func (s *stream) appendDetail(dst []byte, d *detailSpans) []byte {
	dst = appendString(appendKey(append(dst, '{'), "id", true), s.id)
	dst = append(appendKey(dst, "full", false), strconv.FormatBool(d.full)...)

	var w []wavePoint
	s.wave.each(d.wave.from, d.wave.upto, func(p *wavePoint) { w = append(w, *p) })
	dst = appendKey(append(appendKey(dst, "wave", false), '{'), "t_s", true)
	dst = appendArray(dst, len(w), 3, func(i int) float64 { return w[i].tS })
	dst = appendArray(appendKey(dst, "p_cmh2o", false), len(w), 2, func(i int) float64 { return float64(w[i].pCmH2O) })
	dst = appendArray(appendKey(dst, "flow_lpm", false), len(w), 2, func(i int) float64 { return float64(w[i].flowLPM) })
	dst = append(dst, '}')

	var tr []trendPoint
	s.trend.each(d.trend.from, d.trend.upto, func(p *trendPoint) {
		if p.tS >= d.trendFromS {
			tr = append(tr, *p)
		}
	})
	dst = appendKey(append(appendKey(dst, "trend", false), '{'), "t_s", true)
	dst = appendArray(dst, len(tr), 3, func(i int) float64 { return tr[i].tS })
	for _, c := range trendColumns {
		dst = appendArray(appendKey(dst, c.key, false), len(tr), c.prec, func(i int) float64 { return float64(c.get(&tr[i])) })
	}
	dst = append(dst, '}')

	dst = append(appendKey(dst, "events", false), '[')
	n := 0
	s.events.each(d.events.from, d.events.upto, func(ev *alerts.Event) {
		if n > 0 {
			dst = append(dst, ',')
		}
		dst = appendEvent(dst, ev)
		n++
	})
	return append(dst, ']', '}')
}

// trendColumns are the trend series, in the names of the breath record.
var trendColumns = []struct {
	key  string
	prec int
	get  func(*trendPoint) float32
}{
	{"peepi_cmh2o", 2, func(p *trendPoint) float32 { return p.peepiCmH2O }},
	{"trapped_ml", 1, func(p *trendPoint) float32 { return p.trappedML }},
	{"r_cmh2o_s_per_l", 2, func(p *trendPoint) float32 { return p.rCmH2OSPerL }},
	{"c_ml_per_cmh2o", 2, func(p *trendPoint) float32 { return p.cMLPerCmH2O }},
	{"pip_cmh2o", 2, func(p *trendPoint) float32 { return p.peakCmH2O }},
	{"pplat_cmh2o", 2, func(p *trendPoint) float32 { return p.plateauCmH2O }},
}

// frameHead writes the start of a frame: the hub's wall time and whether
// the frame is a snapshot.
func frameHead(dst []byte, now time.Time, full bool) []byte {
	dst = strconv.AppendInt(appendKey(append(dst, '{'), "now_ms", true), now.UnixMilli(), 10)
	return append(appendKey(dst, "full", false), strconv.FormatBool(full)...)
}
