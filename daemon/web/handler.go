package web

import (
	"context"
	"embed"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"mime"
	"net/http"
	"net/url"
	"strings"
	"time"

	"trapline/alerts"
)

// Path is where the daemon mounts the live view on its HTTP server (see
// Mount). The page and its assets use relative addresses, so the handler
// works under any prefix that is stripped before it.
const Path = "/live/"

//go:embed assets
var assets embed.FS

// Acker acknowledges an alarm on behalf of the page. The daemon implements
// it with the same service that answers acknowledgement requests over NATS,
// so the same checks and permissions apply; the acknowledged event then
// reaches the page like every other event, through Hub.Alert.
type Acker interface {
	// Ack acknowledges the current alarm id of stream. by names who
	// acknowledged (may be empty); note is a free comment (may be empty),
	// for the service's log. An error says why the service refused (for
	// example alerts.ErrUnknownAlert); the page shows it.
	Ack(ctx context.Context, stream, id, by, note string) (AckResult, error)
}

// AckResult is what the acknowledgement produced.
type AckResult struct {
	// Events are the alert events the acknowledgement caused
	// ("acknowledged", and "cleared" for a latched alarm), when the service
	// reports them; empty otherwise. Either way the events reach the page
	// through Hub.Alert like every other event.
	Events []alerts.Event
}

// Limits of an acknowledgement request from the page.
const (
	maxAckBody  = 4 << 10
	maxAckID    = 256
	maxAckBy    = 64
	maxAckNote  = 256
	ackTimeout  = 5 * time.Second
	writeWindow = 10 * time.Second // a page that takes longer to take one frame is dropped
)

// ackRequest is the body of POST ack.
type ackRequest struct {
	Stream string `json:"stream"`
	ID     string `json:"id"`
	By     string `json:"by"`
	Note   string `json:"note"`
}

// ackReply is the answer to POST ack.
type ackReply struct {
	OK     bool     `json:"ok"`
	Error  string   `json:"error,omitempty"`
	States []string `json:"states,omitempty"`
}

// handler serves the page, its assets, the event stream and the
// acknowledgement endpoint.
type handler struct {
	hub   *Hub
	acker Acker
	files http.Handler
}

// NewHandler returns the live view's handler, serving paths relative to
// where it is mounted:
//
//	GET  /           the page
//	GET  /assets/... its script, style sheet and the vendored chart library
//	GET  /events     the Server-Sent Events stream (?stream=<id> picks the
//	                 stream whose details the page shows)
//	POST /ack        acknowledge: {"stream","id","by","note"} as JSON
//
// acker may be nil: then the page shows no acknowledge buttons and /ack
// answers 501.
func NewHandler(hub *Hub, acker Acker) http.Handler {
	return &handler{hub: hub, acker: acker, files: http.FileServerFS(assets)}
}

// Mount registers h at Path on mux (the daemon's loopback HTTP server,
// beside /metrics).
func Mount(mux *http.ServeMux, h http.Handler) {
	mux.Handle(Path, http.StripPrefix(strings.TrimSuffix(Path, "/"), h))
}

func (h *handler) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	hd := w.Header()
	hd.Set("X-Content-Type-Options", "nosniff")
	hd.Set("Referrer-Policy", "no-referrer")
	hd.Set("Content-Security-Policy", "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; frame-ancestors 'none'; base-uri 'none'; form-action 'none'")
	switch {
	case r.URL.Path == "/" || r.URL.Path == "":
		h.page(w, r)
	case r.URL.Path == "/events":
		h.events(w, r)
	case r.URL.Path == "/ack":
		h.ack(w, r)
	case strings.HasPrefix(r.URL.Path, "/assets/"):
		if r.Method != http.MethodGet && r.Method != http.MethodHead {
			http.Error(w, "method not allowed", http.StatusMethodNotAllowed)
			return
		}
		h.files.ServeHTTP(w, r) // the embedded tree starts at assets/
	default:
		http.NotFound(w, r)
	}
}

