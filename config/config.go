package config

import (
	"cmp"
	"fmt"
	"path/filepath"
	"time"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/ingest"
)

// Config is the whole configuration of the trapline daemon. Its mapstructure
// tags are the keys of the config file; nested keys are written with dots in
// messages (nats.embedded.port) and with underscores in environment
// variables (TRAPLINE_NATS_EMBEDDED_PORT).
type Config struct {
	// DataDir holds the JetStream store and the alert spool unless they are
	// placed elsewhere. A relative path is relative to the working directory.
	DataDir string `mapstructure:"data_dir"`
	// Log sets the daemon's logger.
	Log Log `mapstructure:"log"`
	// HTTP serves /healthz, /readyz and /metrics.
	HTTP HTTP `mapstructure:"http"`
	// ShutdownTimeout bounds the drain of pending alerts at shutdown.
	ShutdownTimeout time.Duration `mapstructure:"shutdown_timeout"`
	// MemoryLimit is the soft limit of the daemon's memory (the Go runtime's
	// memory limit): near it the collector runs more often and returns
	// freed pages sooner, so that a daemon of thousands of streams stays
	// within its budget (docs/operations.md). 0 leaves the runtime's own
	// default (none, or the GOMEMLIMIT environment variable); MemLimitAuto
	// ("auto") takes 90 % of the memory limit of the process's control
	// group (a container's limit) when it has one.
	MemoryLimit MemLimit `mapstructure:"memory_limit"`
	// NATS is where breath records and alerts go.
	NATS NATS `mapstructure:"nats"`
	// Spool keeps alerts on disk while NATS is unreachable.
	Spool Spool `mapstructure:"spool"`
	// Recording keeps every stream's raw bytes (docs/recording.md).
	Recording Recording `mapstructure:"recording"`
	// Streams are the signals to read, one per patient or bench channel.
	Streams []Stream `mapstructure:"streams"`
	// Sources are multiplexed links, each carrying the many streams its
	// pattern or allow list admits (see Source).
	Sources []Source `mapstructure:"sources"`
	// Analysis holds the thresholds of breath segmentation and of the
	// per-breath fits (owned by package analyze).
	Analysis analyze.Config `mapstructure:"analysis"`
	// Detectors holds the thresholds, windows and N-of-M rules of every
	// detector (owned by package analyze).
	Detectors analyze.DetectorConfig `mapstructure:"detectors"`
	// Alarms is the alarm lifecycle: delays, hysteresis, latching,
	// escalation and acknowledgement, per condition (owned by package
	// alerts).
	Alarms alerts.LifecycleConfig `mapstructure:"alarms"`
	// Role is all (the single-node daemon), edge (read sources, publish
	// samples to the cluster) or worker (analyse the partitions it owns).
	Role string `mapstructure:"role"`
	// ScaleOut configures the edge and worker roles.
	ScaleOut ScaleOut `mapstructure:"scaleout"`
}

// Log configures the daemon's zerolog logger.
type Log struct {
	// Level is trace, debug, info, warn or error.
	Level string `mapstructure:"level"`
	// Format is auto (console on a terminal, JSON otherwise), console or json.
	Format string `mapstructure:"format"`
}

// HTTP configures the health and metrics endpoint.
type HTTP struct {
	// Listen is host:port for /healthz, /readyz and /metrics; empty disables
	// the endpoint.
	Listen string `mapstructure:"listen"`
	// Pprof also serves the Go runtime's profiles under /debug/pprof/
	// (CPU, heap, goroutines) for measuring a running daemon. Off by
	// default; like the rest of the endpoint it belongs on loopback.
	Pprof bool `mapstructure:"pprof"`
}

// NATS configures the message bus: an embedded server by default, or an
// existing server or cluster when URL is set.
type NATS struct {
	// URL is empty for the embedded server, or one or more comma-separated
	// nats:// or tls:// URLs of an existing server or cluster.
	URL string `mapstructure:"url"`
	// SubjectPrefix starts every subject: <prefix>.breath.<stream>,
	// <prefix>.alert.<stream>, <prefix>.status.<stream>,
	// <prefix>.samples.<stream> and <prefix>.ack.<stream>.
	SubjectPrefix string `mapstructure:"subject_prefix"`
	// Embedded configures the in-process server used when URL is empty.
	Embedded Embedded `mapstructure:"embedded"`

	// User and Password authenticate with a user name and password. For the
	// embedded server they also become its only user.
	User     string `mapstructure:"user"`
	Password string `mapstructure:"password"`
	// Token authenticates with a shared token (embedded server too).
	Token string `mapstructure:"token"`
	// CredsFile is a NATS credentials file (JWT and nkey seed) for an
	// existing server.
	CredsFile string `mapstructure:"creds_file"`
	// NKeySeedFile is a file holding an nkey user seed for an existing server.
	NKeySeedFile string `mapstructure:"nkey_seed_file"`
	// TLS holds certificates: the client's for an existing server, the
	// server's for the embedded one.
	TLS TLS `mapstructure:"tls"`

	// Replicas is the number of copies JetStream keeps of each stream: 1 on
	// a single server (and always on the embedded one), up to 5 on a cluster.
	Replicas int `mapstructure:"replicas"`
	// AlertsStream is the JetStream stream that keeps alert events.
	AlertsStream AlertsStream `mapstructure:"alerts_stream"`
	// BreathsStream is the JetStream stream that keeps breath records.
	BreathsStream BreathsStream `mapstructure:"breaths_stream"`
	// PublishTimeout bounds one acknowledged publish before it is retried.
	PublishTimeout time.Duration `mapstructure:"publish_timeout"`
}

