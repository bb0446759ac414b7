package daemon

import "trapline/ingest"

// acceptsStream is the one check of a batch's stream id: a source
// configured for one stream takes samples of that stream (or without an
// id) only. Samples of another stream are refused and counted, with one
// warning per stream id, rather than analysed as if they were this
// patient's. Called from the source goroutine.
func (s *stream) acceptsStream(ev *ingest.Event) bool {
	if ev.Stream == "" || ev.Stream == s.spec.ID || ev.Stream == s.spec.SourceStream || len(ev.Samples) == 0 {
		return true
	}
	s.m.foreignStream.WithLabelValues(s.spec.ID).Add(float64(len(ev.Samples)))
	if s.foreignSeen == nil {
		s.foreignSeen = map[string]bool{}
	}
	if !s.foreignSeen[ev.Stream] && len(s.foreignSeen) < 64 {
		s.foreignSeen[ev.Stream] = true
		s.log.Warn().Str("other_stream", ev.Stream).
			Msg("samples of another stream on this stream's source: refused and counted (trapline_foreign_stream_samples_total)")
	}
	return false
}
