package config

import (
	"cmp"
	"fmt"
	"net"
	"net/url"
	"os"
	"slices"
	"strconv"
	"strings"
	"time"

	"trapline/alerts"
	"trapline/ingest"
)

// Validate checks every setting and returns all problems at once as an
// *Errors, or nil. Load calls it; call it again after changing a Config in
// code.
func (c *Config) Validate() error {
	var p problems
	c.validate(&p)
	return p.err("")
}

// validate adds every problem of c to p, each under its full key.
func (c *Config) validate(p *problems) {
	if strings.TrimSpace(c.DataDir) == "" {
		p.addf("data_dir", "must not be empty")
	}
	oneOf(p, "log.level", c.Log.Level, "trace", "debug", "info", "warn", "error")
	oneOf(p, "log.format", c.Log.Format, "auto", "console", "json")
	if c.HTTP.Listen != "" {
		if err := checkHostPort(c.HTTP.Listen); err != nil {
			p.addf("http.listen", "%v (want host:port, or empty to disable)", err)
		}
	}
	durationIn(p, "shutdown_timeout", c.ShutdownTimeout, 100*time.Millisecond, 10*time.Minute)
	if c.MemoryLimit > 0 {
		sizeAtLeast(p, "memory_limit", Size(c.MemoryLimit), 64*MiB)
	}
	c.validateNATS(p)
	if c.Spool.MaxEvents < 1 || c.Spool.MaxEvents > 10_000_000 {
		p.addf("spool.max_events", "%d is out of range (want 1 to 10000000)", c.Spool.MaxEvents)
	}
	c.validateStreams(p)
	c.validateSources(p)
	c.validateRecording(p)
	p.add(c.Analysis.Validate("analysis")...)
	p.add(c.Detectors.Validate("detectors")...)
	p.add(c.Alarms.Validate("alarms")...)
	c.validateScaleOut(p)
}

// validateNATS checks the nats section, including the rule that an embedded
// server reachable from other machines needs both TLS and authentication.
func (c *Config) validateNATS(p *problems) {
	n := &c.NATS
	embedded := c.EmbeddedNATS()
	if !embedded {
		for _, u := range strings.Split(n.URL, ",") {
			if err := checkNATSURL(strings.TrimSpace(u)); err != nil {
				p.addf("nats.url", "%v", err)
			}
		}
	}
	if err := alerts.ValidatePrefix(n.SubjectPrefix); err != nil {
		p.addf("nats.subject_prefix", "%v", err)
	}

	e := &n.Embedded
	if e.Port < -1 || e.Port > 65535 {
		p.addf("nats.embedded.port", "%d is out of range (want -1 for in-process only, 0 for any free port, or 1 to 65535)", e.Port)
	}
	if e.Host == "" {
		p.addf("nats.embedded.host", "must not be empty (an empty host listens on every interface; write 0.0.0.0 if that is meant)")
	}
	sizeAtLeast(p, "nats.embedded.max_store", e.MaxStore, MiB)
	sizeAtLeast(p, "nats.embedded.max_memory", e.MaxMemory, MiB)

	auth := n.validateAuth(p, embedded)

	// TLS: certificate and key go together; the files must exist.
	t := &n.TLS
	if (t.CertFile == "") != (t.KeyFile == "") {
		p.addf("nats.tls", "cert_file and key_file must be set together")
	}
	fileExists(p, "nats.tls.ca_file", t.CAFile)
	fileExists(p, "nats.tls.cert_file", t.CertFile)
	fileExists(p, "nats.tls.key_file", t.KeyFile)
	tlsOn := t.CertFile != "" && t.KeyFile != ""
	if embedded && t.CAFile != "" && !tlsOn {
		p.addf("nats.tls.ca_file", "the embedded server needs cert_file and key_file to verify client certificates")
	}
	if embedded && e.Port != -1 && e.Host != "" && !isLoopback(e.Host) && !(tlsOn && auth) {
		p.addf("nats.embedded.host", "%q is not a loopback address: listening beyond this machine needs nats.tls.cert_file and key_file and nats.user/password or nats.token", e.Host)
	}

	c.validateJetStream(p, embedded)
	durationIn(p, "nats.publish_timeout", n.PublishTimeout, 100*time.Millisecond, time.Minute)
}