func (h *handler) page(w http.ResponseWriter, r *http.Request) {
	if r.Method != http.MethodGet && r.Method != http.MethodHead {
		http.Error(w, "method not allowed", http.StatusMethodNotAllowed)
		return
	}
	b, err := assets.ReadFile("assets/index.html")
	if err != nil {
		http.Error(w, "page missing", http.StatusInternalServerError)
		return
	}
	if h.acker == nil {
		b = []byte(strings.Replace(string(b), `data-ack="on"`, `data-ack="off"`, 1))
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.Header().Set("Cache-Control", "no-store")
	_, _ = w.Write(b)
}

func (h *handler) events(w http.ResponseWriter, r *http.Request) {
	if r.Method != http.MethodGet {
		http.Error(w, "method not allowed", http.StatusMethodNotAllowed)
		return
	}
	c, err := h.hub.register(r.URL.Query().Get("stream"))
	if err != nil {
		http.Error(w, err.Error(), http.StatusServiceUnavailable)
		return
	}
	defer h.hub.unregister(c)
	rc := http.NewResponseController(w)
	hd := w.Header()
	hd.Set("Content-Type", "text/event-stream")
	hd.Set("Cache-Control", "no-store")
	hd.Set("X-Accel-Buffering", "no")
	write := func(b []byte) error {
		// A deadline per frame: the server's own WriteTimeout would end
		// the stream, and a page that stops reading must not hold the
		// goroutine for ever. Not every writer supports it.
		if err := rc.SetWriteDeadline(time.Now().Add(writeWindow)); err != nil && !errors.Is(err, http.ErrNotSupported) {
			return err
		}
		if _, err := w.Write(b); err != nil {
			return err
		}
		return rc.Flush()
	}
	if write([]byte("retry: 2000\n\n")) != nil {
		return
	}
	h.hub.serveEvents(r.Context(), write, c)
}

// sameOrigin refuses a request sent by a page of another origin: a browser
// sends Origin with every POST, and the live view's own page has the
// server's host.
func sameOrigin(r *http.Request) bool {
	o := r.Header.Get("Origin")
	if o == "" {
		return r.Header.Get("Sec-Fetch-Site") == "" || r.Header.Get("Sec-Fetch-Site") == "same-origin"
	}
	u, err := url.Parse(o)
	return err == nil && u.Host == r.Host
}

func (h *handler) ack(w http.ResponseWriter, r *http.Request) {
	reply := func(code int, rep ackReply) {
		w.Header().Set("Content-Type", "application/json")
		w.Header().Set("Cache-Control", "no-store")
		w.WriteHeader(code)
		_ = json.NewEncoder(w).Encode(rep)
	}
	fail := func(code int, format string, args ...any) {
		reply(code, ackReply{Error: fmt.Sprintf(format, args...)})
	}
	switch {
	case r.Method != http.MethodPost:
		w.Header().Set("Allow", http.MethodPost)
		fail(http.StatusMethodNotAllowed, "use POST")
		return
	case h.acker == nil:
		fail(http.StatusNotImplemented, "acknowledgement is not available here")
		return
	case !sameOrigin(r):
		fail(http.StatusForbidden, "cross-origin request refused")
		return
	}
	if mt, _, err := mime.ParseMediaType(r.Header.Get("Content-Type")); err != nil || mt != "application/json" {
		fail(http.StatusUnsupportedMediaType, "want Content-Type application/json")
		return
	}
	req, err := decodeAck(io.LimitReader(r.Body, maxAckBody+1))
	if err != nil {
		fail(http.StatusBadRequest, "%v", err)
		return
	}
	if h.hub.lookup(req.Stream) == nil {
		fail(http.StatusNotFound, "no stream %q here", req.Stream)
		return
	}
	ctx, cancel := context.WithTimeout(r.Context(), ackTimeout)
	defer cancel()
	res, err := h.acker.Ack(ctx, req.Stream, req.ID, req.By, req.Note)
	if err != nil {
		fail(http.StatusConflict, "acknowledge %s: %v", req.ID, err)
		return
	}
	rep := ackReply{OK: true}
	for _, ev := range res.Events {
		rep.States = append(rep.States, string(ev.State))
	}
	reply(http.StatusOK, rep)
}

// decodeAck reads and checks an acknowledgement request.
func decodeAck(body io.Reader) (ackRequest, error) {
	var req ackRequest
	b, err := io.ReadAll(body)
	if err != nil {
		return req, fmt.Errorf("read ack request: %w", err)
	}
	if len(b) > maxAckBody {
		return req, fmt.Errorf("ack request over %d bytes", maxAckBody)
	}
	dec := json.NewDecoder(strings.NewReader(string(b)))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&req); err != nil {
		return req, fmt.Errorf("bad ack request: %v (want {\"stream\",\"id\",\"by\",\"note\"})", err)
	}
	switch {
	case req.Stream == "" || req.ID == "":
		return req, errors.New("bad ack request: stream and id are required")
	case len(req.ID) > maxAckID, len(req.By) > maxAckBy, len(req.Note) > maxAckNote:
		return req, fmt.Errorf("bad ack request: id, by or note too long (at most %d, %d, %d bytes)", maxAckID, maxAckBy, maxAckNote)
	}
	return req, nil
}
