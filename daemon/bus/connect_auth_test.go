package bus

import (
	"bytes"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"trapline/internal/freeport"
)

type syncBuf struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuf) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuf) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}

func startUserServer(t *testing.T, port int, user, password string) *server.Server {
	t.Helper()
	srv, err := server.NewServer(&server.Options{
		Host: "127.0.0.1", Port: port, NoSigs: true, NoLog: true,
		Users: []*server.User{{Username: user, Password: password}},
	})
	if err != nil {
		t.Fatal(err)
	}
	srv.Start()
	if !srv.ReadyForConnections(10 * time.Second) {
		t.Fatal("server not ready")
	}
	return srv
}

// TestConnectRetriesAuthorizationForEver: the client starts with
// credentials the server refuses, keeps trying through many refusals
// (nats.go would close the connection after the second), says
// "authorization" in its log, and connects within 5 s once the server is
// restarted with its credentials.
func TestConnectRetriesAuthorizationForEver(t *testing.T) {
	port := freeport.Take(t)
	srv := startUserServer(t, port, "trapline", "not-what-the-client-has")
	var logBuf syncBuf
	nc, err := Connect(ClientOptions{
		URL: "nats://127.0.0.1:" + strconv.Itoa(port), User: "trapline", Password: "s3cret",
		ReconnectWait: 200 * time.Millisecond,
	}, zerolog.New(&logBuf))
	if err != nil {
		t.Fatalf("connect with refused credentials: %v, want a connection that keeps trying", err)
	}
	defer nc.Close()
	time.Sleep(3 * time.Second) // several refusals
	if st := nc.Status(); st == nats.CLOSED || nc.IsConnected() {
		t.Fatalf("after refusals the connection is %v, want reconnecting", st)
	}
	if !strings.Contains(logBuf.String(), "authorization") {
		t.Errorf("log does not say authorization:\n%s", logBuf.String())
	}
	srv.Shutdown()
	srv.WaitForShutdown()
	fixed := time.Now()
	srv = startUserServer(t, port, "trapline", "s3cret")
	defer func() { srv.Shutdown(); srv.WaitForShutdown() }()
	deadline := fixed.Add(5 * time.Second)
	for !nc.IsConnected() && time.Now().Before(deadline) {
		time.Sleep(50 * time.Millisecond)
	}
	if !nc.IsConnected() {
		t.Fatalf("not connected 5 s after the fix (status %v)", nc.Status())
	}
	t.Logf("connected %v after the server accepted the credentials", time.Since(fixed).Round(10*time.Millisecond))
}