// validateAuth checks that at most one authentication method is set, and
// completely; it reports whether one is. embedded tells whether trapline
// runs its own server, which takes neither a creds nor an nkey seed file.
func (n *NATS) validateAuth(p *problems, embedded bool) bool {
	methods := []string{}
	if n.User != "" || n.Password != "" {
		methods = append(methods, "user/password")
		if n.User == "" {
			p.addf("nats.user", "must be set when nats.password is set")
		}
		if n.Password == "" {
			p.addf("nats.password", "must be set when nats.user is set")
		}
	}
	if n.Token != "" {
		methods = append(methods, "token")
	}
	for _, f := range []struct{ key, path string }{{"nats.creds_file", n.CredsFile}, {"nats.nkey_seed_file", n.NKeySeedFile}} {
		if f.path == "" {
			continue
		}
		methods = append(methods, strings.TrimPrefix(f.key, "nats."))
		if embedded {
			p.addf(f.key, "only applies to an existing server (set nats.url); the embedded server takes user/password or token")
		}
		fileExists(p, f.key, f.path)
	}
	if len(methods) > 1 {
		p.addf("nats", "%s are set: choose one authentication method", strings.Join(methods, " and "))
	}
	return len(methods) > 0
}

// validateJetStream checks the names, replicas, ages and sizes of the
// alerts and breaths streams; embedded tells whether trapline runs its own
// single-node server, whose store must hold both streams.
func (c *Config) validateJetStream(p *problems, embedded bool) {
	n, e := &c.NATS, &c.NATS.Embedded
	as, bs := &n.AlertsStream, &n.BreathsStream
	if as.Name != "" {
		streamName(p, "nats.alerts_stream.name", as.Name)
	}
	if bs.Name != "" {
		streamName(p, "nats.breaths_stream.name", bs.Name)
	}
	if js := c.JetStream(); js.Alerts == js.Breaths {
		p.addf("nats.breaths_stream.name", "%q is also the alerts stream's name", js.Breaths)
	}
	switch {
	case n.Replicas < 1 || n.Replicas > 5:
		p.addf("nats.replicas", "%d is out of range (want 1 to 5)", n.Replicas)
	case embedded && n.Replicas != 1:
		p.addf("nats.replicas", "%d is more than the embedded server's single node (want 1, or set nats.url to a cluster)", n.Replicas)
	}
	durationIn(p, "nats.alerts_stream.duplicates", as.Duplicates, time.Second, 7*24*time.Hour)
	zeroOrIn(p, "nats.alerts_stream.max_age", as.MaxAge, time.Hour)
	if as.Duplicates > as.MaxAge && as.MaxAge >= time.Hour {
		p.addf("nats.alerts_stream.duplicates", "%s is longer than max_age %s (JetStream requires duplicates <= max_age)", fmtDuration(as.Duplicates), fmtDuration(as.MaxAge))
	}
	zeroOrIn(p, "nats.breaths_stream.max_age", bs.MaxAge, time.Minute)
	zeroOrAtLeast(p, "nats.alerts_stream.max_bytes", as.MaxBytes, MiB)
	zeroOrAtLeast(p, "nats.breaths_stream.max_bytes", bs.MaxBytes, MiB)
	// JetStream reserves each capped stream's max_bytes from the store, so
	// they must fit; an uncapped alerts stream needs room beside the breaths.
	if embedded && e.MaxStore >= MiB && bs.MaxBytes >= 0 && as.MaxBytes >= 0 {
		switch {
		case bs.MaxBytes == 0:
			p.addf("nats.breaths_stream.max_bytes", "must be set for the embedded server, or breath records could fill nats.embedded.max_store (%v) and crowd out alerts", e.MaxStore)
		case as.MaxBytes == 0 && bs.MaxBytes >= e.MaxStore:
			p.addf("nats.breaths_stream.max_bytes", "%v leaves no room for alerts in nats.embedded.max_store %v (want less than max_store)", bs.MaxBytes, e.MaxStore)
		case as.MaxBytes > 0 && as.MaxBytes+bs.MaxBytes > e.MaxStore:
			p.addf("nats.embedded.max_store", "%v is less than alerts_stream.max_bytes %v plus breaths_stream.max_bytes %v (JetStream reserves both)", e.MaxStore, as.MaxBytes, bs.MaxBytes)
		}
	}
}

