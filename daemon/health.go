package daemon

import (
	"context"
	"errors"
	"fmt"
	"net"
	"net/http"
	"net/http/pprof"
	"sort"
	"strings"
	"sync"
	"syscall"
	"time"

	"github.com/prometheus/client_golang/prometheus/promhttp"
	"github.com/rs/zerolog"

	"trapline/daemon/bus"
)

// ErrPortInUse is returned when a listen address is already taken by another
// process (often a second trapline, or the embedded NATS of one). It is the
// error value of bus.ErrPortInUse.
var ErrPortInUse = bus.ErrPortInUse

// listenTCP listens on addr and turns "address already in use" into a
// message that names the address and the setting to change.
func listenTCP(addr, setting string) (net.Listener, error) {
	ln, err := net.Listen("tcp", addr)
	if err != nil {
		if errors.Is(err, syscall.EADDRINUSE) {
			return nil, fmt.Errorf("listen on %s: %w: another process (perhaps another trapline) holds the port; stop it or change %s", addr, ErrPortInUse, setting)
		}
		return nil, fmt.Errorf("listen on %s (%s): %w", addr, setting, err)
	}
	return ln, nil
}

// readiness collects the named checks behind /readyz. A check returns nil
// when its part is ready, or an error saying why not.
type readiness struct {
	mu     sync.Mutex
	checks map[string]func() error
}

func newReadiness() *readiness {
	return &readiness{checks: map[string]func() error{}}
}

// set adds or replaces a check.
func (r *readiness) set(name string, check func() error) {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.checks[name] = check
}

// problems runs every check and returns the failures, sorted by name so that
// the report is stable.
func (r *readiness) problems() []string {
	r.mu.Lock()
	names := make([]string, 0, len(r.checks))
	checks := make([]func() error, 0, len(r.checks))
	for n := range r.checks {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, n := range names {
		checks = append(checks, r.checks[n])
	}
	r.mu.Unlock()
	var out []string
	for i, c := range checks {
		if err := c(); err != nil {
			out = append(out, names[i]+": "+err.Error())
		}
	}
	return out
}

// httpServer serves /healthz, /readyz and /metrics.
type httpServer struct {
	ln    net.Listener
	srv   *http.Server
	log   zerolog.Logger
	ready *readiness
	mux   *http.ServeMux // where the live view is mounted
}

// newHTTPServer listens at once, so that a port in use fails the start of
// the daemon with a clear message instead of a log line later. profiles
// also serves the runtime's profiles (http.pprof).
func newHTTPServer(addr string, profiles bool, m *metrics, ready *readiness, log zerolog.Logger) (*httpServer, error) {
	ln, err := listenTCP(addr, "http.listen")
	if err != nil {
		return nil, fmt.Errorf("http: %w", err)
	}
	h := &httpServer{ln: ln, log: log, ready: ready}
	mux := http.NewServeMux()
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, _ *http.Request) {
		// Alive means the process serves requests; readiness is /readyz.
		w.Header().Set("Content-Type", "text/plain; charset=utf-8")
		fmt.Fprintln(w, "ok")
	})
	mux.HandleFunc("GET /readyz", h.readyz)
	mux.Handle("GET /metrics", promhttp.HandlerFor(m.reg, promhttp.HandlerOpts{Registry: m.reg}))
	h.mux = mux
	if profiles {
		h.mountProfiles()
	}
	h.srv = &http.Server{Handler: mux, ReadHeaderTimeout: 5 * time.Second}
	return h, nil
}

// mountProfiles serves the Go runtime's profiles under /debug/pprof/
// (http.pprof).
func (h *httpServer) mountProfiles() {
	h.mux.HandleFunc("GET /debug/pprof/", pprof.Index)
	h.mux.HandleFunc("GET /debug/pprof/profile", pprof.Profile)
	h.mux.HandleFunc("GET /debug/pprof/symbol", pprof.Symbol)
	h.mux.HandleFunc("GET /debug/pprof/trace", pprof.Trace)
}

func (h *httpServer) readyz(w http.ResponseWriter, _ *http.Request) {
	w.Header().Set("Content-Type", "text/plain; charset=utf-8")
	if p := h.ready.problems(); len(p) > 0 {
		w.WriteHeader(http.StatusServiceUnavailable)
		fmt.Fprintln(w, "not ready")
		fmt.Fprintln(w, strings.Join(p, "\n"))
		return
	}
	fmt.Fprintln(w, "ready")
}

// Addr is the address the server listens on (useful with port 0).
func (h *httpServer) Addr() string { return h.ln.Addr().String() }

// Run serves until ctx is cancelled, then shuts down within a second.
func (h *httpServer) Run(ctx context.Context) error {
	errc := make(chan error, 1)
	go func() { errc <- h.srv.Serve(h.ln) }()
	select {
	case err := <-errc:
		return fmt.Errorf("http: %w", err)
	case <-ctx.Done():
	}
	sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), time.Second)
	defer cancel()
	if err := h.srv.Shutdown(sctx); err != nil {
		h.srv.Close()
	}
	<-errc
	return nil
}

// ready reports why the stream is not ready, or nil.
func (s *stream) ready() error {
	switch {
	case s.finished.Load():
		return nil
	case !s.up.Load():
		if e := s.lastErr.Load(); e != nil {
			return fmt.Errorf("pipeline restarting after: %s", *e)
		}
		return errors.New("pipeline not running")
	case !s.connected.Load():
		return errors.New("source not connected")
	}
	return nil
}
