// Package alerts turns detector findings into alarm conditions with a
// lifecycle (condition delay, IEC 60601-1-8 priority, escalation, clearing
// with hysteresis, latching, acknowledgement) and delivers the resulting
// alert events without losing any: JetStream publishing with de-duplication
// ids and a local append-only spool across outages and restarts.
//
// It may import analyze and ingest; it must not import daemon.
package alerts