// validateStreams checks each stream and that ids are unique.
func (c *Config) validateStreams(p *problems) {
	seen := map[string]int{}
	for i, s := range c.Streams {
		key := fmt.Sprintf("streams[%d]", i)
		switch {
		case s.ID == "":
			p.addf(key+".id", "must not be empty")
		case !ingest.ValidStreamID(s.ID):
			p.addf(key+".id", "%q is not a valid stream id (want 1 to 32 letters, digits, '-' or '_')", s.ID)
		}
		if j, dup := seen[s.ID]; dup && s.ID != "" {
			p.addf(key+".id", "%q is already the id of streams[%d]", s.ID, j)
		} else {
			seen[s.ID] = i
		}
		spec, err := ingest.ParseURL(s.Source)
		if err != nil {
			p.addf(key+".source", "%s", strings.TrimPrefix(err.Error(), ingest.ErrBadURL.Error()+": "))
		}
		if err == nil && spec.Columns != "" && s.Columns != "" {
			p.addf(key+".columns", "is also given in the source URL (columns=%s): set it in one place", spec.Columns)
		}
		if err == nil && spec.RateHz > 0 && s.SampleRateHz > 0 {
			p.addf(key+".sample_rate_hz", "is also given in the source URL (rate=%g): set it in one place", spec.RateHz)
		}
		if err == nil && spec.Stream != "" && spec.Stream != s.ID {
			p.addf(key+".source", "stream=%s differs from the stream's id %q", spec.Stream, s.ID)
		}
		// The text decoder is the authority on column layouts: a layout it
		// refuses with any rate is a columns problem, one it refuses only
		// without a rate needs sample_rate_hz. Binary frames carry their
		// own time.
		columns, rateHz := s.Columns, s.SampleRateHz
		if err == nil {
			columns, rateHz = cmp.Or(columns, spec.Columns), cmp.Or(rateHz, spec.RateHz)
		}
		hasTime := true
		if err != nil || wireFormat(spec) == ingest.FormatText {
			if _, cerr := ingest.NewTextDecoder(ingest.DecoderOptions{Columns: s.Columns, RateHz: 1}, func(string, ingest.Sample) {}); cerr != nil {
				p.addf(key+".columns", "%v", cerr)
			} else if _, terr := ingest.NewTextDecoder(ingest.DecoderOptions{Columns: columns}, func(string, ingest.Sample) {}); terr != nil {
				hasTime = rateHz > 0
			}
		}
		switch {
		case s.SampleRateHz != 0 && (s.SampleRateHz < 1 || s.SampleRateHz > 10000):
			p.addf(key+".sample_rate_hz", "%g is out of range (want 0 when the input has a time column, or 1 to 10000)", s.SampleRateHz)
		case !hasTime:
			p.addf(key+".sample_rate_hz", "must be set (1 to 10000) because columns has no time column")
		}
	}
}

// wireFormat is the format a source reads: the URL's, or by default text,
// except on NATS subjects, which carry binary frames (ingest.Options).
func wireFormat(spec ingest.Spec) ingest.Format {
	switch {
	case spec.Format != "":
		return spec.Format
	case spec.Scheme == "nats":
		return ingest.FormatBinary
	}
	return ingest.FormatText
}

