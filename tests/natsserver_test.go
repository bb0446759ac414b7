package tests

import (
	"strconv"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"

	"trapline/internal/freeport"
)

// natsServer is an in-process nats-server with JetStream on a fixed loopback
// port and store directory, so that a test can stop it (an outage) and start
// it again on the same address and data, the way an operator restarts one.
type natsServer struct {
	t     *testing.T
	port  int
	store string
	ns    *server.Server
}

// startNATS starts a server on a free loopback port with its store in a
// fresh temporary directory; it is shut down at the end of the test.
func startNATS(t *testing.T) *natsServer {
	t.Helper()
	s := &natsServer{t: t, port: freeport.Take(t), store: t.TempDir()}
	s.start()
	t.Cleanup(s.stop)
	return s
}

// URL is the client URL of the server.
func (s *natsServer) URL() string { return "nats://127.0.0.1:" + strconv.Itoa(s.port) }

// start (re)starts the server on its port and store.
func (s *natsServer) start() {
	s.t.Helper()
	ns, err := server.NewServer(&server.Options{
		ServerName: "tests", Host: "127.0.0.1", Port: s.port, NoSigs: true, NoLog: true,
		JetStream: true, StoreDir: s.store, SyncAlways: true,
		JetStreamMaxStore: 256 << 20, JetStreamMaxMemory: 32 << 20,
	})
	if err != nil {
		s.t.Fatalf("nats-server: %v", err)
	}
	ns.Start()
	if !ns.ReadyForConnections(10 * time.Second) {
		s.t.Fatal("nats-server not ready within 10 s")
	}
	deadline := time.Now().Add(10 * time.Second)
	for !ns.JetStreamEnabled() {
		if time.Now().After(deadline) {
			s.t.Fatal("JetStream not enabled within 10 s")
		}
		time.Sleep(10 * time.Millisecond)
	}
	s.ns = ns
}

// stop shuts the server down and waits until it has stopped; stopping a
// stopped server does nothing.
func (s *natsServer) stop() {
	if s.ns == nil {
		return
	}
	s.ns.Shutdown()
	s.ns.WaitForShutdown()
	s.ns = nil
}

// waitFor polls cond every 20 ms for at most d.
func waitFor(t *testing.T, d time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(d)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %v waiting for %s", d, what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}
