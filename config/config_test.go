package config

import (
	"bytes"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/spf13/pflag"
	"github.com/spf13/viper"
)

// problemLines returns the problems of a load error one per line, or fails.
func problemLines(t *testing.T, err error) []string {
	t.Helper()
	var errs *Errors
	if !errors.As(err, &errs) {
		t.Fatalf("error %v (%T) is not *config.Errors", err, err)
	}
	var out []string
	for _, p := range errs.Problems {
		out = append(out, p.Error())
	}
	return out
}

func TestLoadWithoutFileIsDefault(t *testing.T) {
	c, err := Load("", nil)
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(c, Default()) {
		t.Errorf("Load(\"\") = %+v\nwant Default() = %+v", c, Default())
	}
	if err := Default().Validate(); err != nil {
		t.Errorf("Default() does not validate: %v", err)
	}
}

func TestExampleMatchesDefault(t *testing.T) {
	c, err := Load("trapline.example.yaml", nil)
	if err != nil {
		t.Fatal(err)
	}
	want := []Stream{{ID: "bench-a", Source: "serial:///dev/ttyUSB0?baud=115200"}}
	if !reflect.DeepEqual(c.Streams, want) {
		t.Errorf("example streams = %+v, want %+v", c.Streams, want)
	}
	c.Streams = nil
	if !reflect.DeepEqual(c, Default()) {
		for _, d := range leafDiff(c, Default()) {
			t.Errorf("trapline.example.yaml differs from Default(): %s", d)
		}
	}
	if !bytes.Equal(Example(), mustRead(t, "trapline.example.yaml")) {
		t.Error("Example() is not the embedded example file")
	}
}

func TestExampleNamesEveryKey(t *testing.T) {
	v := viper.New()
	v.SetConfigType("yaml")
	if err := v.ReadConfig(bytes.NewReader(Example())); err != nil {
		t.Fatal(err)
	}
	inFile := map[string]bool{}
	for _, k := range v.AllKeys() {
		inFile[k] = true
	}
	// A key without a default value (an optional per-condition override)
	// is documented by its section, which must be there; a key with one
	// must be written out.
	optional := map[string]bool{}
	walkLeaves(reflect.ValueOf(Default()).Elem(), "", func(key string, val reflect.Value) {
		optional[key] = !val.IsValid() || val.Kind() == reflect.Pointer && val.IsNil()
	})
	present := func(key string) bool {
		if inFile[key] {
			return true
		}
		parent := key[:max(strings.LastIndex(key, "."), 0)]
		return optional[key] && v.IsSet(parent)
	}
	for _, k := range Keys() {
		if !present(k) {
			t.Errorf("key %s is missing from trapline.example.yaml", k)
		}
	}
}

func TestFormatsAgree(t *testing.T) {
	var first *Config
	for _, f := range []string{"two-streams.yaml", "two-streams.toml", "two-streams.json"} {
		t.Run(f, func(t *testing.T) {
			c, err := Load(filepath.Join("testdata", f), nil)
			if err != nil {
				t.Fatal(err)
			}
			if len(c.Streams) != 2 || c.Streams[1].SampleRateHz != 100 || c.NATS.Embedded.Port != 4223 ||
				c.Log.Level != "debug" || c.Log.Format != "auto" || c.Alarms.For("air-trapping").DelayBreaths != 2 {
				t.Errorf("%s loaded as %+v", f, c)
			}
			if first == nil {
				first = c
			} else if !reflect.DeepEqual(c, first) {
				t.Errorf("%s differs from two-streams.yaml:\n%+v\n%+v", f, c, first)
			}
		})
	}
}

