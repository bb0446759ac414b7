package bus

import (
	"context"
	"crypto/tls"
	"errors"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"
	"golang.org/x/crypto/bcrypt"
)

// EmbeddedOptions configures the nats-server that trapline runs in its
// own process (nats.url unset).
type EmbeddedOptions struct {
	// Name is the server name (trapline-<host> by default).
	Name string
	// Host is the listen address; loopback (127.0.0.1) unless TLS and
	// authentication are both on.
	Host string
	// Port is the client port: 0 picks a free port, -1 opens no listener
	// at all (in-process clients only).
	Port int
	// StoreDir holds JetStream's files; it must be set (nats-server would
	// silently use the temporary directory).
	StoreDir string
	// MaxStoreBytes and MaxMemoryBytes cap JetStream storage (nats-server
	// would take all free disk and 3/4 of memory).
	MaxStoreBytes, MaxMemoryBytes int64
	// User and Password, or Token, become the server's only credentials.
	User, Password, Token string
	// TLS is the server's certificate; with a CAFile, clients must present
	// certificates signed by it.
	TLS TLS
	// Identity, when set and neither User nor Token is, turns
	// authorization on: only this login may publish records, and every
	// client without credentials is the observer (ObserverPermissions).
	Identity *Identity
	// Prefix is the subject prefix the observer's permissions are written
	// for (alerts.DefaultPrefix when empty).
	Prefix string
}

// Embedded is a running embedded nats-server.
type Embedded struct {
	srv  *server.Server
	opts EmbeddedOptions
	log  zerolog.Logger
	lock *os.File // held on the store directory while the server runs
}

// ErrStoreLocked reports a JetStream directory in use by another embedded
// server (another trapline on the same data directory).
var ErrStoreLocked = errors.New("JetStream store in use by another trapline process")

// storeLockName is the lock file in the store directory.
const storeLockName = "trapline.lock"

// defaultNATSMaxStore and defaultNATSMaxMemory cap JetStream when no limit
// is configured.
const (
	defaultNATSMaxStore  = 1 << 30
	defaultNATSMaxMemory = 64 << 20
)

