// Package ingest turns bytes from the outside world (serial ports, sockets,
// files, stdin, NATS) into timestamped pressure and flow samples per stream.
//
// It owns the codecs (the sample line format v1 and the binary framing) and
// the sources. It knows nothing of breaths or alarms: it must not import
// analyze, alerts or daemon.
//
// Reading a whole file or stdin (trapline analyze):
//
//	d, err := ingest.NewDecoder(ingest.FormatText, ingest.DecoderOptions{Stream: "bench-a"},
//		func(stream string, s ingest.Sample) { ... })
//	err = ingest.Decode(r, d) // d.Stats() counts bad lines
//
// Reading a live source (the daemon):
//
//	src, err := ingest.Open("serial:///dev/ttyUSB0?baud=115200", ingest.Options{Stream: "bed-4", Log: &log})
//	err = src.Run(ctx, func(ev ingest.Event) { ... }) // samples, gaps, disconnections
//
// Reading a link that carries many streams on the reading goroutine:
// BatchDecoder fills a reused Batch with samples and their stream indexes,
// and a Router (a Demux and an Admission of stream templates) hands each
// admitted stream its samples once per batch. Whole files on several cores:
// the offline subpackage.
//
// Writing samples (simulator, tests, the scale-out edge): NewTextEncoder and
// NewBinaryEncoder. docs/framing.md describes both wire
// formats byte by byte; docs/sources.md every source URL and its behaviour
// on failure.
package ingest
