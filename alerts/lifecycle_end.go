package alerts

import (
	"math"
	"strconv"
	"time"
)

// CondMonitoringGap is the technical event that marks an interval during
// which a stream was not analysed (the daemon was stopped or killed). It is
// one event, already terminal (state Ended): nothing to acknowledge.
const CondMonitoringGap = "monitoring-gap"

// EndAll closes every current alarm (active or latched) with an Ended
// event carrying reason, at wall time wall and stream time tS (never
// earlier than the alarm's last event, so t_s stays monotonic per
// condition). The conditions start afresh: a condition still present is
// raised again under a new id once its delay passes.
func (l *Lifecycle) EndAll(wall time.Time, tS float64, reason string) []Event {
	var out []Event
	for _, c := range l.order {
		a := l.conds[c]
		if a.phase != active && a.phase != latched {
			continue
		}
		f := a.last
		f.TimeS = math.Max(finiteOr0(tS), a.lastOut.TS)
		f.BreathSeq = -1
		e := l.event(a, &f, wall, Ended, reason+": "+a.last.Message)
		e.Reason = reason
		a.lastOut = e
		out = append(out, e)
		a.phase, a.presentN, a.absentN, a.acked = inactive, 0, 0, false
	}
	return out
}

// GapEvent is the technical event of an unmonitored interval of stream from
// wall time from to wall time to, at stream time tS.
func GapEvent(stream string, from, to time.Time, tS float64) Event {
	from, to = from.UTC(), to.UTC()
	return Event{
		Type: "alert", Schema: EventSchema,
		ID:        stream + "/" + CondMonitoringGap + "/" + strconv.FormatInt(to.UnixMilli(), 10),
		Stream:    stream,
		Condition: CondMonitoringGap, Class: "technical", Priority: Low, State: Ended,
		Time: to, TS: finiteOr0(tS),
		Evidence: map[string]float64{"gap_s": math.Round(to.Sub(from).Seconds()*1000) / 1000},
		Message:  "not monitored from " + from.Format(time.RFC3339Nano) + " to " + to.Format(time.RFC3339Nano),
		Reason:   ReasonInterrupted, GapFrom: &from, GapTo: &to,
	}
}
