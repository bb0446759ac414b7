package bus

import (
	"errors"
	"fmt"
	"syscall"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"trapline/config"
)

// ErrPortInUse is returned when a listen address is already taken by another
// process.
var ErrPortInUse = errors.New("address already in use")

// Bus is the daemon's NATS: one client connection, and the embedded server
// when nats.url is empty.
type Bus struct {
	// Conn is the client connection.
	Conn *nats.Conn
	// URL is where it connects, with any secret redacted.
	URL string
	// Server is the embedded server, nil when nats.url is set.
	Server *Embedded
	log    zerolog.Logger
	client ClientOptions
}

// ClientOptions returns the options of the daemon's own connection under
// another connection name: what an in-process client (the demo's view)
// uses to reach the same server with the same credentials and TLS.
func (b *Bus) ClientOptions(name string) ClientOptions {
	o := b.client
	o.Name = name
	return o
}

// ClientFromConfig maps the configuration's nats section onto the options
// of a connection to an external server (nats.url): every client of
// trapline (the daemon, its roles, watch) connects with these.
func ClientFromConfig(n *config.NATS, name string) ClientOptions {
	return ClientOptions{
		URL: n.URL, Name: name,
		User: n.User, Password: n.Password, Token: n.Token,
		CredsFile: n.CredsFile, NKeySeedFile: n.NKeySeedFile,
		TLS: TLS{CAFile: n.TLS.CAFile, CertFile: n.TLS.CertFile, KeyFile: n.TLS.KeyFile},
	}
}

// Embedded reports whether the server runs inside this process.
func (b *Bus) Embedded() bool { return b.Server != nil }

// Close drains the connection (bounded) and stops the embedded server.
func (b *Bus) Close() {
	if b.Conn != nil {
		// Draining ends the connection on purpose: not an outage to report.
		b.Conn.SetDisconnectErrHandler(nil)
		done := make(chan struct{})
		b.Conn.SetClosedHandler(func(*nats.Conn) { close(done) })
		if err := b.Conn.Drain(); err != nil {
			b.Conn.Close()
		} else {
			select {
			case <-done:
			case <-time.After(5 * time.Second):
				b.Conn.Close()
			}
		}
	}
	if b.Server != nil {
		if err := b.Server.Shutdown(10 * time.Second); err != nil {
			b.log.Warn().Err(err).Msg("embedded NATS shutdown")
		}
	}
}

// Open starts the embedded server (nats.url empty) or connects to the
// configured one. An unreachable external server is not an error: the
// connection keeps trying and alerts wait in the spool meanwhile.
func Open(cfg *config.Config, log zerolog.Logger) (*Bus, error) {
	n := &cfg.NATS
	b := &Bus{log: log}
	if !cfg.EmbeddedNATS() {
		b.client = ClientFromConfig(n, "trapline")
		nc, err := Connect(b.client, log)
		if err != nil {
			return nil, fmt.Errorf("nats.url: %w", err)
		}
		b.Conn, b.URL = nc, RedactURL(n.URL)
		return b, nil
	}
	tls := TLS{CAFile: n.TLS.CAFile, CertFile: n.TLS.CertFile, KeyFile: n.TLS.KeyFile}
	eo := EmbeddedOptions{
		Host: n.Embedded.Host, Port: n.Embedded.Port, StoreDir: cfg.NATSStoreDir(),
		MaxStoreBytes: int64(n.Embedded.MaxStore), MaxMemoryBytes: int64(n.Embedded.MaxMemory),
		User: n.User, Password: n.Password, Token: n.Token, TLS: tls, Prefix: n.SubjectPrefix,
	}
	if n.User == "" && n.Token == "" {
		id, err := LoadOrCreateIdentity(cfg.DataDir)
		if err != nil {
			return nil, err
		}
		eo.Identity = &id
	}
	srv, err := StartEmbedded(eo, log)
	if err != nil {
		if errors.Is(err, syscall.EADDRINUSE) {
			return nil, fmt.Errorf("embedded NATS: %w: another process (perhaps another trapline or a nats-server) holds the port; "+
				"stop it, change nats.embedded.port, or set nats.url to use that server: %w", ErrPortInUse, err)
		}
		return nil, fmt.Errorf("embedded NATS: %w", err)
	}
	b.client = srv.ClientOptions("trapline")
	nc, err := Connect(b.client, log)
	if err != nil {
		_ = srv.Shutdown(10 * time.Second)
		return nil, fmt.Errorf("connect to the embedded NATS: %w", err)
	}
	b.Conn, b.Server, b.URL = nc, srv, srv.URL()
	return b, nil
}
