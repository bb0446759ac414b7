package bus

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/json"
	"encoding/pem"
	"errors"
	"fmt"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"

	"trapline/alerts"
)

// startTestEmbedded starts the embedded server on a free loopback port with
// its store in a temporary directory and stops it at the end of the test.
func startTestEmbedded(t *testing.T, o EmbeddedOptions) *Embedded {
	t.Helper()
	if o.StoreDir == "" {
		o.StoreDir = filepath.Join(t.TempDir(), "nats")
	}
	o.MaxStoreBytes = 256 << 20
	e, err := StartEmbedded(o, zerolog.New(zerolog.NewTestWriter(t)).Level(zerolog.InfoLevel))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		if err := e.Shutdown(30 * time.Second); err != nil {
			t.Error(err)
		}
	})
	return e
}

// natsTestStreams keeps the capped breaths stream inside the test
// server's 256 MiB store (JetStream reserves MaxBytes at creation).
func natsTestStreams() alerts.StreamsConfig {
	return alerts.StreamsConfig{BreathsMaxBytes: 32 << 20}
}

func natsTestEvent(stream string, n int, st alerts.State) alerts.Event {
	seq := 40 + n
	return alerts.Event{
		ID: fmt.Sprintf("%s/air-trapping/%d", stream, n), Stream: stream,
		Condition: "air-trapping", Class: "physiological", Priority: alerts.Medium, State: st,
		Time: time.Date(2026, 12, 1, 10, 0, 3, 200_000_000, time.UTC),
		TS:   54.2, BreathSeq: &seq,
		Evidence: map[string]float64{"eef_lpm": 11.8, "peepi_cmh2o": 6.8, "trapped_ml": 410, "te_over_tau": 0.85},
		Message:  "expiratory flow has not returned to zero for 5 of the last 6 breaths",
		Predict:  map[string]float64{"te_s_for_trapped_below_50ml": 5.0},
	}
}

func TestEmbeddedNATSCheck(t *testing.T) {
	for _, tc := range []struct {
		name string
		o    EmbeddedOptions
		want string // part of the error, "" for none
	}{
		{"loopback", EmbeddedOptions{Host: "127.0.0.1", StoreDir: "x"}, ""},
		{"ipv6 loopback", EmbeddedOptions{Host: "::1", StoreDir: "x"}, ""},
		{"localhost", EmbeddedOptions{Host: "localhost", StoreDir: "x"}, ""},
		{"in-process only on any host", EmbeddedOptions{Host: "0.0.0.0", Port: -1, StoreDir: "x"}, ""},
		{"all interfaces, nothing", EmbeddedOptions{Host: "0.0.0.0", StoreDir: "x"}, "without TLS and authentication"},
		{"lan, auth without tls", EmbeddedOptions{Host: "192.0.2.7", User: "u", Password: "p", StoreDir: "x"}, "without TLS and authentication"},
		{"lan, tls without auth", EmbeddedOptions{Host: "192.0.2.7", TLS: TLS{CertFile: "c", KeyFile: "k"}, StoreDir: "x"}, "without TLS and authentication"},
		{"lan, tls and token", EmbeddedOptions{Host: "192.0.2.7", Token: "t", TLS: TLS{CertFile: "c", KeyFile: "k"}, StoreDir: "x"}, ""},
		{"empty store", EmbeddedOptions{Host: "127.0.0.1"}, "empty JetStream store"},
		{"user without password", EmbeddedOptions{Host: "127.0.0.1", User: "u", StoreDir: "x"}, "go together"},
		{"user and token", EmbeddedOptions{Host: "127.0.0.1", User: "u", Password: "p", Token: "t", StoreDir: "x"}, "not both"},
		{"port out of range", EmbeddedOptions{Host: "127.0.0.1", Port: 70000, StoreDir: "x"}, "out of range"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			err := tc.o.check()
			switch {
			case tc.want == "" && err != nil:
				t.Errorf("unexpected error %v", err)
			case tc.want != "" && (err == nil || !strings.Contains(err.Error(), tc.want)):
				t.Errorf("error %v, want one containing %q", err, tc.want)
			}
		})
	}
}

