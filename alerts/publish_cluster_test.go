package alerts

import (
	"fmt"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"trapline/internal/freeport"
)

// startTestCluster starts three JetStream servers in process, clustered over
// loopback routes, and waits (bounded) for a meta leader with every node
// current. The route ports must be known before the servers start (each
// names the others), so they are taken free a moment before; another
// process may bind one in between, and a node that cannot listen never
// becomes ready. The cluster is then started again on other ports, at most
// three times.
func startTestCluster(t *testing.T) []*server.Server {
	t.Helper()
	var srvs []*server.Server
	for attempt := 1; srvs == nil; attempt++ {
		var err error
		srvs, err = tryTestCluster(t)
		if err != nil {
			if attempt == 3 {
				t.Fatalf("cluster: %v (three attempts)", err)
			}
			t.Logf("cluster attempt %d: %v; again on other ports", attempt, err)
		}
	}
	for _, s := range srvs {
		t.Cleanup(func() { s.Shutdown(); waitShutdown(t, s) })
	}
	waitFor(t, 30*time.Second, "a JetStream meta leader with every node current", func() bool {
		leader := false
		for _, s := range srvs {
			if !s.Running() {
				continue
			}
			leader = leader || s.JetStreamIsLeader()
			if !s.JetStreamIsCurrent() {
				return false
			}
		}
		return leader
	})
	return srvs
}

// tryTestCluster starts the three servers on route ports free a moment ago
// and waits for each to be ready; when one is not, it shuts them all down
// and says which.
func tryTestCluster(t *testing.T) ([]*server.Server, error) {
	const n = 3
	routePorts := make([]int, n)
	var routes []string
	for i := range routePorts {
		routePorts[i] = freeport.Take(t)
		routes = append(routes, fmt.Sprintf("nats-route://127.0.0.1:%d", routePorts[i]))
	}
	var srvs []*server.Server
	stopAll := func() {
		for _, s := range srvs {
			s.Shutdown()
			waitShutdown(t, s)
		}
	}
	for i := range n {
		s, err := server.NewServer(&server.Options{
			ServerName: fmt.Sprintf("node-%d", i), Host: "127.0.0.1", Port: -1,
			JetStream: true, StoreDir: t.TempDir(), SyncAlways: true,
			JetStreamMaxStore: 256 << 20, JetStreamMaxMemory: 16 << 20,
			Cluster: server.ClusterOpts{Name: "trapline-test", Host: "127.0.0.1", Port: routePorts[i]},
			Routes:  server.RoutesFromStr(strings.Join(routes, ",")),
			NoSigs:  true, NoLog: true,
		})
		if err != nil {
			stopAll()
			return nil, fmt.Errorf("node-%d: %w", i, err)
		}
		s.Start()
		srvs = append(srvs, s)
	}
	for i, s := range srvs {
		if !s.ReadyForConnections(10 * time.Second) {
			stopAll()
			return nil, fmt.Errorf("node-%d (route port %d) not ready in 10 s", i, routePorts[i])
		}
	}
	return srvs, nil
}

func waitShutdown(t testing.TB, s *server.Server) {
	done := make(chan struct{})
	go func() { s.WaitForShutdown(); close(done) }()
	select {
	case <-done:
	case <-time.After(30 * time.Second):
		t.Error("cluster node did not shut down in 30 s")
	}
}

// TestPublisherClusterLeaderLoss publishes to three-replica streams on a
// three-node cluster and shuts the alerts stream's leader down in the
// middle: the other two elect a new leader and every alert is stored
// exactly once, in order.
func TestPublisherClusterLeaderLoss(t *testing.T) {
	srvs := startTestCluster(t)
	var urls []string
	for _, s := range srvs {
		urls = append(urls, s.ClientURL())
	}
	nc, err := nats.Connect(strings.Join(urls, ","), nats.MaxReconnects(-1), nats.RetryOnFailedConnect(true),
		nats.ReconnectWait(50*time.Millisecond), nats.ReconnectJitter(0, 0))
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, _ := jetstream.New(nc)
	cfg := testStreams("")
	cfg.Replicas = 3
	var lastErr string
	waitFor(t, 30*time.Second, "R3 streams to be created", func() bool {
		err := EnsureStreams(t.Context(), js, cfg)
		if err != nil && err.Error() != lastErr {
			lastErr = err.Error()
			t.Log(err) // a new leader may need a moment; a lasting error shows here
		}
		return err == nil
	})

	p := newTestPublisher(t, nc, t.TempDir(), PublisherOptions{Streams: cfg})
	stop := runPublisher(t, p)
	defer p.Close()
	var want []string
	raise := func(from, to int) {
		for i := from; i < to; i++ {
			ev := testEvent("bed-c", i, Raised)
			if err := p.Publish(t.Context(), ev); err != nil {
				t.Fatal(err)
			}
			want = append(want, ev.DedupID())
		}
	}
	raise(0, 30)
	waitFor(t, 30*time.Second, "first alerts stored", func() bool { return p.Depth() == 0 })
	var leader *server.Server
	waitFor(t, 30*time.Second, "the alerts stream leader", func() bool {
		for _, s := range srvs {
			if s.JetStreamIsStreamLeader(server.DEFAULT_GLOBAL_ACCOUNT, cfg.WithDefaults().Alerts) {
				leader = s
				return true
			}
		}
		return false
	})
	leader.Shutdown()
	waitShutdown(t, leader)
	raise(30, 80)
	waitFor(t, 60*time.Second, "spool to drain after the leader loss", func() bool { return p.Depth() == 0 })
	stop()
	checkExactlyOnce(t, storedAlerts(t, nc, cfg), want)
	t.Logf("stats after leader loss: %+v", p.Stats())
}
