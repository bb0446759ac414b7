package bus

import (
	"errors"
	"strings"
	"sync"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"trapline/ingest/backoff"
)

// maxReconnectDelay caps the pause between reconnect rounds: a server
// that comes back (or whose credentials are fixed) is found within it.
const maxReconnectDelay = 2 * time.Second

// reconnectDelay doubles the pause from first up to maxReconnectDelay.
func reconnectDelay(first time.Duration) func(attempts int) time.Duration {
	return func(attempts int) time.Duration {
		d := time.Duration(0)
		for range min(attempts, 8) {
			d = backoff.Double(d, first, max(first, maxReconnectDelay))
		}
		return d
	}
}

// IsAuthError reports whether err is the server refusing the connection's
// credentials or permissions to connect.
func IsAuthError(err error) bool {
	if err == nil {
		return false
	}
	if errors.Is(err, nats.ErrAuthorization) || errors.Is(err, nats.ErrAuthExpired) ||
		errors.Is(err, nats.ErrAuthRevoked) || errors.Is(err, nats.ErrAccountAuthExpired) {
		return true
	}
	return strings.Contains(strings.ToLower(err.Error()), "authorization violation")
}

// authLog logs authorization refusals once per episode, with a count in
// the debug lines that follow.
type authLog struct {
	mu    sync.Mutex
	count int
}

func (a *authLog) log(log zerolog.Logger, err error) {
	a.mu.Lock()
	a.count++
	n := a.count
	a.mu.Unlock()
	ev := log.Debug()
	if n == 1 {
		ev = log.Error()
	}
	ev.Err(err).Int("refusals", n).
		Msg("NATS authorization refused: check nats.user/password, token, creds_file or nkey_seed_file; retrying for ever with backoff")
}

// reset ends an episode of refusals.
func (a *authLog) reset(log zerolog.Logger) {
	a.mu.Lock()
	n := a.count
	a.count = 0
	a.mu.Unlock()
	if n > 0 {
		log.Info().Int("refusals", n).Msg("NATS authorization accepted again")
	}
}