func TestEmbeddedNATSPortInUse(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	port := ln.Addr().(*net.TCPAddr).Port
	_, err = StartEmbedded(EmbeddedOptions{Host: "127.0.0.1", Port: port, StoreDir: t.TempDir()}, zerolog.Nop())
	want := fmt.Sprintf("nats listen 127.0.0.1:%d: address already in use", port)
	if err == nil || err.Error() != want {
		t.Fatalf("error %v, want %q", err, want)
	}
	if !errors.Is(err, syscall.EADDRINUSE) {
		t.Errorf("error does not wrap EADDRINUSE")
	}
}

// TestEmbeddedNATSStoreLocked: nats-server would let a second server open
// the same JetStream directory; trapline refuses, and frees it on shutdown.
func TestEmbeddedNATSStoreLocked(t *testing.T) {
	store := filepath.Join(t.TempDir(), "nats")
	first, err := StartEmbedded(EmbeddedOptions{StoreDir: store}, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	second, err := StartEmbedded(EmbeddedOptions{StoreDir: store}, zerolog.Nop())
	if !errors.Is(err, ErrStoreLocked) {
		if second != nil {
			_ = second.Shutdown(10 * time.Second)
		}
		t.Fatalf("second server on the same store: %v, want ErrStoreLocked", err)
	}
	if err := first.Shutdown(30 * time.Second); err != nil {
		t.Fatal(err)
	}
	third, err := StartEmbedded(EmbeddedOptions{StoreDir: store}, zerolog.Nop())
	if err != nil {
		t.Fatalf("after the first shut down: %v", err)
	}
	ctx, cancel := context.WithCancel(t.Context())
	done := make(chan error, 1)
	go func() { done <- third.Run(ctx) }()
	cancel()
	select {
	case err := <-done:
		if err != nil {
			t.Fatal(err)
		}
	case <-time.After(30 * time.Second):
		t.Fatal("Run did not return 30 s after cancel")
	}
	if third.Server().Running() {
		t.Error("server still running after Run returned")
	}
}

func TestEmbeddedNATSStartsJetStream(t *testing.T) {
	for _, tc := range []struct {
		name string
		port int
	}{
		{"random loopback port", 0},
		{"in-process only", -1},
	} {
		t.Run(tc.name, func(t *testing.T) {
			store := filepath.Join(t.TempDir(), "js")
			e := startTestEmbedded(t, EmbeddedOptions{Port: tc.port, StoreDir: store})
			if tc.port == -1 && e.URL() != "" {
				t.Errorf("in-process server shows URL %q", e.URL())
			}
			if tc.port == 0 && !strings.HasPrefix(e.URL(), "nats://127.0.0.1:") {
				t.Errorf("URL %q, want nats://127.0.0.1:<port>", e.URL())
			}
			nc, err := e.connect("test", zerolog.Nop())
			if err != nil {
				t.Fatal(err)
			}
			defer nc.Close()
			js, _ := jetstream.New(nc)
			if err := alerts.EnsureStreams(t.Context(), js, natsTestStreams()); err != nil {
				t.Fatal(err)
			}
			if _, err := os.Stat(filepath.Join(store, "jetstream")); err != nil {
				t.Errorf("JetStream not stored under the store directory: %v", err)
			}
		})
	}
}

// TestAlertSubscriptionLikeCLI is the Go equivalent of
// `nats sub 'trapline.alert.>'` against the embedded server: a published
// alert arrives on trapline.alert.<stream> as the alert event contract, with
// its de-duplication id in the Nats-Msg-Id header.
func TestAlertSubscriptionLikeCLI(t *testing.T) {
	e := startTestEmbedded(t, EmbeddedOptions{})
	sub, err := nats.Connect(e.URL())
	if err != nil {
		t.Fatal(err)
	}
	defer sub.Close()
	msgs := make(chan *nats.Msg, 4)
	if _, err := sub.ChanSubscribe("trapline.alert.>", msgs); err != nil {
		t.Fatal(err)
	}
	if err := sub.Flush(); err != nil {
		t.Fatal(err)
	}

	nc, err := e.connect("trapline", zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, _ := jetstream.New(nc)
	cfg := natsTestStreams()
	if err := alerts.EnsureStreams(t.Context(), js, cfg); err != nil {
		t.Fatal(err)
	}
	sp, err := alerts.OpenSpool(t.TempDir(), 0)
	if err != nil {
		t.Fatal(err)
	}
	p, err := alerts.NewPublisher(nc, sp, alerts.PublisherOptions{Streams: cfg})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(t.Context())
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()
	defer func() { cancel(); <-done; _ = p.Close() }()
	if err := p.Publish(ctx, natsTestEvent("bench-a", 3, alerts.Raised)); err != nil {
		t.Fatal(err)
	}
	select {
	case m := <-msgs:
		if m.Subject != "trapline.alert.bench-a" {
			t.Errorf("subject %q", m.Subject)
		}
		if h := m.Header.Get("Nats-Msg-Id"); h != "bench-a/air-trapping/3#raised" {
			t.Errorf("Nats-Msg-Id %q", h)
		}
		var got map[string]any
		if err := json.Unmarshal(m.Data, &got); err != nil {
			t.Fatal(err)
		}
		// The fields of the alert event contract (docs/schema/alert.schema.json).
		for k, want := range map[string]any{
			"type": "alert", "schema": 2.0, "id": "bench-a/air-trapping/3", "stream": "bench-a",
			"condition": "air-trapping", "class": "physiological", "priority": "medium",
			"state": "raised", "time": "2026-12-01T10:00:03.2Z", "t_s": 54.2, "breath_seq": 43.0,
		} {
			if got[k] != want {
				t.Errorf("%s = %v, want %v", k, got[k], want)
			}
		}
		t.Logf("[#1] Received on %q\nNats-Msg-Id: %s\n\n%s", m.Subject, m.Header.Get("Nats-Msg-Id"), m.Data)
	case <-time.After(10 * time.Second):
		t.Fatal("no alert on trapline.alert.> within 10 s")
	}
}

// TestEmbeddedNATSOutage runs the delivery stack on the embedded server: the
// server stops while alerts are raised and starts again on the same port and
// store; every alert is stored exactly once, in order.
func TestEmbeddedNATSOutage(t *testing.T) {
	log := zerolog.New(zerolog.NewTestWriter(t)).Level(zerolog.WarnLevel)
	o := startOutageNATS(t, log)
	e, store, port, nc, js := o.srv, o.store, o.port, o.nc, o.js
	cfg := natsTestStreams()
	var err error
	sp, err := alerts.OpenSpool(filepath.Join(t.TempDir(), "spool"), 0)
	if err != nil {
		t.Fatal(err)
	}
	p, err := alerts.NewPublisher(nc, sp, alerts.PublisherOptions{Streams: cfg, Log: log,
		RequestTimeout: 300 * time.Millisecond, RetryMin: 20 * time.Millisecond, RetryMax: 200 * time.Millisecond})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(t.Context())
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()

	var want []string
	raise := func(from, to int) {
		for i := from; i < to; i++ {
			ev := natsTestEvent("bed-3", i, alerts.Raised)
			if err := p.Publish(ctx, ev); err != nil {
				t.Fatal(err)
			}
			want = append(want, ev.DedupID())
			time.Sleep(10 * time.Millisecond)
		}
	}
	raise(0, 30)
	if err := e.Shutdown(30 * time.Second); err != nil {
		t.Fatal(err)
	}
	raise(30, 130) // about a second of outage
	if p.Depth() == 0 {
		t.Fatal("nothing spooled during the outage")
	}
	e, err = StartEmbedded(EmbeddedOptions{Port: port, StoreDir: store, MaxStoreBytes: 256 << 20}, log)
	if err != nil {
		t.Fatalf("restart on port %d: %v", port, err)
	}
	defer e.Shutdown(30 * time.Second)
	raise(130, 150)
	deadline := time.Now().Add(30 * time.Second)
	for p.Depth() > 0 && time.Now().Before(deadline) {
		time.Sleep(20 * time.Millisecond)
	}
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	_ = p.Close()

	st, err := js.Stream(t.Context(), cfg.WithDefaults().Alerts)
	if err != nil {
		t.Fatal(err)
	}
	info, err := st.Info(t.Context())
	if err != nil {
		t.Fatal(err)
	}
	if info.State.Msgs != uint64(len(want)) {
		t.Errorf("stream holds %d alerts, want %d", info.State.Msgs, len(want))
	}
	for i := range want {
		m, err := st.GetMsg(t.Context(), info.State.FirstSeq+uint64(i))
		if err != nil {
			t.Fatalf("message %d: %v", i, err)
		}
		if id := m.Header.Get("Nats-Msg-Id"); id != want[i] {
			t.Fatalf("stream position %d holds %s, want %s", i, id, want[i])
		}
	}
}

// TestEmbeddedNATSTLSAndAuth starts the server with TLS, client
// certificates and a user, on loopback, and checks who gets in.
func TestEmbeddedNATSTLSAndAuth(t *testing.T) {
	dir := t.TempDir()
	pki := writeNATSTestPKI(t, dir)
	e := startTestEmbedded(t, EmbeddedOptions{
		User: "trapline", Password: "s3cret-bench",
		TLS: TLS{CAFile: pki.ca, CertFile: pki.serverCert, KeyFile: pki.serverKey},
	})
	if !strings.HasPrefix(e.URL(), "tls://127.0.0.1:") {
		t.Fatalf("URL %q, want tls://", e.URL())
	}
	good := ClientOptions{URL: e.URL(), Name: "t", User: "trapline", Password: "s3cret-bench",
		TLS: TLS{CAFile: pki.ca, CertFile: pki.clientCert, KeyFile: pki.clientKey}}
	for _, tc := range []struct {
		name   string
		mutate func(o *ClientOptions)
		ok     bool
	}{
		{"user, password and client certificate", func(*ClientOptions) {}, true},
		{"the daemon's own connection", func(o *ClientOptions) { *o = e.ClientOptions("trapline") }, true},
		{"wrong password", func(o *ClientOptions) { o.Password = "guess" }, false},
		{"no client certificate", func(o *ClientOptions) { o.TLS.CertFile, o.TLS.KeyFile = "", "" }, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			o := good
			tc.mutate(&o)
			nc, err := Connect(o, zerolog.Nop())
			if err != nil {
				t.Fatal(err)
			}
			defer nc.Close()
			// RetryOnFailedConnect: a refused client keeps trying; give
			// a good one a bounded time to get in.
			deadline := time.Now().Add(3 * time.Second)
			for !nc.IsConnected() && time.Now().Before(deadline) && tc.ok {
				time.Sleep(20 * time.Millisecond)
			}
			if !tc.ok {
				time.Sleep(500 * time.Millisecond)
			}
			if nc.IsConnected() != tc.ok {
				t.Errorf("connected %v, want %v", nc.IsConnected(), tc.ok)
			}
		})
	}
}

// TestEmbeddedNATSTLSWithoutClientCerts: TLS with a token and no client
// certificates; the daemon reaches its own server by trusting the server's
// certificate, and a client without the CA cannot verify the server.
func TestEmbeddedNATSTLSWithoutClientCerts(t *testing.T) {
	pki := writeNATSTestPKI(t, t.TempDir())
	e := startTestEmbedded(t, EmbeddedOptions{Token: "bench-token-7",
		TLS: TLS{CertFile: pki.serverCert, KeyFile: pki.serverKey}})
	for _, tc := range []struct {
		name string
		o    ClientOptions
		ok   bool
	}{
		{"the daemon's own connection", e.ClientOptions("trapline"), true},
		{"a client with the CA", ClientOptions{URL: e.URL(), Token: "bench-token-7", TLS: TLS{CAFile: pki.ca}}, true},
		{"a client trusting only the system pool", ClientOptions{URL: e.URL(), Token: "bench-token-7"}, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			nc, err := Connect(tc.o, zerolog.Nop())
			if err != nil {
				t.Fatal(err)
			}
			defer nc.Close()
			deadline := time.Now().Add(3 * time.Second)
			for !nc.IsConnected() && time.Now().Before(deadline) && tc.ok {
				time.Sleep(20 * time.Millisecond)
			}
			if !tc.ok {
				time.Sleep(500 * time.Millisecond)
			}
			if nc.IsConnected() != tc.ok {
				t.Errorf("connected %v, want %v", nc.IsConnected(), tc.ok)
			}
		})
	}
}

