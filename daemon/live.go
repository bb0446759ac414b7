package daemon

import (
	"context"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/daemon/bus"
	"trapline/daemon/web"
	"trapline/ingest"
)

// viewSink is the live view's side of a stream's outputs: samples, breaths,
// alert events and source conditions. Its methods never block (the hub
// takes a short lock and copies), so analysis never waits for a page.
type viewSink interface {
	Samples(stream string, ss []ingest.Sample)
	Breath(b analyze.Breath)
	Alert(ev alerts.Event)
	Status(stream string, st ingest.Status)
}

var _ viewSink = (*web.Hub)(nil)

// startLiveView makes the live view's hub and mounts its page at web.Path
// on the HTTP server, beside /metrics. Acknowledgements from the page go
// through acks, the process's one acknowledgement service.
func (d *Daemon) startLiveView(h *httpServer, acks *bus.AckService) *web.Hub {
	hub := web.NewHub(web.DefaultHubConfig())
	web.Mount(h.mux, web.NewHandler(hub, pageAcker{svc: acks, d: d}))
	d.hub = hub
	return hub
}

// pageAcker lets the page acknowledge through the acknowledgement service.
type pageAcker struct {
	svc *bus.AckService
	d   *Daemon
}

// Ack hands the page's request to the service, with the same checks and
// permissions as a request over NATS.
func (p pageAcker) Ack(ctx context.Context, stream, id, by, note string) (web.AckResult, error) {
	err := p.svc.Request(ctx, stream, bus.AckRequest{ID: id, By: by})
	if err == nil && note != "" {
		p.d.log.Info().Str("stream", stream).Str("id", id).Str("note", note).Msg("acknowledgement note from the live view")
	}
	return web.AckResult{}, err
}

// view returns the live view sink for a new stream, or nil when the HTTP
// server (and with it the live view) is off.
func (d *Daemon) view() viewSink {
	if d.hub == nil {
		return nil
	}
	return d.hub
}