// checkNATSURL checks one server URL of nats.url.
func checkNATSURL(s string) error {
	u, err := url.Parse(s)
	if err != nil {
		return fmt.Errorf("%q is not a URL", s)
	}
	switch u.Scheme {
	case "nats", "tls", "ws", "wss":
	default:
		return fmt.Errorf("%q: unknown scheme %q (want nats, tls, ws or wss)", s, u.Scheme)
	}
	if u.Hostname() == "" {
		return fmt.Errorf("%q names no host", s)
	}
	if port := u.Port(); port != "" {
		if n, err := strconv.Atoi(port); err != nil || n < 1 || n > 65535 {
			return fmt.Errorf("%q: port %s is out of range (want 1 to 65535)", s, port)
		}
	}
	return nil
}

// checkHostPort checks a host:port listen or dial address.
func checkHostPort(s string) error {
	_, port, err := net.SplitHostPort(s)
	if err != nil {
		return fmt.Errorf("%q is not host:port", s)
	}
	if n, err := strconv.Atoi(port); err != nil || n < 0 || n > 65535 {
		return fmt.Errorf("%q: port %q is out of range (want 0 to 65535)", s, port)
	}
	return nil
}

// isLoopback reports whether a listen host stays on this machine.
func isLoopback(host string) bool {
	if strings.EqualFold(host, "localhost") {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// streamName checks a JetStream stream name: no spaces, dots, wildcards or
// path separators (the name is a directory on disk).
func streamName(p *problems, key, name string) {
	if name == "" || len(name) > 255 || strings.ContainsAny(name, " \t\r\n.*>/\\") {
		p.addf(key, "%q is not a valid stream name (want up to 255 characters without spaces, '.', '*', '>', '/' or '\\')", name)
	}
}

// oneOf checks that v is one of the allowed values.
func oneOf(p *problems, key, v string, allowed ...string) {
	if !slices.Contains(allowed, v) {
		p.addf(key, "%q is not allowed (want %s)", v, strings.Join(allowed, ", "))
	}
}

// durationIn checks lo <= d <= hi.
func durationIn(p *problems, key string, d, lo, hi time.Duration) {
	if d < lo || d > hi {
		p.addf(key, "%s is out of range (want %s to %s)", fmtDuration(d), fmtDuration(lo), fmtDuration(hi))
	}
}

// fmtDuration writes a duration as a config file would: 2h rather than
// 2h0m0s.
func fmtDuration(d time.Duration) string {
	s := d.String()
	if strings.HasSuffix(s, "m0s") {
		s = strings.TrimSuffix(s, "0s")
	}
	if strings.HasSuffix(s, "h0m") {
		s = strings.TrimSuffix(s, "0m")
	}
	return s
}

// zeroOrIn checks that d is 0 (no limit) or at least lo.
func zeroOrIn(p *problems, key string, d, lo time.Duration) {
	if d != 0 && (d < lo || d > 100*365*24*time.Hour) {
		p.addf(key, "%s is out of range (want 0 for no limit, or %s to 876000h)", fmtDuration(d), fmtDuration(lo))
	}
}

// zeroOrAtLeast checks that s is 0 (no limit) or at least lo.
func zeroOrAtLeast(p *problems, key string, s, lo Size) {
	if s != 0 && s < lo {
		p.addf(key, "%v is too small (want 0 for no limit, or at least %v)", s, lo)
	}
}

// sizeAtLeast checks s >= lo.
func sizeAtLeast(p *problems, key string, s, lo Size) {
	if s < lo {
		p.addf(key, "%v is too small (want at least %v)", s, lo)
	}
}

// fileExists checks that a configured file can be found, so that a typo is
// reported at start-up rather than on the first connection.
func fileExists(p *problems, key, path string) {
	if path == "" {
		return
	}
	if _, err := os.Stat(path); err != nil {
		p.addf(key, "%v", err)
	}
}