type natsTestPKI struct{ ca, serverCert, serverKey, clientCert, clientKey string }

// writeNATSTestPKI writes a throw-away CA, a server certificate for 127.0.0.1
// and a client certificate, all ECDSA P-256.
func writeNATSTestPKI(t *testing.T, dir string) natsTestPKI {
	t.Helper()
	caKey, _ := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	caTmpl := &x509.Certificate{
		SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "trapline test CA"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
		IsCA: true, BasicConstraintsValid: true, KeyUsage: x509.KeyUsageCertSign,
	}
	caDER, err := x509.CreateCertificate(rand.Reader, caTmpl, caTmpl, &caKey.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	caCert, _ := x509.ParseCertificate(caDER)
	write := func(name, typ string, der []byte) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der}), 0o600); err != nil {
			t.Fatal(err)
		}
		return p
	}
	leaf := func(serial int64, cn string, usage []x509.ExtKeyUsage, ips []net.IP) (certPath, keyPath string) {
		k, _ := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
		tmpl := &x509.Certificate{
			SerialNumber: big.NewInt(serial), Subject: pkix.Name{CommonName: cn},
			NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
			KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: usage, IPAddresses: ips,
		}
		der, err := x509.CreateCertificate(rand.Reader, tmpl, caCert, &k.PublicKey, caKey)
		if err != nil {
			t.Fatal(err)
		}
		kder, _ := x509.MarshalECPrivateKey(k)
		return write(cn+".pem", "CERTIFICATE", der), write(cn+"-key.pem", "EC PRIVATE KEY", kder)
	}
	p := natsTestPKI{ca: write("ca.pem", "CERTIFICATE", caDER)}
	// The server certificate also allows client authentication: the daemon
	// connects to its own server with it.
	p.serverCert, p.serverKey = leaf(2, "server", []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth, x509.ExtKeyUsageClientAuth}, []net.IP{net.IPv4(127, 0, 0, 1)})
	p.clientCert, p.clientKey = leaf(3, "client", []x509.ExtKeyUsage{x509.ExtKeyUsageClientAuth}, nil)
	return p
}

// outageNATS is an embedded server with JetStream on a store that a test
// can shut down and start again on the same port, a client that reconnects
// quickly, and the default streams created.
type outageNATS struct {
	srv   *Embedded
	store string
	port  int
	nc    *nats.Conn
	js    jetstream.JetStream
}

func startOutageNATS(t *testing.T, log zerolog.Logger) outageNATS {
	t.Helper()
	o := outageNATS{store: filepath.Join(t.TempDir(), "nats")}
	var err error
	o.srv, err = StartEmbedded(EmbeddedOptions{StoreDir: o.store, MaxStoreBytes: 256 << 20}, log)
	if err != nil {
		t.Fatal(err)
	}
	o.port = o.srv.srv.Addr().(*net.TCPAddr).Port
	co := o.srv.ClientOptions("trapline")
	co.ReconnectWait = 50 * time.Millisecond
	o.nc, err = Connect(co, log)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(o.nc.Close)
	o.js, _ = jetstream.New(o.nc)
	if err := alerts.EnsureStreams(t.Context(), o.js, natsTestStreams()); err != nil {
		t.Fatal(err)
	}
	return o
}