// Embedded configures the nats-server that trapline runs in its own process.
type Embedded struct {
	// Host is the listen address. It must be a loopback address unless TLS
	// and authentication are both configured.
	Host string `mapstructure:"host"`
	// Port is the client port: 0 picks a free port, -1 opens no network
	// listener at all (in-process clients only).
	Port int `mapstructure:"port"`
	// StoreDir is the JetStream directory; empty means <data_dir>/nats.
	StoreDir string `mapstructure:"store_dir"`
	// MaxStore caps JetStream file storage.
	MaxStore Size `mapstructure:"max_store"`
	// MaxMemory caps JetStream memory storage.
	MaxMemory Size `mapstructure:"max_memory"`
}

// TLS names PEM files. CertFile and KeyFile go together; CAFile verifies the
// other side (the server for a client, client certificates for the embedded
// server, which then requires them).
type TLS struct {
	CAFile   string `mapstructure:"ca_file"`
	CertFile string `mapstructure:"cert_file"`
	KeyFile  string `mapstructure:"key_file"`
}

// AlertsStream configures the JetStream stream of alert events.
type AlertsStream struct {
	// Name is the JetStream stream name; empty means the subject prefix in
	// upper case followed by _ALERTS (TRAPLINE_ALERTS).
	Name string `mapstructure:"name"`
	// Duplicates is the de-duplication window; it must cover the longest
	// gap between a publish that may have landed and its retry, and may not
	// exceed MaxAge.
	Duplicates time.Duration `mapstructure:"duplicates"`
	// MaxAge is how long alerts are kept; 0 keeps them forever.
	MaxAge time.Duration `mapstructure:"max_age"`
	// MaxBytes caps the stream's size, the oldest alerts going first; 0
	// means no cap.
	MaxBytes Size `mapstructure:"max_bytes"`
}

// BreathsStream configures the JetStream stream of breath records.
type BreathsStream struct {
	// Name is the JetStream stream name; empty means the subject prefix in
	// upper case followed by _BREATHS (TRAPLINE_BREATHS).
	Name string `mapstructure:"name"`
	// MaxAge is how long breath records are kept; 0 keeps them until the
	// size cap.
	MaxAge time.Duration `mapstructure:"max_age"`
	// MaxBytes caps the stream's size, the oldest records going first; 0
	// means no cap (refused for the embedded server).
	MaxBytes Size `mapstructure:"max_bytes"`
}

// Spool configures the local append-only store that holds alerts while NATS
// is unreachable, and across restarts, until they are acknowledged.
type Spool struct {
	// Dir is the spool directory; empty means <data_dir>/spool.
	Dir string `mapstructure:"dir"`
	// MaxEvents bounds the number of events waiting in the spool.
	MaxEvents int `mapstructure:"max_events"`
}

// Stream is one signal: where its samples come from and how to read them.
type Stream struct {
	// ID names the stream in subjects, records and logs: letters, digits,
	// '-' and '_'.
	ID string `mapstructure:"id"`
	// Source is a URL: serial:///dev/ttyUSB0?baud=115200, tcp://host:port,
	// tcp-listen://127.0.0.1:port, udp://127.0.0.1:port, file:///path,
	// stdin: or nats: (see docs/sources.md when present).
	Source string `mapstructure:"source"`
	// Columns is the header to assume for text input without a header line;
	// empty means time[s],pressure[cmH2O],flow[L/min].
	Columns string `mapstructure:"columns"`
	// SampleRateHz gives the sample times when there is no time column; 0
	// when the input carries time.
	SampleRateHz float64 `mapstructure:"sample_rate_hz"`
}

