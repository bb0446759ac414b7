// Package daemon is the trapline process: the command line (cobra), logging,
// and the wiring of ingest → analyze → alerts for many streams under one
// context, with supervision, clean shutdown, the embedded NATS server, and
// health and metrics over HTTP.
//
// daemon owns the goroutines; the packages it wires take a context and return
// when it is cancelled. Nothing imports daemon.
package daemon
