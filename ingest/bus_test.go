package ingest_test

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"errors"
	"fmt"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/ingest"
)

// TestConnect_Embedded starts the embedded server, checks the connection
// works, that the server logs through zerolog, and that Close is
// idempotent.
func TestConnect_Embedded(t *testing.T) {
	var logs logBuf
	lg := zerolog.New(&logs)
	b, err := ingest.Connect(t.Context(), ingest.BusOptions{Port: -1, StoreDir: t.TempDir(), Logger: &lg, Metrics: ingest.NewMetrics()})
	if err != nil {
		t.Fatal(err)
	}
	sub, err := b.Conn().SubscribeSync("qm.echo")
	if err != nil {
		t.Fatal(err)
	}
	if err := b.Conn().Publish("qm.echo", []byte("x")); err != nil {
		t.Fatal(err)
	}
	if _, err := sub.NextMsg(5 * time.Second); err != nil {
		t.Fatal(err)
	}
	if b.ClientURL() == "" {
		t.Error("ClientURL empty for the embedded server")
	}
	if !logs.has(`"component":"nats-server"`) || !logs.has("Server is ready") {
		t.Errorf("embedded server's start not logged through zerolog:\n%s", logs.b.String())
	}
	if err := b.Close(); err != nil {
		t.Fatal(err)
	}
	if err := b.Close(); err != nil {
		t.Errorf("second Close = %v", err)
	}
}

// TestConnect_PortInUse checks that a port held by another program is
// named in the error, which unwraps to ErrPortInUse.
func TestConnect_PortInUse(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	port := ln.Addr().(*net.TCPAddr).Port
	_, err = ingest.Connect(t.Context(), ingest.BusOptions{Port: port, StoreDir: t.TempDir()})
	var pe *ingest.PortError
	if !errors.Is(err, ingest.ErrPortInUse) || !errors.As(err, &pe) || !strings.Contains(err.Error(), strconv.Itoa(port)) {
		t.Fatalf("Connect on a used port = %v; want a *PortError naming port %d, wrapping ErrPortInUse", err, port)
	}
}

// TestConnect_SaysWhy checks that a connection refused for a reason says
// the reason, not only "connection closed" or a deadline.
func TestConnect_SaysWhy(t *testing.T) {
	pki := newTestPKI(t)
	cases := []struct {
		name   string
		server *server.Options
		bus    ingest.BusOptions
		want   []string // any of these in the error
	}{
		{"wrong password",
			&server.Options{Username: "driftfit", Password: "right"},
			ingest.BusOptions{User: "driftfit", PasswordEnv: "QM_PW", Getenv: func(string) string { return "wrong" }},
			[]string{"authorization violation"}},
		{"unknown CA",
			&server.Options{TLSConfig: pki.serverTLS(t, false)},
			ingest.BusOptions{CAFile: pki.otherCA},
			[]string{"unknown authority"}},
		{"no client certificate",
			&server.Options{TLSConfig: pki.serverTLS(t, true)},
			ingest.BusOptions{CAFile: pki.ca},
			// The TLS alert, or the closed connection if it comes first,
			// with the hint.
			[]string{"certificate required", "bad certificate", "no client certificate is configured"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			c.server.StoreDir = t.TempDir()
			ns := natsServerWith(t, c.server)
			defer ns.Shutdown()
			c.bus.Servers = []string{fmt.Sprintf("nats://127.0.0.1:%d", ns.Addr().(*net.TCPAddr).Port)}
			c.bus.ReconnectWait = 100 * time.Millisecond
			ctx, cancel := context.WithTimeout(t.Context(), 3*time.Second)
			defer cancel()
			b, err := ingest.Connect(ctx, c.bus)
			if err == nil {
				b.Close()
				t.Fatal("Connect succeeded")
			}
			ok := false
			for _, w := range c.want {
				ok = ok || strings.Contains(strings.ToLower(err.Error()), w)
			}
			if !ok {
				t.Errorf("Connect = %v; want it to say %q", err, c.want)
			}
			t.Logf("Connect = %v", err)
		})
	}
}