// Default returns the configuration used for every key that the file, the
// environment and the flags leave unset. It is the only place defaults live.
func Default() *Config {
	return &Config{
		DataDir:         "./data",
		Log:             Log{Level: "info", Format: "auto"},
		HTTP:            HTTP{Listen: "127.0.0.1:9464"},
		ShutdownTimeout: 10 * time.Second,
		NATS: NATS{
			SubjectPrefix: alerts.DefaultPrefix,
			Embedded: Embedded{
				Host:      "127.0.0.1",
				Port:      4222,
				MaxStore:  1 * GiB,
				MaxMemory: 64 * MiB,
			},
			Replicas: 1,
			AlertsStream: AlertsStream{
				Duplicates: alerts.DefaultAlertsDuplicates,
				MaxAge:     alerts.DefaultAlertsMaxAge,
				MaxBytes:   limit(alerts.DefaultAlertsMaxBytes),
			},
			BreathsStream: BreathsStream{
				MaxAge:   alerts.DefaultBreathsMaxAge,
				MaxBytes: limit(alerts.DefaultBreathsMaxBytes),
			},
			PublishTimeout: 2 * time.Second,
		},
		Spool:     Spool{MaxEvents: alerts.DefaultSpoolMaxEvents},
		Recording: defaultRecording(),
		Analysis:  analyze.DefaultConfig(),
		Detectors: analyze.DefaultDetectorConfig(),
		Alarms:    alerts.DefaultLifecycleConfig(),
		Role:      RoleAll,
		ScaleOut:  defaultScaleOut(),
	}
}

// NATSStoreDir returns the JetStream directory of the embedded server:
// nats.embedded.store_dir, or <data_dir>/nats when that is empty.
func (c *Config) NATSStoreDir() string {
	if c.NATS.Embedded.StoreDir != "" {
		return c.NATS.Embedded.StoreDir
	}
	return filepath.Join(c.DataDir, "nats")
}

// SpoolDir returns the alert spool directory: spool.dir, or
// <data_dir>/spool when that is empty.
func (c *Config) SpoolDir() string {
	if c.Spool.Dir != "" {
		return c.Spool.Dir
	}
	return filepath.Join(c.DataDir, "spool")
}

// JetStream returns the settings of the JetStream streams in the form that
// package alerts creates them from (alerts.EnsureStreams and the publisher).
func (c *Config) JetStream() alerts.StreamsConfig {
	return alerts.StreamsConfig{
		Prefix:           c.NATS.SubjectPrefix,
		Alerts:           c.NATS.AlertsStream.Name,
		Breaths:          c.NATS.BreathsStream.Name,
		AlertsDuplicates: c.NATS.AlertsStream.Duplicates,
		AlertsMaxAge:     unlimitedAge(c.NATS.AlertsStream.MaxAge),
		AlertsMaxBytes:   unlimitedBytes(c.NATS.AlertsStream.MaxBytes),
		BreathsMaxAge:    unlimitedAge(c.NATS.BreathsStream.MaxAge),
		BreathsMaxBytes:  unlimitedBytes(c.NATS.BreathsStream.MaxBytes),
		Replicas:         c.NATS.Replicas,
	}.WithDefaults()
}

// In the config file 0 means "no limit", as in JetStream; package alerts
// reads 0 as "default" and a negative value as "no limit". These translate.

// limit turns alerts' negative "no limit" into the file's 0.
func limit(n int64) Size { return Size(max(n, 0)) }

// unlimitedAge turns the file's 0 into alerts' "no limit".
func unlimitedAge(d time.Duration) time.Duration {
	if d == 0 {
		return -1
	}
	return d
}

// unlimitedBytes turns the file's 0 into alerts' "no limit".
func unlimitedBytes(s Size) int64 {
	if s == 0 {
		return -1
	}
	return int64(s)
}

// EmbeddedNATS reports whether the daemon runs its own NATS server (nats.url is
// empty).
func (c *Config) EmbeddedNATS() bool { return c.NATS.URL == "" }

// Spec returns the stream's parsed source URL with the stream's own
// settings filled in where the URL leaves them out: the stream id, columns
// and sample rate. The result is what ingest.OpenSpec takes. Load has
// already checked the URL; Spec reports the same error for a Config built
// in code.
func (s Stream) Spec() (ingest.Spec, error) {
	spec, err := ingest.ParseURL(s.Source)
	if err != nil {
		return ingest.Spec{}, fmt.Errorf("stream %s: %w", s.ID, err)
	}
	spec.Stream = cmp.Or(spec.Stream, s.ID)
	spec.Columns = cmp.Or(spec.Columns, s.Columns)
	spec.RateHz = cmp.Or(spec.RateHz, s.SampleRateHz)
	return spec, nil
}
