package ingest

import (
	"fmt"
	"strings"

	"github.com/nats-io/nats.go"
)

// SamplesSubject returns the subject that carries the raw samples of a
// stream for scale-out: "<prefix>.samples.<stream>" ("trapline" when prefix
// is empty).
func SamplesSubject(prefix, stream string) string {
	if prefix == "" {
		prefix = "trapline"
	}
	return prefix + ".samples." + stream
}

// NATSSink returns a Sink that publishes every batch of samples it receives
// as binary frames on SamplesSubject(prefix, stream): an edge ingester runs
// a source into it, and analysis workers read the subjects with a nats:
// source. Status events are not forwarded (the workers detect gaps from the
// frames' counters). Publish errors go to onErr, which may be nil.
func NATSSink(nc *nats.Conn, prefix string, opts BinaryEncoderOptions, onErr func(error)) (Sink, error) {
	if nc == nil {
		return nil, fmt.Errorf("nats sink: no connection")
	}
	if strings.ContainsAny(prefix, " \t*>") || strings.HasSuffix(prefix, ".") || strings.HasPrefix(prefix, ".") {
		return nil, fmt.Errorf("nats sink: prefix %q is not a valid subject prefix", prefix)
	}
	enc, err := NewBinaryEncoder(opts)
	if err != nil {
		return nil, fmt.Errorf("nats sink: %w", err)
	}
	var buf []byte
	return func(ev Event) {
		if len(ev.Samples) == 0 || !ValidStreamID(ev.Stream) {
			return
		}
		buf = enc.AppendFrame(buf[:0], ev.Stream, ev.Samples)
		if err := nc.Publish(SamplesSubject(prefix, ev.Stream), buf); err != nil && onErr != nil {
			onErr(fmt.Errorf("publish %s: %w", SamplesSubject(prefix, ev.Stream), err))
		}
	}, nil
}
