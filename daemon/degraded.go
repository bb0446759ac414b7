package daemon

import (
	"context"
	"strconv"
	"time"

	"github.com/rs/zerolog"

	"trapline/alerts"
)

// CondDeliveryImpaired is the technical alarm a stream raises when its
// alert events cannot all be made durable (spool full, disk full, an
// oversized event): analysis and breath records go on, but consumers may
// miss alerts until it clears.
const CondDeliveryImpaired = "alert-delivery-impaired"

// spoolPressure is implemented by an alert sink that can tell how full its
// spool is (0 empty, 1 full).
type spoolPressure interface {
	Pressure() float64
}

// impairment is a stream's delivery-impaired episode; touched by the
// analysis goroutine only.
type impairment struct {
	id       string  // open alarm id, "" when none
	refused  int     // events refused in this episode
	lastTS   float64 // latest t_s of the stream's events, for the alarm's own
	lastIDms int64
}

// deliver hands one alert event to the durable publisher. A refusal never
// stops the stream: it is counted, logged once per episode, and raises the
// delivery-impaired alarm.
func (s *stream) deliver(ctx context.Context, ev alerts.Event) bool {
	s.imp.lastTS = max(s.imp.lastTS, ev.TS)
	err := s.alerts.Publish(ctx, ev)
	if err == nil {
		s.countHigh(&ev)
		return true
	}
	s.m.alertsRefused.WithLabelValues(s.spec.ID).Inc()
	s.imp.refused++
	if s.imp.id == "" {
		s.log.Error().Err(err).Str("alert", ev.DedupID()).
			Msg("alert delivery impaired: an alert event could not be spooled; analysis goes on, refusals are counted (trapline_alerts_refused_total)")
	}
	s.impaired(ctx, time.Now(), "alert events refused: "+err.Error())
	return false
}

func (s *stream) countHigh(ev *alerts.Event) {
	if ev.Priority == alerts.High {
		s.m.alertsHigh.WithLabelValues(s.spec.ID).Inc()
	}
}

// impaired raises the delivery-impaired alarm if it is not open.
func (s *stream) impaired(ctx context.Context, now time.Time, why string) {
	if s.imp.id != "" {
		return
	}
	ms := max(now.UnixMilli(), s.imp.lastIDms+1)
	id := s.spec.ID + "/" + CondDeliveryImpaired + "/" + strconv.FormatInt(ms, 10)
	ev := s.impairedEvent(id, alerts.Raised, now, "alert delivery impaired ("+why+"); analysis continues, some alert events may not reach consumers")
	// In the ledger before the spool: the checkpoint does not hold this
	// alarm, and the next start must end it if a kill leaves it open.
	s.recordAlarm(true, ev)
	if err := s.alerts.Publish(ctx, ev); err != nil {
		// The spool takes nothing, not even this: the log and the counter
		// say it, and the ledger forgets an alarm that never went out.
		s.recordAlarm(false, endedEvent(ev, now))
		return
	}
	s.countHigh(&ev)
	s.imp.id, s.imp.lastIDms = id, ms
}

// recovered clears the delivery-impaired alarm, if open, with reason; it
// reports whether the clear was delivered.
func (s *stream) recovered(ctx context.Context, now time.Time, st alerts.State, msg string) {
	if s.imp.id == "" {
		return
	}
	ev := s.impairedEvent(s.imp.id, st, now, msg)
	if st == alerts.Ended {
		ev.Reason = msg
	}
	if err := s.alerts.Publish(ctx, ev); err != nil {
		return // try again at the next tick
	}
	s.recordAlarm(false, ev)
	s.countHigh(&ev)
	s.log.Warn().Int("refused", s.imp.refused).Msg("alert delivery no longer impaired")
	s.imp.id, s.imp.refused = "", 0
}

// recordAlarm records evs in the daemon's alarm ledger, when there is one.
func (s *stream) recordAlarm(sync bool, evs ...alerts.Event) {
	s.spec.Ledger.keep(s.log, s.m, sync, evs...)
}

func (s *stream) impairedEvent(id string, st alerts.State, now time.Time, msg string) alerts.Event {
	return alerts.Event{
		Type: "alert", Schema: alerts.EventSchema, ID: id, Stream: s.spec.ID,
		Condition: CondDeliveryImpaired, Class: "technical", Priority: alerts.High, State: st,
		Time: now.UTC(), TS: s.imp.lastTS, Evidence: map[string]float64{"refused": float64(s.imp.refused)},
		Message: msg,
	}
}

// checkDelivery runs on every tick: a full spool (where new events evict
// older ones or are refused) raises the delivery-impaired alarm, and a
// spool back under half full clears it.
func (s *stream) checkDelivery(ctx context.Context, now time.Time) {
	p, ok := s.alerts.(spoolPressure)
	if !ok {
		return
	}
	switch v := p.Pressure(); {
	case v >= 1:
		s.impaired(ctx, now, "spool full")
	case v < 0.5:
		s.recovered(ctx, now, alerts.Cleared, "alert delivery restored: the spool is draining")
	}
}

// CondIDPreempted is the technical event of an alert event that JetStream
// dropped because another client had already stored a message under its
// de-duplication id (a forgery, or a misconfigured second publisher).
const CondIDPreempted = "alert-id-preempted"

// preempted publishes the CondIDPreempted event for ev: high priority,
// already terminal (nothing to clear), naming the id that was taken.
func preempted(pub *alerts.Publisher, ev alerts.Event, log zerolog.Logger) {
	now := time.Now().UTC()
	out := alerts.Event{
		Type: "alert", Schema: alerts.EventSchema,
		ID:     ev.Stream + "/" + CondIDPreempted + "/" + strconv.FormatInt(now.UnixMilli(), 10),
		Stream: ev.Stream, Condition: CondIDPreempted, Class: "technical", Priority: alerts.High,
		State: alerts.Ended, Time: now, TS: ev.TS, Evidence: map[string]float64{},
		Message: "alert " + ev.DedupID() + " was dropped by JetStream: another client had published under its id; " +
			"check who may publish on the alert subjects",
		Reason: "foreign publish",
	}
	if err := pub.Publish(context.Background(), out); err != nil {
		log.Error().Err(err).Str("id", ev.DedupID()).Msg("could not raise the alert-id-preempted event")
	}
}