// TestConnect_RetriesAtStart starts the bus 1.5 s after Connect and checks
// Connect waits for it, logging each failed attempt.
func TestConnect_RetriesAtStart(t *testing.T) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	port := ln.Addr().(*net.TCPAddr).Port
	ln.Close()
	var logs logBuf
	lg := zerolog.New(&logs)
	go func() {
		time.Sleep(1500 * time.Millisecond)
		ns := natsServerWith(t, &server.Options{Port: port, StoreDir: t.TempDir()})
		t.Cleanup(ns.Shutdown)
	}()
	ctx, cancel := context.WithTimeout(t.Context(), 20*time.Second)
	defer cancel()
	b, err := ingest.Connect(ctx, ingest.BusOptions{Servers: []string{fmt.Sprintf("nats://127.0.0.1:%d", port)}, ReconnectWait: 200 * time.Millisecond, Logger: &lg})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	if !b.Conn().IsConnected() {
		t.Fatal("Connect returned before connecting")
	}
	if !logs.has("bus connection attempt failed") || !logs.has("connection refused") {
		t.Errorf("no failed attempt logged with its reason:\n%s", logs.b.String())
	}
}

// testPKI is a CA with a server certificate for 127.0.0.1, and a second,
// unrelated CA; PEM files in a temp dir.
type testPKI struct {
	ca, otherCA, cert, key string
}

func newTestPKI(t *testing.T) *testPKI {
	t.Helper()
	dir := t.TempDir()
	write := func(name, typ string, der []byte) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der}), 0o600); err != nil {
			t.Fatal(err)
		}
		return p
	}
	newCA := func(name string) (*x509.Certificate, *ecdsa.PrivateKey, string) {
		key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
		if err != nil {
			t.Fatal(err)
		}
		tmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: name}, IsCA: true, BasicConstraintsValid: true,
			KeyUsage: x509.KeyUsageCertSign, NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour)}
		der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
		if err != nil {
			t.Fatal(err)
		}
		cert, err := x509.ParseCertificate(der)
		if err != nil {
			t.Fatal(err)
		}
		return cert, key, write(name+".pem", "CERTIFICATE", der)
	}
	ca, caKey, caFile := newCA("Quillmere Vale test CA")
	_, _, otherFile := newCA("Other test CA")
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{SerialNumber: big.NewInt(2), Subject: pkix.Name{CommonName: "127.0.0.1"}, IPAddresses: []net.IP{net.IPv4(127, 0, 0, 1)},
		ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}, KeyUsage: x509.KeyUsageDigitalSignature,
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour)}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, ca, &key.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	kder, err := x509.MarshalECPrivateKey(key)
	if err != nil {
		t.Fatal(err)
	}
	return &testPKI{ca: caFile, otherCA: otherFile, cert: write("server.pem", "CERTIFICATE", der), key: write("server-key.pem", "EC PRIVATE KEY", kder)}
}

// serverTLS is the server's TLS configuration; verify demands a client
// certificate signed by the CA.
func (p *testPKI) serverTLS(t *testing.T, verify bool) *tls.Config {
	t.Helper()
	cfg, err := server.GenTLSConfig(&server.TLSConfigOpts{CertFile: p.cert, KeyFile: p.key, CaFile: p.ca, Verify: verify})
	if err != nil {
		t.Fatal(err)
	}
	return cfg
}

// TestServerLogger_CountsDrops floods a stream whose server buffers at
// most 10 inbound messages with core NATS publishes (no
// acknowledgements), and checks that the server's drop warnings reach the
// log and the ServerLog metric.
func TestServerLogger_CountsDrops(t *testing.T) {
	ns := natsServerWith(t, &server.Options{StoreDir: t.TempDir(), StreamMaxBufferedMsgs: 10})
	defer ns.Shutdown()
	var logs logBuf
	m := ingest.NewMetrics()
	ns.SetLogger(ingest.NewServerLogger(zerolog.New(&logs), m), false, false)
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, err := nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	if _, err := js.AddStream(&nats.StreamConfig{Name: "FLOOD", Subjects: []string{"qm.flood.>"}}); err != nil {
		t.Fatal(err)
	}
	payload := []byte(`{"t":1796026500,"v":1003.2}`)
	for range 200000 {
		if err := nc.Publish("qm.flood.pt-1", payload); err != nil {
			t.Fatal(err)
		}
	}
	if err := nc.Flush(); err != nil {
		t.Fatal(err)
	}
	info, err := js.StreamInfo("FLOOD")
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("stream kept %d of 200000", info.State.Msgs)
	if info.State.Msgs == 200000 {
		t.Skip("the server kept up with the flood; nothing dropped to see")
	}
	waitFor(t, "drop warning counted", func() bool { return counter(t, m, "warn") > 0 })
	if !logs.has("Dropping messages due to excessive stream ingest rate") {
		t.Errorf("drop warning not in the log:\n%s", logs.b.String())
	}
}

func counter(t *testing.T, m *ingest.Metrics, level string) float64 {
	t.Helper()
	return counterValue(t, m.ServerLog.WithLabelValues(level))
}
