package bus

import (
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"

	"github.com/nats-io/nats-server/v2/server"
	"golang.org/x/crypto/bcrypt"

	"trapline/alerts"
)

// Identity is the daemon's own login on its embedded server: the only one
// that may publish records (alerts, breaths, status, samples).
type Identity struct {
	User     string `json:"user"`
	Password string `json:"password"`
}

// IdentityFile is the name of the identity file in the data directory.
const IdentityFile = "nats-identity.json"

// ObserverUser is the login of every client that connects to the embedded
// server without credentials: it may subscribe, read JetStream, and send
// acknowledgement requests, and nothing else.
const ObserverUser = "observer"

// LoadOrCreateIdentity reads the identity in dir, or makes one with a
// random password on first start and keeps it there, readable by the owner
// only (0600).
func LoadOrCreateIdentity(dir string) (Identity, error) {
	p := filepath.Join(dir, IdentityFile)
	data, err := os.ReadFile(p)
	if err == nil {
		var id Identity
		if err := json.Unmarshal(data, &id); err != nil || id.User == "" || id.Password == "" {
			return Identity{}, fmt.Errorf("nats identity %s: unreadable (delete it to make a new one): %v", p, err)
		}
		return id, nil
	}
	if !errors.Is(err, fs.ErrNotExist) {
		return Identity{}, fmt.Errorf("nats identity: %w", err)
	}
	var b [24]byte
	if _, err := rand.Read(b[:]); err != nil {
		return Identity{}, fmt.Errorf("nats identity: %w", err)
	}
	id := Identity{User: "trapline-daemon", Password: hex.EncodeToString(b[:])}
	data, _ = json.Marshal(id)
	if err := os.MkdirAll(dir, 0o750); err != nil {
		return Identity{}, fmt.Errorf("nats identity: %w", err)
	}
	if err := os.WriteFile(p, data, 0o600); err != nil {
		return Identity{}, fmt.Errorf("nats identity: %w", err)
	}
	return id, nil
}

// ObserverPermissions is what a client other than the daemon may do on
// the embedded server: subscribe to anything; publish acknowledgement
// requests, and the JetStream API calls that read the streams through
// consumers (watch, export) and direct gets; never a record subject.
func ObserverPermissions(prefix string) *server.Permissions {
	subj := alerts.Subjects{Prefix: prefix}
	return &server.Permissions{
		Publish: &server.SubjectPermission{
			Allow: []string{
				subj.All(alerts.KindAck),
				"$JS.API.INFO",
				"$JS.API.STREAM.INFO.*", "$JS.API.STREAM.NAMES", "$JS.API.STREAM.LIST",
				"$JS.API.STREAM.MSG.GET.*", "$JS.API.DIRECT.GET.>",
				"$JS.API.CONSUMER.CREATE.>", "$JS.API.CONSUMER.INFO.>", "$JS.API.CONSUMER.DELETE.>",
				"$JS.API.CONSUMER.MSG.NEXT.>", "$JS.API.CONSUMER.NAMES.*", "$JS.API.CONSUMER.LIST.*",
				"$JS.ACK.>", "$JS.FC.>",
			},
			Deny: []string{
				subj.All(alerts.KindAlert), subj.All(alerts.KindBreath),
				subj.All(alerts.KindStatus), subj.All(alerts.KindSamples),
			},
		},
		Subscribe: &server.SubjectPermission{Allow: []string{">"}},
	}
}

// authorize sets the server's users: the daemon's identity with every
// permission, and the observer, which clients without credentials become.
func authorize(so *server.Options, id Identity, prefix string) error {
	h, err := bcrypt.GenerateFromPassword([]byte(id.Password), bcrypt.MinCost)
	if err != nil {
		return fmt.Errorf("embedded nats identity: %w", err)
	}
	// The observer has no password: clients become the observer by
	// sending no credentials at all, or user "observer" without one.
	so.Users = []*server.User{
		{Username: id.User, Password: string(h)},
		{Username: ObserverUser, Permissions: ObserverPermissions(prefix)},
	}
	so.NoAuthUser = ObserverUser
	return nil
}
