// Package analyze splits a stream of pressure and flow samples into breaths,
// computes per-breath metrics and respiratory mechanics, and runs the
// detectors that turn breath records into findings.
//
// It is pure computation: no goroutines, no I/O and no wall clock. Time comes
// from the sample time stamps, so every result is a deterministic function of
// the input and tests need no sleeps. It may import ingest for the Sample
// type; it must not import alerts or daemon.
package analyze
