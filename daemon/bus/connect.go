// Package bus owns what crosses NATS: the client connection with its
// authentication, TLS and reconnect options, and the mapping of the
// configuration's nats section onto them.
package bus

import (
	"errors"
	"fmt"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"
)

// ClientOptions configures a connection to NATS: the embedded
// server or an existing server or cluster (nats.url).
type ClientOptions struct {
	// URL is one or more comma-separated nats:// or tls:// URLs; empty with
	// InProcess set.
	URL string
	// Name identifies the connection on the server (monitoring, logs).
	Name string
	// At most one way to authenticate: user and password, a token, a
	// credentials file (JWT and seed) or an nkey seed file.
	User, Password, Token, CredsFile, NKeySeedFile string
	// TLS: CAFile verifies the server; CertFile and KeyFile are the
	// client's certificate for mutual TLS.
	TLS TLS
	// TrustFiles are more PEM files whose certificates are trusted to
	// identify the server (the embedded server's own certificate).
	TrustFiles []string
	// InProcess connects to an embedded server without a socket.
	InProcess nats.InProcessConnProvider
	// ReconnectWait is the pause between reconnect attempts (default 1 s;
	// nats.go adds jitter).
	ReconnectWait time.Duration
}

// Check reports conflicting or incomplete settings, all at once.
func (o ClientOptions) Check() error {
	var errs []error
	if o.URL == "" && o.InProcess == nil {
		errs = append(errs, errors.New("nats: no url"))
	}
	n := 0
	for _, set := range []bool{o.User != "" || o.Password != "", o.Token != "", o.CredsFile != "", o.NKeySeedFile != ""} {
		if set {
			n++
		}
	}
	if n > 1 {
		errs = append(errs, errors.New("nats: choose one of user/password, token, creds_file and nkey_seed_file"))
	}
	if (o.User == "") != (o.Password == "") {
		errs = append(errs, errors.New("nats: user and password go together"))
	}
	if (o.TLS.CertFile == "") != (o.TLS.KeyFile == "") {
		errs = append(errs, errors.New("nats: tls cert_file and key_file go together"))
	}
	return errors.Join(errs...)
}

// Connect connects to NATS and keeps reconnecting for ever: an
// unreachable server at start or later is an outage (alerts wait in the
// spool), not a reason to stop. It returns an error only for settings that
// can never work (conflicting options, unreadable key files, a bad URL).
func Connect(o ClientOptions, log zerolog.Logger) (*nats.Conn, error) {
	if err := o.Check(); err != nil {
		return nil, err
	}
	if o.ReconnectWait <= 0 {
		o.ReconnectWait = time.Second
	}
	log = log.With().Str("component", "nats").Logger()
	auth := &authLog{}
	opts := []nats.Option{
		nats.Name(o.Name),
		// nats.go gives up after 60 attempts by default: never give up.
		nats.MaxReconnects(-1),
		nats.RetryOnFailedConnect(true),
		// nats.go closes the connection for good after the same
		// authorization error twice: a server restarted with other
		// credentials, or credentials fixed on the server later, must
		// find trapline still trying.
		nats.IgnoreAuthErrorAbort(),
		nats.ReconnectWait(o.ReconnectWait),
		nats.CustomReconnectDelay(reconnectDelay(o.ReconnectWait)),
		nats.DisconnectErrHandler(func(_ *nats.Conn, err error) {
			log.Warn().Err(err).Msg("NATS connection lost; reconnecting (alerts are spooled meanwhile)")
		}),
		nats.ReconnectErrHandler(func(_ *nats.Conn, err error) {
			if IsAuthError(err) {
				auth.log(log, err)
				return
			}
			log.Debug().Err(err).Msg("NATS reconnect attempt failed")
		}),
		nats.ReconnectHandler(func(nc *nats.Conn) {
			auth.reset(log)
			log.Info().Str("url", nc.ConnectedUrlRedacted()).Msg("NATS connection restored")
		}),
		nats.ConnectHandler(func(nc *nats.Conn) {
			log.Info().Str("url", nc.ConnectedUrlRedacted()).Msg("NATS connected")
		}),
		nats.ClosedHandler(func(*nats.Conn) { log.Debug().Msg("NATS connection closed") }),
		nats.ErrorHandler(func(_ *nats.Conn, sub *nats.Subscription, err error) {
			if IsAuthError(err) {
				auth.log(log, err)
				return
			}
			ev := log.Warn().Err(err)
			if sub != nil {
				ev = ev.Str("subject", sub.Subject)
			}
			ev.Msg("NATS asynchronous error")
		}),
	}
	switch {
	case o.User != "":
		opts = append(opts, nats.UserInfo(o.User, o.Password))
	case o.Token != "":
		opts = append(opts, nats.Token(o.Token))
	case o.CredsFile != "":
		opts = append(opts, nats.UserCredentials(o.CredsFile))
	case o.NKeySeedFile != "":
		nk, err := nats.NkeyOptionFromSeed(o.NKeySeedFile)
		if err != nil {
			return nil, fmt.Errorf("nats nkey seed %s: %w", o.NKeySeedFile, err)
		}
		opts = append(opts, nk)
	}
	if roots := append(nonEmpty(o.TLS.CAFile), o.TrustFiles...); len(roots) > 0 {
		opts = append(opts, nats.RootCAs(roots...))
	}
	if o.TLS.CertFile != "" {
		opts = append(opts, nats.ClientCert(o.TLS.CertFile, o.TLS.KeyFile))
	}
	if o.InProcess != nil {
		opts = append(opts, nats.InProcessServer(o.InProcess))
	}
	nc, err := nats.Connect(o.URL, opts...)
	if err != nil {
		return nil, fmt.Errorf("nats connect %s: %w", RedactURL(o.URL), err)
	}
	return nc, nil
}

// RedactURL hides a password or token written into a URL before it is
// logged or shown in an error.
func RedactURL(urls string) string {
	parts := strings.Split(urls, ",")
	for i, u := range parts {
		at := strings.LastIndex(u, "@")
		scheme := strings.Index(u, "://")
		if at > scheme && scheme >= 0 {
			parts[i] = u[:scheme+3] + "***" + u[at:]
		}
	}
	return strings.Join(parts, ",")
}

// TLS names PEM files: a certificate and its key, and a CA that verifies
// the other side.
type TLS struct {
	CAFile, CertFile, KeyFile string
}

// Enabled reports whether any file is set.
func (t TLS) Enabled() bool { return t.CertFile != "" || t.KeyFile != "" || t.CAFile != "" }

// nonEmpty returns s as a one-element list, or none when it is empty.
func nonEmpty(s string) []string {
	if s == "" {
		return nil
	}
	return []string{s}
}