func TestLayers(t *testing.T) {
	file := filepath.Join(t.TempDir(), "c.yaml")
	if err := os.WriteFile(file, []byte("data_dir: /from/file\nnats: {url: nats://file:4222}\nhttp: {listen: 127.0.0.1:1}\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	t.Setenv("TRAPLINE_NATS_URL", "nats://env:4222")
	t.Setenv("TRAPLINE_HTTP_LISTEN", "") // an empty variable still overrides: it disables HTTP
	t.Setenv("TRAPLINE_NATS_EMBEDDED_MAX_STORE", "4GiB")
	t.Setenv("TRAPLINE_SHUTDOWN_TIMEOUT", "30s")
	t.Setenv("TRAPLINE_ALARMS_CONDITIONS_AIR_TRAPPING_DELAY_BREATHS", "5")
	t.Setenv("TRAPLINE_DETECTORS_AIR_TRAPPING_ENABLED", "false")

	fs := pflag.NewFlagSet("run", pflag.ContinueOnError)
	fs.String("config", "", "")
	fs.String("data-dir", "./unused-default", "")
	fs.String("nats-url", "", "")
	fs.String("log-level", "info", "")
	fs.Int("workers", 1, "") // not a key: ignored
	if err := fs.Parse([]string{"--config", file, "--nats-url", "nats://flag:4222", "--log-level=warn", "--workers=3"}); err != nil {
		t.Fatal(err)
	}
	c, err := Load(file, fs)
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		key       string
		got, want any
	}{
		{"data_dir (file; the unset flag's default must not win)", c.DataDir, "/from/file"},
		{"nats.url (flag over env over file)", c.NATS.URL, "nats://flag:4222"},
		{"log.level (flag)", c.Log.Level, "warn"},
		{"http.listen (empty env)", c.HTTP.Listen, ""},
		{"nats.embedded.max_store (env size)", c.NATS.Embedded.MaxStore, 4 * GiB},
		{"shutdown_timeout (env duration)", c.ShutdownTimeout, 30 * time.Second},
		{"alarms override (env, optional key)", c.Alarms.For("air-trapping").DelayBreaths, 5},
		{"detectors bool (env)", c.Detectors.AirTrapping.Enabled, false},
		{"default kept", c.NATS.SubjectPrefix, "trapline"},
	} {
		if !reflect.DeepEqual(tc.got, tc.want) {
			t.Errorf("%s = %v, want %v", tc.key, tc.got, tc.want)
		}
	}
}

func TestBadEnvAndFlagsNameTheirOrigin(t *testing.T) {
	t.Setenv("TRAPLINE_NATS_EMBEDDED_PORT", "abc")
	t.Setenv("TRAPLINE_SPOOL_MAX_EVENTS", "-4")
	t.Setenv("TRAPLINE_SHUTDOWN_TIMEOUT", " ")
	t.Setenv("TRAPLINE_ALARMS_CONDITIONS_SIGNAL_LOST_LATCHING", "")
	fs := pflag.NewFlagSet("run", pflag.ContinueOnError)
	fs.String("http-listen", "", "")
	if err := fs.Parse([]string{"--http-listen", "nowhere"}); err != nil {
		t.Fatal(err)
	}
	_, err := Load("", fs)
	got := problemLines(t, err)
	want := []string{
		`shutdown_timeout: is set but empty (from TRAPLINE_SHUTDOWN_TIMEOUT)`,
		`alarms.conditions.signal_lost.latching: is set but empty (from TRAPLINE_ALARMS_CONDITIONS_SIGNAL_LOST_LATCHING)`,
		`nats.embedded.port: want a whole number, got "abc" (from TRAPLINE_NATS_EMBEDDED_PORT)`,
		`http.listen: "nowhere" is not host:port (want host:port, or empty to disable) (from --http-listen)`,
		`spool.max_events: -4 is out of range (want 1 to 10000000) (from TRAPLINE_SPOOL_MAX_EVENTS)`,
	}
	if !reflect.DeepEqual(got, want) {
		t.Errorf("problems:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(want, "\n"))
	}
}

func TestBadConfigs(t *testing.T) {
	for _, tc := range []struct {
		name string
		yaml string
		want []string
	}{
		{
			name: "a value that does not decode gives one message, not one more for the key that names it",
			yaml: "detectors:\n  air_trapping:\n    n: four\n",
			want: []string{`detectors.air_trapping.n: want a whole number, got "four"`},
		},
		{
			name: "a misspelt key gives one message, not one more for the key left unset",
			yaml: "streams:\n  - id: bed-1\n    sourcee: stdin://\n",
			want: []string{`streams[0].sourcee: unknown key (did you mean "source"?)`},
		},
		{
			name: "every problem at once, by full key path",
			yaml: string(mustRead(t, "testdata/bad.yaml")),
			want: []string{
				`alarms.conditions.air_trapping.delay_breathz: unknown key (did you mean "delay_breaths"?)`,
				`log.formatt: unknown key (did you mean "format"?)`,
				`streams[1].sourcee: unknown key (did you mean "source"?)`,
				`shutdown_timeout: want a duration with a unit, like 10s or 5m, got 10`,
				`nats.embedded.max_store: size 1.5: not a whole number of bytes`,
				`data_dir: must not be empty`,
				`log.level: "loud" is not allowed (want trace, debug, info, warn, error)`,
				`http.listen: "localhost" is not host:port (want host:port, or empty to disable)`,
				`nats.url: "http://broker:4222": unknown scheme "http" (want nats, tls, ws or wss)`,
				`nats.embedded.port: 70000 is out of range (want -1 for in-process only, 0 for any free port, or 1 to 65535)`,
				`nats.replicas: 9 is out of range (want 1 to 5)`,
				`nats.alerts_stream.duplicates: 2h is longer than max_age 1h (JetStream requires duplicates <= max_age)`,
				`spool.max_events: 0 is out of range (want 1 to 10000000)`,
				`streams[1].id: "bed-07" is already the id of streams[0]`,
				`streams[2].id: "bad id" is not a valid stream id (want 1 to 32 letters, digits, '-' or '_')`,
				`streams[2].source: unknown scheme "tpc" (want serial, tcp, tcp-listen, udp, file, stdin, nats)`,
				`streams[2].columns: columns "pressure[psi],flow[L/min]": pressure unit "psi": want cmH2O, hPa, mbar, kPa, mmHg`,
				`detectors.air_trapping.n: must be between 1 and m (6)`,
				`alarms.conditions.air_trapping.priority: unknown priority "urgent" (want high, medium, low or empty for the finding's severity)`,
			},
		},
		{
			name: "a memory limit that is neither a size nor auto",
			yaml: "memory_limit: plenty\n",
			want: []string{`memory_limit: size "plenty": want a number of bytes with a unit, like 64MiB or 1GiB, or auto`},
		},
		{
			name: "a memory limit below the floor",
			yaml: "memory_limit: 32MiB\n",
			want: []string{`memory_limit: 32MiB is too small (want at least 64MiB)`},
		},
		{
			name: "unknown keys at every depth",
			yaml: "colour: red\nnats: {embeded: {port: 1}, embedded: {prot: 1}, tls: {cert: x}}\n" +
				"streams: [{id: a, source: 'stdin:'}, {id: b, source: 'stdin:', rate: 5}]\n" +
				"detectors: {limits: {high_peak_pressure: {limit: 40}}}\nalarms: {conditions: {air_traping: {n: 1}}}\n",
			want: []string{
				`alarms.conditions.air_traping: unknown key (did you mean "air_trapping"?)`,
				`colour: unknown key (want one of data_dir, log, http, shutdown_timeout, memory_limit, nats, spool, recording, streams, sources, analysis, detectors, alarms, role, scaleout)`,
				`detectors.limits.high_peak_pressure.limit: unknown key (want one of enabled, limit_cmh2o, high_margin_cmh2o, hysteresis_cmh2o)`,
				`nats.embedded.prot: unknown key (did you mean "port"?)`,
				`nats.embeded: unknown key (did you mean "embedded"?)`,
				`nats.tls.cert: unknown key (want one of ca_file, cert_file, key_file)`,
				`streams[1].rate: unknown key (want one of id, source, columns, sample_rate_hz)`,
			},
		},
		{
			name: "wrong shapes and types",
			yaml: "log: [info]\nnats: {embedded: 5, publish_timeout: soon}\nstreams: {id: a}\nspool: {max_events: many}\n",
			want: []string{
				`log: want a mapping of keys, got a list`,
				`nats.embedded: want a mapping of keys, got 5`,
				`streams: want a list, got a mapping`,
				`nats.publish_timeout: want a duration with a unit, like 10s or 5m, got "soon"`,
				`spool.max_events: want a whole number, got "many"`,
			},
		},
		{
			name: "public embedded server without TLS and auth",
			yaml: string(mustRead(t, "testdata/embedded-public.yaml")),
			want: []string{
				`nats.embedded.host: "0.0.0.0" is not a loopback address: listening beyond this machine needs nats.tls.cert_file and key_file and nats.user/password or nats.token`,
			},
		},
		{
			name: "authentication and TLS combinations",
			yaml: "nats: {user: ann, token: t0k, creds_file: /nonexistent/x.creds, tls: {key_file: /nonexistent/k.pem}}\n",
			want: []string{
				`nats.password: must be set when nats.user is set`,
				`nats.creds_file: only applies to an existing server (set nats.url); the embedded server takes user/password or token`,
				`nats.creds_file: stat /nonexistent/x.creds: no such file or directory`,
				`nats: user/password and token and creds_file are set: choose one authentication method`,
				`nats.tls: cert_file and key_file must be set together`,
				`nats.tls.key_file: stat /nonexistent/k.pem: no such file or directory`,
			},
		},
		{
			name: "stream limits",
			yaml: "nats:\n  embedded: {max_store: 1GiB}\n  replicas: 3\n  breaths_stream: {max_bytes: 1GiB, name: A.B}\n" +
				"  alerts_stream: {max_age: 10m, duplicates: 0s}\n  subject_prefix: 'trap line.>'\n  publish_timeout: 1h\n",
			want: []string{
				`nats.subject_prefix: subject prefix "trap line.>": token "trap line" holds a wildcard, a dot or white space`,
				`nats.breaths_stream.name: "A.B" is not a valid stream name (want up to 255 characters without spaces, '.', '*', '>', '/' or '\')`,
				`nats.replicas: 3 is more than the embedded server's single node (want 1, or set nats.url to a cluster)`,
				`nats.alerts_stream.duplicates: 0s is out of range (want 1s to 168h)`,
				`nats.alerts_stream.max_age: 10m is out of range (want 0 for no limit, or 1h to 876000h)`,
				`nats.breaths_stream.max_bytes: 1GiB leaves no room for alerts in nats.embedded.max_store 1GiB (want less than max_store)`,
				`nats.publish_timeout: 1h is out of range (want 100ms to 1m)`,
			},
		},
		{
			name: "capped streams must fit the embedded store",
			yaml: "nats: {embedded: {max_store: 1GiB}, alerts_stream: {max_bytes: 600MiB}, breaths_stream: {max_bytes: 512MiB, max_age: 10s}}\n",
			want: []string{
				`nats.breaths_stream.max_age: 10s is out of range (want 0 for no limit, or 1m to 876000h)`,
				`nats.embedded.max_store: 1GiB is less than alerts_stream.max_bytes 600MiB plus breaths_stream.max_bytes 512MiB (JetStream reserves both)`,
			},
		},
		{
			name: "role and scale-out",
			yaml: "role: workers\nscaleout: {partitions: 0, replicas: 7, batch: 2s, heartbeat: 2s, member_ttl: 3s, warmup: 10m, samples_max_age: 5m, worker_id: 'w 1'}\n",
			want: []string{
				`role: "workers" is not allowed (want all, edge, worker)`,
				`scaleout.partitions: 0 is out of range (want 1 to 1024)`,
				`scaleout.replicas: 7 is out of range (want 0 for automatic, or 1 to 5)`,
				`scaleout.batch: 2s is out of range (want 5ms to 1s)`,
				`scaleout.member_ttl: 3s is out of range (want 4s to 10m)`,
				`scaleout.samples_max_age: 5m is out of range (want 11m2s to 168h)`,
				`scaleout.worker_id: "w 1": want letters, digits, '-' or '_'`,
			},
		},
		{
			name: "stream sources and columns",
			yaml: "streams:\n" +
				"  - {id: a, source: 'tcp://nohost'}\n" +
				"  - {id: b, source: 'serial://'}\n" +
				"  - {id: c, source: 'udp://127.0.0.1:5001', columns: 'pressure[cmH2O],flow[L/min]'}\n" +
				"  - {id: d, source: 'file:///tmp/x.csv', columns: 'time[s],flow[L/min]'}\n" +
				"  - {id: e, source: 'stdin:', sample_rate_hz: 0.5}\n" +
				"  - {id: '', source: 'nats:trapline.samples.x'}\n" +
				"  - {id: g, source: 'tcp://127.0.0.1:4001?rate=100&columns=pressure,flow&stream=h', sample_rate_hz: 50, columns: 'pressure,flow'}\n" +
				"  - {id: h, source: 'tcp://127.0.0.1:4001?columns=pressure,flow'}\n" +
				"  - {id: i, source: 'tcp://127.0.0.1:4001?format=binary', columns: 'pressure,flow'}\n" +
				"  - {id: j, source: 'serial:///dev/ttyS0?bauds=9600'}\n",
			want: []string{
				`streams[0].source: tcp address "nohost": want host:port, e.g. tcp://127.0.0.1:4001`,
				`streams[1].source: serial needs a path, e.g. serial:///dev/ttyUSB0`,
				`streams[2].sample_rate_hz: must be set (1 to 10000) because columns has no time column`,
				`streams[3].columns: columns "time[s],flow[L/min]": columns must include pressure and flow`,
				`streams[4].sample_rate_hz: 0.5 is out of range (want 0 when the input has a time column, or 1 to 10000)`,
				`streams[5].id: must not be empty`,
				`streams[6].columns: is also given in the source URL (columns=pressure,flow): set it in one place`,
				`streams[6].sample_rate_hz: is also given in the source URL (rate=100): set it in one place`,
				`streams[6].source: stream=h differs from the stream's id "g"`,
				// Columns in the URL count too; binary frames carry their own time.
				`streams[7].sample_rate_hz: must be set (1 to 10000) because columns has no time column`,
				`streams[9].source: unknown parameter "bauds" for serial (want format, rate, stream, columns, baud)`,
			},
		},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := LoadBytes([]byte(tc.yaml), "yaml", nil)
			got := problemLines(t, err)
			if !reflect.DeepEqual(got, tc.want) {
				t.Errorf("problems:\n%s\nwant:\n%s", strings.Join(got, "\n"), strings.Join(tc.want, "\n"))
			}
		})
	}
}

