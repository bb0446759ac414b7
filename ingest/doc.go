// Package ingest turns bytes from the outside world (serial ports, sockets,
// files, stdin, NATS) into timestamped pressure and flow samples per stream.
//
// It owns the codecs (the sample line format v1 and the binary framing) and
// the sources. It knows nothing of breaths or alarms: it must not import
// analyze, alerts or daemon.
package ingest
