package ingest

import (
	"errors"
	"fmt"
	"math"
	"net"
	"net/url"
	"slices"
	"strconv"
	"strings"
)

// Schemes lists the source URL schemes, in the order error messages give them.
var Schemes = []string{"serial", "tcp", "tcp-listen", "udp", "file", "stdin", "nats"}

// ErrBadURL is wrapped by every error of ParseURL.
var ErrBadURL = errors.New("bad source URL")

// Spec is a parsed source URL (docs/sources.md lists every form).
type Spec struct {
	// Scheme is one of Schemes.
	Scheme string
	// Address is the device path (serial), host:port (tcp, tcp-listen,
	// udp), file path (file) or subject (nats); empty for stdin.
	Address string
	// Format is the wire format (query "format"); empty when the URL gives
	// none, and then Options.Format decides (text, or binary for nats).
	Format Format
	// RateHz is the declared sample rate (query "rate"), 0 when not given.
	RateHz float64
	// Stream is the default stream id (query "stream"), empty when not given.
	Stream string
	// Columns is the text layout without header (query "columns").
	Columns string
	// Baud is the serial speed (query "baud", default 115200).
	Baud int
	// Realtime paces a file at the speed of its time stamps (query
	// "pace=realtime"); the default "max" reads as fast as the sink takes.
	Realtime bool
	// Speed multiplies the realtime pace (query "speed", default 1).
	Speed float64
	// PerClient gives each client of tcp-listen its own default stream
	// "<stream>-<n>" (query "streams=per-client"); the default
	// "streams=column" takes the stream column or the default stream.
	PerClient bool
	// MaxClients bounds the clients of tcp-listen (query "max-clients",
	// default 16).
	MaxClients int
}

// params lists the query parameters each scheme accepts besides the common
// format, rate, stream and columns.
var params = map[string][]string{
	"serial":     {"baud"},
	"tcp":        {},
	"tcp-listen": {"streams", "max-clients"},
	"udp":        {},
	"file":       {"pace", "speed"},
	"stdin":      {},
	"nats":       {},
}

var commonParams = []string{"format", "rate", "stream", "columns"}

func badURL(format string, args ...any) error {
	return fmt.Errorf("%w: %s", ErrBadURL, fmt.Sprintf(format, args...))
}

// ParseURL parses and checks a source URL such as
// "serial:///dev/ttyUSB0?baud=115200&format=binary" or "tcp://10.0.0.7:4001".
// Its errors are meant for a person editing a configuration file, e.g.
// `unknown scheme "tpc" (want serial, tcp, tcp-listen, udp, file, stdin, nats)`.
func ParseURL(raw string) (Spec, error) {
	raw = strings.TrimSpace(raw)
	if raw == "" {
		return Spec{}, badURL("empty source (want one of %s)", strings.Join(Schemes, ", "))
	}
	rest, query, _ := strings.Cut(raw, "?")
	scheme, addr, ok := strings.Cut(rest, ":")
	if !ok {
		scheme, addr = rest, ""
	}
	if rest == "-" {
		scheme = "stdin"
	}
	scheme = strings.ToLower(scheme)
	if !slices.Contains(Schemes, scheme) {
		if !ok && rest != "stdin" {
			return Spec{}, badURL("%q has no scheme (want %s, e.g. file://%s)", raw, strings.Join(Schemes, ", "), rest)
		}
		return Spec{}, badURL("unknown scheme %q (want %s)", scheme, strings.Join(Schemes, ", "))
	}
	s := Spec{Scheme: scheme, Baud: 115200, Speed: 1, MaxClients: 16}
	q, err := url.ParseQuery(query)
	if err != nil {
		return Spec{}, badURL("query %q: %v", query, err)
	}
	if err := s.setParams(q); err != nil {
		return Spec{}, err
	}
	// Addresses: "//host:port", "///abs/path", "//rel/path" or "path".
	switch scheme {
	case "stdin":
		if a := strings.TrimLeft(addr, "/"); a != "" {
			return Spec{}, badURL("stdin takes no address, got %q", a)
		}
	case "serial", "file":
		p := strings.TrimPrefix(addr, "//")
		up, err := url.PathUnescape(p)
		if err != nil || up == "" {
			return Spec{}, badURL("%s needs a path, e.g. %s", scheme, map[string]string{
				"serial": "serial:///dev/ttyUSB0", "file": "file:///data/bench.csv"}[scheme])
		}
		s.Address = up
	case "tcp", "tcp-listen", "udp":
		hp := strings.TrimPrefix(addr, "//")
		hp = strings.TrimSuffix(hp, "/")
		host, port, err := net.SplitHostPort(hp)
		if err != nil {
			return Spec{}, badURL("%s address %q: want host:port, e.g. %s://127.0.0.1:4001", scheme, hp, scheme)
		}
		n, err := strconv.Atoi(port)
		if err != nil || n < 0 || n > 65535 || n == 0 && scheme == "tcp" {
			return Spec{}, badURL("%s port %q: want 1 to 65535", scheme, port)
		}
		if host == "" {
			if scheme == "tcp" {
				return Spec{}, badURL("tcp address %q: want host:port", hp)
			}
			host = "127.0.0.1" // listeners stay on loopback unless told otherwise
		}
		s.Address = net.JoinHostPort(host, port)
	case "nats":
		subj := strings.TrimPrefix(addr, "//")
		if err := checkSubject(subj); err != nil {
			return Spec{}, err
		}
		s.Address = subj
	}
	return s, nil
}