func TestLoadFileErrors(t *testing.T) {
	dir := t.TempDir()
	broken := filepath.Join(dir, "broken.yaml")
	if err := os.WriteFile(broken, []byte("nats:\n  url: [\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		path, want string
	}{
		{filepath.Join(dir, "missing.yaml"), "read config: open "},
		{filepath.Join(dir, "c.ini"), `unknown file type ".ini" (want .yaml, .yml, .toml or .json)`},
		{broken, "parse yaml: yaml: line 2: did not find expected node content"},
	} {
		t.Run(filepath.Base(tc.path), func(t *testing.T) {
			_, err := Load(tc.path, nil)
			lines := problemLines(t, err)
			if len(lines) != 1 || !strings.HasPrefix(lines[0], tc.want) {
				t.Errorf("problems %q, want one starting %q", lines, tc.want)
			}
			if !strings.Contains(err.Error(), tc.path) {
				t.Errorf("error %q does not name the file", err)
			}
		})
	}
}

func TestErrorsFormat(t *testing.T) {
	one := &Errors{File: "a.yaml", Problems: []error{&FieldError{Key: "x.y", Msg: "bad"}}}
	if got, want := one.Error(), "invalid configuration in a.yaml: x.y: bad"; got != want {
		t.Errorf("one problem: %q, want %q", got, want)
	}
	two := &Errors{Problems: []error{&FieldError{Key: "a", Msg: "bad"}, &FieldError{Msg: "worse"}}}
	if got, want := two.Error(), "invalid configuration (2 problems):\n  a: bad\n  worse"; got != want {
		t.Errorf("two problems: %q, want %q", got, want)
	}
	var fe *FieldError
	if !errors.As(two, &fe) || fe.Key != "a" {
		t.Errorf("errors.As did not find the first FieldError: %v", fe)
	}
}

func TestKeysMapToDistinctNames(t *testing.T) {
	env, flags := map[string]string{}, map[string]string{}
	for _, k := range Keys() {
		if prev, dup := env[EnvName(k)]; dup {
			t.Errorf("%s and %s share %s", prev, k, EnvName(k))
		}
		if prev, dup := flags[FlagName(k)]; dup {
			t.Errorf("%s and %s share --%s", prev, k, FlagName(k))
		}
		env[EnvName(k)], flags[FlagName(k)] = k, k
	}
	for key, want := range map[string]string{"nats.url": "nats-url", "data_dir": "data-dir", "http.listen": "http-listen", "log.level": "log-level"} {
		if FlagName(key) != want || flags[want] != key {
			t.Errorf("FlagName(%s) = %s, want %s", key, FlagName(key), want)
		}
	}
	if got := EnvName("nats.embedded.max_store"); got != "TRAPLINE_NATS_EMBEDDED_MAX_STORE" {
		t.Errorf("EnvName = %s", got)
	}
}

func TestDerivedDirs(t *testing.T) {
	c := Default()
	c.DataDir = "/srv/trapline"
	if got := c.NATSStoreDir(); got != "/srv/trapline/nats" {
		t.Errorf("NATSStoreDir = %s", got)
	}
	if got := c.SpoolDir(); got != "/srv/trapline/spool" {
		t.Errorf("SpoolDir = %s", got)
	}
	c.NATS.Embedded.StoreDir, c.Spool.Dir = "/js", "/sp"
	if c.NATSStoreDir() != "/js" || c.SpoolDir() != "/sp" {
		t.Errorf("explicit dirs ignored: %s %s", c.NATSStoreDir(), c.SpoolDir())
	}
}

func TestEditDistance(t *testing.T) {
	// kitten → sitting is 3 edits, the usual worked example of the
	// Levenshtein distance (from memory; any textbook on string algorithms).
	for _, tc := range []struct {
		a, b string
		want int
	}{{"kitten", "sitting", 3}, {"", "abc", 3}, {"sourcee", "source", 1}, {"flaw", "lawn", 2}} {
		if got := editDistance(tc.a, tc.b); got != tc.want {
			t.Errorf("editDistance(%q, %q) = %d, want %d", tc.a, tc.b, got, tc.want)
		}
	}
}

// leafDiff lists the keys whose values differ between two configurations.
func leafDiff(a, b *Config) []string {
	vals := map[string]string{}
	show := func(v reflect.Value) string {
		if !v.IsValid() {
			return "(unset)"
		}
		return fmt.Sprint(v.Interface())
	}
	walkLeaves(reflect.ValueOf(a).Elem(), "", func(k string, v reflect.Value) { vals[k] = show(v) })
	var out []string
	walkLeaves(reflect.ValueOf(b).Elem(), "", func(k string, v reflect.Value) {
		if vals[k] != show(v) {
			out = append(out, fmt.Sprintf("%s is %s, want %s", k, vals[k], show(v)))
		}
	})
	return out
}

func mustRead(t testing.TB, path string) []byte {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

func TestValidVariants(t *testing.T) {
	dir := t.TempDir()
	for _, f := range []string{"ca.pem", "cert.pem", "key.pem", "edge.creds"} {
		if err := os.WriteFile(filepath.Join(dir, f), []byte("x"), 0o600); err != nil {
			t.Fatal(err)
		}
	}
	for _, tc := range []struct {
		name, yaml string
		check      func(*Config) error
	}{
		{
			name: "cluster with credentials and three replicas",
			yaml: "nats: {url: 'nats://n1:4222, tls://n2:4222', replicas: 3, creds_file: " + filepath.Join(dir, "edge.creds") + "}\n",
			check: func(c *Config) error {
				js := c.JetStream()
				// 0 (no cap) in the file is alerts' negative "no limit".
				if c.EmbeddedNATS() || js.Replicas != 3 || js.Alerts != "TRAPLINE_ALERTS" || js.Breaths != "TRAPLINE_BREATHS" ||
					js.AlertsMaxBytes != -1 || js.BreathsMaxBytes != 512<<20 || js.AlertsMaxAge != 720*time.Hour {
					return fmt.Errorf("got %+v", js)
				}
				return nil
			},
		},
		{
			name: "embedded server on all interfaces with TLS and a token",
			yaml: fmt.Sprintf("nats: {embedded: {host: 0.0.0.0}, token: s3cret, tls: {ca_file: %s, cert_file: %s, key_file: %s}}\n",
				filepath.Join(dir, "ca.pem"), filepath.Join(dir, "cert.pem"), filepath.Join(dir, "key.pem")),
			check: func(c *Config) error {
				if !c.EmbeddedNATS() || c.NATS.Embedded.Host != "0.0.0.0" {
					return fmt.Errorf("got %+v", c.NATS)
				}
				return nil
			},
		},
		{
			name: "memory limit from the control group",
			yaml: "memory_limit: auto\n",
			check: func(c *Config) error {
				if c.MemoryLimit != MemLimitAuto {
					return fmt.Errorf("memory_limit %v", c.MemoryLimit)
				}
				return nil
			},
		},
		{
			name: "memory limit as a plain number of bytes",
			yaml: "memory_limit: 1073741824\n",
			check: func(c *Config) error {
				if c.MemoryLimit != MemLimit(GiB) {
					return fmt.Errorf("memory_limit %v", c.MemoryLimit)
				}
				return nil
			},
		},
		{
			name: "in-process only server may bind nothing",
			yaml: "nats: {embedded: {host: 0.0.0.0, port: -1}, subject_prefix: lab.bench-3}\n",
			check: func(c *Config) error {
				// Stream names follow the prefix unless set.
				if js := c.JetStream(); js.Alerts != "LAB_BENCH_3_ALERTS" || js.Prefix != "lab.bench-3" {
					return fmt.Errorf("got %+v", js)
				}
				return nil
			},
		},
		{
			name: "localhost and headerless input with a rate",
			yaml: "nats: {embedded: {host: localhost}}\nstreams: [{id: rig-2, source: 'udp://127.0.0.1:5001', columns: 'pressure[kPa],flow[mL/s]', sample_rate_hz: 250}]\n",
			check: func(c *Config) error {
				if c.Streams[0].SampleRateHz != 250 {
					return fmt.Errorf("got %+v", c.Streams)
				}
				return nil
			},
		},
	} {
		t.Run(tc.name, func(t *testing.T) {
			c, err := LoadBytes([]byte(tc.yaml), "yaml", nil)
			if err != nil {
				t.Fatal(err)
			}
			if err := tc.check(c); err != nil {
				t.Error(err)
			}
		})
	}
}

func TestStreamSpec(t *testing.T) {
	s := Stream{ID: "rig-2", Source: "tcp://127.0.0.1:4001?format=binary", Columns: "pressure[hPa],flow[L/s]", SampleRateHz: 200}
	spec, err := s.Spec()
	if err != nil {
		t.Fatal(err)
	}
	if spec.Stream != "rig-2" || spec.Columns != s.Columns || spec.RateHz != 200 || spec.Address != "127.0.0.1:4001" || spec.Format != "binary" {
		t.Errorf("Spec() = %+v", spec)
	}
	// The URL's own settings win (Load refuses a stream that sets both).
	spec, err = Stream{ID: "a", Source: "stdin:?rate=50", SampleRateHz: 100}.Spec()
	if err != nil || spec.RateHz != 50 {
		t.Errorf("Spec() = %+v, %v; want rate 50", spec, err)
	}
	if _, err := (Stream{ID: "b", Source: "tpc://x"}).Spec(); err == nil || !strings.Contains(err.Error(), `stream b: bad source URL: unknown scheme "tpc"`) {
		t.Errorf("Spec() error = %v", err)
	}
}
