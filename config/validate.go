package config

import (
	"fmt"
	"net"
	"net/url"
	"os"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"time"
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
	c.validateNATS(p)
	if c.Spool.MaxEvents < 1 || c.Spool.MaxEvents > 10_000_000 {
		p.addf("spool.max_events", "%d is out of range (want 1 to 10000000)", c.Spool.MaxEvents)
	}
	c.validateStreams(p)
	p.add(c.Detectors.Validate("detectors")...)
	p.add(c.Alarms.Validate("alarms")...)
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
	if !validSubjectPrefix(n.SubjectPrefix) {
		p.addf("nats.subject_prefix", "%q is not a valid subject prefix (want dot-separated tokens without spaces, '*' or '>')", n.SubjectPrefix)
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

	// Authentication: one method, complete.
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
	auth := len(methods) > 0

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

	// JetStream streams.
	as, bs := &n.AlertsStream, &n.BreathsStream
	streamName(p, "nats.alerts_stream.name", as.Name)
	streamName(p, "nats.breaths_stream.name", bs.Name)
	if as.Name != "" && as.Name == bs.Name {
		p.addf("nats.breaths_stream.name", "%q is also the alerts stream's name", bs.Name)
	}
	replicas(p, "nats.alerts_stream.replicas", as.Replicas, embedded)
	replicas(p, "nats.breaths_stream.replicas", bs.Replicas, embedded)
	durationIn(p, "nats.alerts_stream.duplicates", as.Duplicates, time.Second, 7*24*time.Hour)
	durationIn(p, "nats.alerts_stream.max_age", as.MaxAge, 0, 100*365*24*time.Hour)
	if as.MaxAge > 0 && as.Duplicates > as.MaxAge {
		p.addf("nats.alerts_stream.duplicates", "%s is longer than max_age %s (JetStream requires duplicates <= max_age)", fmtDuration(as.Duplicates), fmtDuration(as.MaxAge))
	}
	if as.MaxAge > 0 && as.MaxAge < time.Hour {
		p.addf("nats.alerts_stream.max_age", "%s is too short to keep alerts (want 0 for forever, or at least 1h)", fmtDuration(as.MaxAge))
	}
	durationIn(p, "nats.breaths_stream.max_age", bs.MaxAge, 0, 100*365*24*time.Hour)
	sizeAtLeast(p, "nats.alerts_stream.max_bytes", as.MaxBytes, 0)
	sizeAtLeast(p, "nats.breaths_stream.max_bytes", bs.MaxBytes, 0)
	if embedded && e.MaxStore >= MiB {
		// JetStream reserves each stream's max_bytes from the store; the
		// breath records must leave room for alerts.
		if bs.MaxBytes == 0 {
			p.addf("nats.breaths_stream.max_bytes", "must be set on the embedded server, or breath records could fill nats.embedded.max_store (%v) and block alerts", e.MaxStore)
		} else if as.MaxBytes+bs.MaxBytes >= e.MaxStore {
			p.addf("nats.breaths_stream.max_bytes", "%v plus alerts_stream.max_bytes %v leaves no room in nats.embedded.max_store %v (want their sum below max_store)", bs.MaxBytes, as.MaxBytes, e.MaxStore)
		}
	}
	durationIn(p, "nats.publish_timeout", n.PublishTimeout, 100*time.Millisecond, time.Minute)
}

// validateStreams checks each stream and that ids are unique.
func (c *Config) validateStreams(p *problems) {
	seen := map[string]int{}
	for i, s := range c.Streams {
		key := fmt.Sprintf("streams[%d]", i)
		switch {
		case s.ID == "":
			p.addf(key+".id", "must not be empty")
		case !streamIDPattern.MatchString(s.ID):
			p.addf(key+".id", "%q is not a valid stream id (want 1 to 64 letters, digits, '-' or '_')", s.ID)
		}
		if j, dup := seen[s.ID]; dup && s.ID != "" {
			p.addf(key+".id", "%q is already the id of streams[%d]", s.ID, j)
		} else {
			seen[s.ID] = i
		}
		if s.Source == "" {
			p.addf(key+".source", "must not be empty (want a URL such as serial:///dev/ttyUSB0 or tcp://127.0.0.1:5000)")
		} else if err := checkSource(s.Source); err != nil {
			p.addf(key+".source", "%v", err)
		}
		hasTime := true
		if s.Columns != "" {
			var err error
			if hasTime, err = checkColumns(s.Columns); err != nil {
				p.addf(key+".columns", "%v", err)
				hasTime = true // do not also ask for a rate the header may not need
			}
		}
		switch {
		case s.SampleRateHz != 0 && (s.SampleRateHz < 1 || s.SampleRateHz > 10000):
			p.addf(key+".sample_rate_hz", "%g is out of range (want 0 when the input has a time column, or 1 to 10000)", s.SampleRateHz)
		case s.SampleRateHz == 0 && !hasTime:
			p.addf(key+".sample_rate_hz", "must be set (1 to 10000) because columns has no time column")
		}
	}
}

// streamIDPattern is what a stream id may look like: it is a NATS subject
// token and part of file names, so no dots, spaces or wildcards.
var streamIDPattern = regexp.MustCompile(`^[A-Za-z0-9_-]{1,64}$`)

// sourceSchemes are the source kinds that ingest reads.
var sourceSchemes = []string{"serial", "tcp", "tcp-listen", "udp", "file", "stdin", "nats"}

// checkSource checks the form of a source URL: a known scheme and, where the
// scheme needs one, an address or a path.
func checkSource(s string) error {
	u, err := url.Parse(s)
	if err != nil {
		return fmt.Errorf("not a URL: %v", err)
	}
	want := "(want " + strings.Join(sourceSchemes, ", ") + ")"
	switch u.Scheme {
	case "":
		return fmt.Errorf("%q has no scheme %s", s, want)
	case "serial", "file":
		if u.Path == "" && u.Opaque == "" {
			return fmt.Errorf("%q names no path (want %s:///path)", s, u.Scheme)
		}
	case "tcp", "tcp-listen", "udp":
		if err := checkHostPort(u.Host); err != nil {
			return fmt.Errorf("%q: %v (want %s://host:port)", s, err, u.Scheme)
		}
	case "stdin", "nats":
	default:
		return fmt.Errorf("unknown scheme %q %s", u.Scheme, want)
	}
	return nil
}

// columnUnits are the units each column of the sample line format v1 may
// carry; the first is the default.
var columnUnits = map[string][]string{
	"time":     {"s", "ms"},
	"pressure": {"cmH2O", "hPa", "mbar", "kPa"},
	"flow":     {"L/min", "L/s", "mL/s"},
	"volume":   {"mL", "L"},
	"stream":   nil,
}

// checkColumns checks a header of the sample line format v1 and reports
// whether it has a time column. Unknown column names are allowed (they are
// ignored), unknown units and duplicate columns are not.
func checkColumns(h string) (hasTime bool, err error) {
	seen := map[string]bool{}
	for _, col := range strings.Split(h, ",") {
		col = strings.TrimSpace(col)
		name, unit, hasUnit := strings.Cut(col, "[")
		name = strings.TrimSpace(name)
		if hasUnit {
			var ok bool
			if unit, ok = strings.CutSuffix(unit, "]"); !ok {
				return false, fmt.Errorf("column %q: unit not closed with ]", col)
			}
		}
		units, known := columnUnits[name]
		if !known {
			continue
		}
		if seen[name] {
			return false, fmt.Errorf("column %q appears twice", name)
		}
		seen[name] = true
		if hasUnit && !slices.Contains(units, unit) {
			if units == nil {
				return false, fmt.Errorf("column %q takes no unit", name)
			}
			return false, fmt.Errorf("column %q: unknown unit %q (want %s)", name, unit, strings.Join(units, ", "))
		}
	}
	for _, need := range []string{"pressure", "flow"} {
		if !seen[need] {
			return false, fmt.Errorf("%q has no %s column", h, need)
		}
	}
	return seen["time"], nil
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

// validSubjectPrefix reports whether s is one or more NATS subject tokens
// without wildcards.
func validSubjectPrefix(s string) bool {
	if s == "" {
		return false
	}
	for _, tok := range strings.Split(s, ".") {
		if tok == "" || tok == "*" || tok == ">" || strings.ContainsAny(tok, " \t\r\n*>") {
			return false
		}
	}
	return true
}

// streamName checks a JetStream stream name: no spaces, dots, wildcards or
// path separators (the name is a directory on disk).
func streamName(p *problems, key, name string) {
	if name == "" || len(name) > 255 || strings.ContainsAny(name, " \t\r\n.*>/\\") {
		p.addf(key, "%q is not a valid stream name (want up to 255 characters without spaces, '.', '*', '>', '/' or '\\')", name)
	}
}

// replicas checks a stream's replica count.
func replicas(p *problems, key string, n int, embedded bool) {
	switch {
	case n < 1 || n > 5:
		p.addf(key, "%d is out of range (want 1 to 5)", n)
	case embedded && n != 1:
		p.addf(key, "%d is more than the embedded server's single node (want 1, or set nats.url to a cluster)", n)
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