func checkSubject(subj string) error {
	if subj == "" {
		return badURL("nats needs a subject, e.g. nats:trapline.samples.bed-1 or nats:trapline.samples.*")
	}
	toks := strings.Split(subj, ".")
	for i, t := range toks {
		if t == "" || strings.ContainsAny(t, " \t\r\n") || t == ">" && i != len(toks)-1 ||
			len(t) > 1 && strings.ContainsAny(t, "*>") {
			return badURL("nats subject %q: token %d %q is not valid", subj, i+1, t)
		}
	}
	return nil
}

func (s *Spec) setParams(q url.Values) error {
	allowed := append(slices.Clone(commonParams), params[s.Scheme]...)
	for k, v := range q {
		if !slices.Contains(allowed, k) {
			return badURL("unknown parameter %q for %s (want %s)", k, s.Scheme, strings.Join(allowed, ", "))
		}
		if len(v) != 1 {
			return badURL("parameter %q given %d times", k, len(v))
		}
	}
	var err error
	if v, ok := q["format"]; ok {
		if s.Format, err = ParseFormat(v[0]); err != nil || v[0] == "" {
			return badURL("format %q: want text or binary", v[0])
		}
	}
	if v := q.Get("rate"); v != "" {
		r, err := strconv.ParseFloat(v, 64)
		if err != nil || !(r > 0) || math.IsInf(r, 0) || r > 1e6 {
			return badURL("rate %q: want a sample rate in Hz above 0 and up to 1e6", v)
		}
		s.RateHz = r
	}
	if v := q.Get("stream"); v != "" {
		if !ValidStreamID(v) {
			return badURL("stream %q: want 1 to %d letters, digits, '-' or '_'", v, maxStreamID)
		}
		s.Stream = v
	}
	if v := q.Get("columns"); v != "" {
		if _, _, err := parseLayout([]byte(v), 1); err != nil {
			return badURL("columns %q: %v", v, err)
		}
		s.Columns = v
	}
	if v := q.Get("baud"); v != "" {
		b, err := strconv.Atoi(v)
		if err != nil || b < 50 || b > 20_000_000 {
			return badURL("baud %q: want 50 to 20000000", v)
		}
		s.Baud = b
	}
	switch v := q.Get("pace"); v {
	case "", "max":
	case "realtime":
		s.Realtime = true
	default:
		return badURL("pace %q: want realtime or max", v)
	}
	if v := q.Get("speed"); v != "" {
		f, err := strconv.ParseFloat(v, 64)
		if err != nil || !(f >= 0.01 && f <= 1000) {
			return badURL("speed %q: want 0.01 to 1000", v)
		}
		s.Speed = f
	}
	switch v := q.Get("streams"); v {
	case "", "column":
	case "per-client":
		s.PerClient = true
	default:
		return badURL("streams %q: want column or per-client", v)
	}
	if v := q.Get("max-clients"); v != "" {
		n, err := strconv.Atoi(v)
		if err != nil || n < 1 || n > 1024 {
			return badURL("max-clients %q: want 1 to 1024", v)
		}
		s.MaxClients = n
	}
	return nil
}

// String returns the URL in its canonical form.
func (s Spec) String() string {
	q := url.Values{}
	if s.Format != "" {
		q.Set("format", string(s.Format))
	}
	if s.RateHz > 0 {
		q.Set("rate", strconv.FormatFloat(s.RateHz, 'g', -1, 64))
	}
	if s.Stream != "" {
		q.Set("stream", s.Stream)
	}
	if s.Columns != "" {
		q.Set("columns", s.Columns)
	}
	switch s.Scheme {
	case "serial":
		if s.Baud != 115200 {
			q.Set("baud", strconv.Itoa(s.Baud))
		}
	case "file":
		if s.Realtime {
			q.Set("pace", "realtime")
		}
		if s.Speed != 1 {
			q.Set("speed", strconv.FormatFloat(s.Speed, 'g', -1, 64))
		}
	case "tcp-listen":
		if s.PerClient {
			q.Set("streams", "per-client")
		}
		if s.MaxClients != 16 {
			q.Set("max-clients", strconv.Itoa(s.MaxClients))
		}
	}
	var b strings.Builder
	switch s.Scheme {
	case "stdin":
		b.WriteString("stdin")
	case "nats":
		b.WriteString("nats:" + s.Address)
	default:
		b.WriteString(s.Scheme + "://")
		if s.Scheme == "serial" || s.Scheme == "file" {
			b.WriteString((&url.URL{Path: s.Address}).EscapedPath())
		} else {
			b.WriteString(s.Address)
		}
	}
	if len(q) > 0 {
		b.WriteString("?" + q.Encode())
	}
	return b.String()
}
