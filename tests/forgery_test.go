package tests

import (
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
)

// checkForgeryRefused publishes, as a client that is not the daemon (no
// credentials), a forged "cleared" of alarm id on the alert subject, and
// records on the breath and status subjects of the stream: the daemon's
// embedded server refuses every one with a permissions violation.
func checkForgeryRefused(t *testing.T, url, stream, id string) {
	t.Helper()
	var mu sync.Mutex
	var refused []string
	nc, err := nats.Connect(url, nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) {
		mu.Lock()
		refused = append(refused, err.Error())
		mu.Unlock()
	}))
	if err != nil {
		t.Fatalf("observer connection: %v", err)
	}
	defer nc.Close()
	forged := `{"type":"alert","schema":1,"id":"` + id + `","stream":"` + stream +
		`","condition":"air-trapping","class":"physiological","priority":"low","state":"cleared","t_s":1,"evidence":{},"message":"forged"}`
	subjects := []string{"trapline.alert." + stream, "trapline.breath." + stream, "trapline.status." + stream}
	for _, s := range subjects {
		if err := nc.Publish(s, []byte(forged)); err != nil {
			t.Fatal(err)
		}
	}
	_ = nc.Flush()
	waitFor(t, 5*time.Second, "the server to refuse the forged messages", func() bool {
		mu.Lock()
		defer mu.Unlock()
		return len(refused) >= len(subjects)
	})
	mu.Lock()
	defer mu.Unlock()
	for _, r := range refused {
		if !strings.Contains(strings.ToLower(r), "permissions violation") {
			t.Errorf("forged publish: %s, want a permissions violation", r)
		}
	}
	t.Logf("forged publishes refused: %s", refused[0])
}