// isLoopbackHost reports whether host names only this machine.
func isLoopbackHost(host string) bool {
	if strings.EqualFold(host, "localhost") {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// check validates the options: a server reachable from other machines must
// both encrypt and authenticate.
func (o EmbeddedOptions) check() error {
	var errs []error
	if o.StoreDir == "" {
		errs = append(errs, errors.New("embedded nats: empty JetStream store directory"))
	}
	if o.Port < -1 || o.Port > 65535 {
		errs = append(errs, fmt.Errorf("embedded nats: port %d out of range (want -1 to 65535)", o.Port))
	}
	if (o.User == "") != (o.Password == "") {
		errs = append(errs, errors.New("embedded nats: user and password go together"))
	}
	if o.User != "" && o.Token != "" {
		errs = append(errs, errors.New("embedded nats: set user/password or token, not both"))
	}
	if (o.TLS.CertFile == "") != (o.TLS.KeyFile == "") {
		errs = append(errs, errors.New("embedded nats: tls cert_file and key_file go together"))
	}
	if o.TLS.CAFile != "" && o.TLS.CertFile == "" {
		errs = append(errs, errors.New("embedded nats: tls ca_file needs the server's cert_file and key_file"))
	}
	if o.Port != -1 && !isLoopbackHost(o.Host) {
		auth := o.User != "" || o.Token != ""
		if o.TLS.CertFile == "" || !auth {
			errs = append(errs, fmt.Errorf("embedded nats: refusing to listen on %q without TLS and authentication (use 127.0.0.1, or set both)", o.Host))
		}
	}
	return errors.Join(errs...)
}

// StartEmbedded starts the embedded server and returns once it accepts
// connections with JetStream up.
func StartEmbedded(opts EmbeddedOptions, log zerolog.Logger) (*Embedded, error) {
	opts = opts.withDefaults()
	if err := opts.check(); err != nil {
		return nil, err
	}
	if err := os.MkdirAll(opts.StoreDir, 0o750); err != nil {
		return nil, fmt.Errorf("embedded nats store %s: %w", opts.StoreDir, err)
	}
	lock, err := lockStore(filepath.Join(opts.StoreDir, storeLockName))
	if err != nil {
		return nil, fmt.Errorf("embedded nats store %s: %w", opts.StoreDir, err)
	}
	started := false
	defer func() {
		if !started {
			_ = lock.Close()
		}
	}()
	log = log.With().Str("component", "nats-server").Logger()
	so, err := opts.serverOptions()
	if err != nil {
		return nil, err
	}
	srv, err := server.NewServer(so)
	if err != nil {
		return nil, fmt.Errorf("embedded nats: %w", err)
	}
	sl := &serverLogger{log: log}
	srv.SetLoggerV2(sl, log.GetLevel() <= zerolog.DebugLevel, log.GetLevel() <= zerolog.TraceLevel, false)
	srv.Start()
	e := &Embedded{srv: srv, opts: opts, log: log, lock: lock}
	if !srv.ReadyForConnections(10 * time.Second) {
		e.Shutdown(5 * time.Second)
		return nil, fmt.Errorf("embedded nats: not ready after 10 s%s", sl.fatalSuffix())
	}
	if !srv.JetStreamEnabled() {
		e.Shutdown(5 * time.Second)
		return nil, fmt.Errorf("embedded nats: jetstream did not start (store %s)%s", opts.StoreDir, sl.fatalSuffix())
	}
	ev := log.Info().Str("store", opts.StoreDir).Bool("authorization", so.NoAuthUser != "" || opts.User != "" || opts.Token != "")
	if opts.Port == -1 {
		ev = ev.Str("listen", "in-process only")
	} else {
		ev = ev.Str("url", e.URL())
	}
	ev.Msg("embedded NATS server ready")
	started = true
	return e, nil
}

// withDefaults fills the listen host, the server name and the JetStream
// limits.
func (o EmbeddedOptions) withDefaults() EmbeddedOptions {
	if o.Host == "" {
		o.Host = "127.0.0.1"
	}
	if o.Name == "" {
		h, _ := os.Hostname()
		o.Name = "trapline-" + strings.ReplaceAll(h, ".", "-")
	}
	if o.MaxStoreBytes <= 0 {
		o.MaxStoreBytes = defaultNATSMaxStore
	}
	if o.MaxMemoryBytes <= 0 {
		o.MaxMemoryBytes = defaultNATSMaxMemory
	}
	return o
}

// serverOptions maps the options onto nats-server's: listener, JetStream,
// TLS and authorization.
func (o EmbeddedOptions) serverOptions() (*server.Options, error) {
	so := &server.Options{
		ServerName:         o.Name,
		Host:               o.Host,
		Port:               o.Port,
		JetStream:          true,
		StoreDir:           o.StoreDir,
		JetStreamMaxStore:  o.MaxStoreBytes,
		JetStreamMaxMemory: o.MaxMemoryBytes,
		// One node: a stored alert must survive a power cut, so every
		// write is synced (the breaths stream opts out per stream).
		SyncAlways: true,
		NoSigs:     true,
		Username:   o.User,
		// The auth token field.
		Authorization: o.Token,
	}
	switch o.Port {
	case 0:
		so.Port = server.RANDOM_PORT
	case -1:
		so.DontListen = true
		so.Port = server.RANDOM_PORT
	default:
		// nats-server reports a busy port through its logger's Fatalf,
		// as text; a probe gives the caller a real error to show.
		if err := probeListen(o.Host, o.Port); err != nil {
			return nil, err
		}
	}
	if err := o.serverTLS(so); err != nil {
		return nil, err
	}
	if o.Password != "" {
		// Give the server a bcrypt hash (nats-server recognises the $2a$
		// prefix) so that it does not warn about a plaintext password.
		// The hash lives only in this process's memory, next to the
		// plaintext the daemon's own client needs, so the lowest cost
		// loses nothing and keeps every client's login fast (each one
		// pays a bcrypt comparison).
		h, err := bcrypt.GenerateFromPassword([]byte(o.Password), bcrypt.MinCost)
		if err != nil {
			return nil, fmt.Errorf("embedded nats password: %w", err)
		}
		so.Password = string(h)
	}
	if o.Identity != nil && o.User == "" && o.Token == "" {
		if err := authorize(so, *o.Identity, o.Prefix); err != nil {
			return nil, err
		}
	}
	return so, nil
}

// serverTLS sets the server's certificate and, with a CA file, demands
// client certificates.
func (o EmbeddedOptions) serverTLS(so *server.Options) error {
	if o.TLS.CertFile == "" {
		return nil
	}
	tc, err := server.GenTLSConfig(&server.TLSConfigOpts{
		CertFile: o.TLS.CertFile, KeyFile: o.TLS.KeyFile, CaFile: o.TLS.CAFile,
		Verify: o.TLS.CAFile != "", Timeout: 2,
	})
	if err != nil {
		return fmt.Errorf("embedded nats tls: %w", err)
	}
	tc.MinVersion = tls.VersionTLS12
	so.TLSConfig, so.TLSVerify, so.TLSTimeout = tc, o.TLS.CAFile != "", 2
	return nil
}

// probeListen fails with "nats listen HOST:PORT: address already in use"
// when the port is taken.
func probeListen(host string, port int) error {
	hp := net.JoinHostPort(host, strconv.Itoa(port))
	ln, err := net.Listen("tcp", hp)
	if err != nil {
		inner := err
		var se *os.SyscallError
		if errors.As(err, &se) {
			inner = se.Err
		}
		return fmt.Errorf("nats listen %s: %w", hp, inner)
	}
	return ln.Close()
}

// URL returns the address clients connect to (empty when the server does
// not listen).
func (e *Embedded) URL() string {
	if e.opts.Port == -1 {
		return ""
	}
	addr, ok := e.srv.Addr().(*net.TCPAddr)
	if !ok {
		return ""
	}
	host := e.opts.Host
	if ip := net.ParseIP(host); ip != nil && ip.IsUnspecified() {
		// Listening on every interface: this machine reaches it on
		// loopback.
		host = "127.0.0.1"
	}
	scheme := "nats"
	if e.opts.TLS.CertFile != "" {
		scheme = "tls"
	}
	return scheme + "://" + net.JoinHostPort(host, strconv.Itoa(addr.Port))
}

// Server returns the nats-server, for in-process connections
// (nats.InProcessServer) and tests.
func (e *Embedded) Server() *server.Server { return e.srv }

// clientOptions returns the connection options that reach this server: its
// URL (or the in-process pipe) and its credentials. When the server demands
// client certificates (a CA file is set), trapline presents the server's own
// certificate, which must then also allow client authentication
// (extendedKeyUsage serverAuth and clientAuth).
func (e *Embedded) ClientOptions(name string) ClientOptions {
	c := ClientOptions{
		URL: e.URL(), Name: name,
		User: e.opts.User, Password: e.opts.Password, Token: e.opts.Token,
		TLS: TLS{CAFile: e.opts.TLS.CAFile},
	}
	if id := e.opts.Identity; id != nil && c.User == "" && c.Token == "" {
		c.User, c.Password = id.User, id.Password
	}
	if e.opts.TLS.CAFile != "" {
		c.TLS.CertFile, c.TLS.KeyFile = e.opts.TLS.CertFile, e.opts.TLS.KeyFile
	}
	if e.opts.TLS.CertFile != "" {
		// Trust the server's own certificate: it may be self-signed or
		// signed by a CA that is not in the system pool.
		c.TrustFiles = []string{e.opts.TLS.CertFile}
	}
	if e.opts.Port == -1 {
		c.InProcess = e.srv
	}
	return c
}

// Run waits for ctx and shuts the server down, bounded by 10 s.
func (e *Embedded) Run(ctx context.Context) error {
	<-ctx.Done()
	return e.Shutdown(10 * time.Second)
}

// shutdown stops the server and waits for it, at most timeout.
func (e *Embedded) Shutdown(timeout time.Duration) error {
	e.srv.Shutdown()
	done := make(chan struct{})
	go func() { e.srv.WaitForShutdown(); close(done) }()
	select {
	case <-done:
		// The store is free for the next server only once this one
		// has let go of it.
		if e.lock != nil {
			_ = e.lock.Close()
		}
		return nil
	case <-time.After(timeout):
		return fmt.Errorf("embedded nats: not shut down after %v", timeout)
	}
}

// serverLogger adapts nats-server's logger to zerolog. Its notices are
// chatty start-up banners, so they go to debug level. Fatalf must not exit
// the process (nats-server calls it when JetStream cannot start, or a port
// is taken): it logs an error and keeps the message for the start-up error.
type serverLogger struct {
	log   zerolog.Logger
	mu    sync.Mutex
	fatal string
}

var _ server.Logger = (*serverLogger)(nil)

func (l *serverLogger) Noticef(format string, v ...any) { l.log.Debug().Msgf(format, v...) }
func (l *serverLogger) Warnf(format string, v ...any)   { l.log.Warn().Msgf(format, v...) }
func (l *serverLogger) Errorf(format string, v ...any)  { l.log.Error().Msgf(format, v...) }
func (l *serverLogger) Debugf(format string, v ...any)  { l.log.Debug().Msgf(format, v...) }
func (l *serverLogger) Tracef(format string, v ...any)  { l.log.Trace().Msgf(format, v...) }

func (l *serverLogger) Fatalf(format string, v ...any) {
	msg := fmt.Sprintf(format, v...)
	l.log.Error().Msg(msg)
	l.mu.Lock()
	l.fatal = msg
	l.mu.Unlock()
}

// fatalSuffix returns ": <last fatal message>" or "".
func (l *serverLogger) fatalSuffix() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.fatal == "" {
		return ""
	}
	return ": " + l.fatal
}

// connect is a shorthand for tests and the demo: a client
// connection to the embedded server with its own credentials.
func (e *Embedded) connect(name string, log zerolog.Logger) (*nats.Conn, error) {
	return Connect(e.ClientOptions(name), log)
}
