package mqttpub

import (
	"bytes"
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"fmt"
	"log/slog"
	"math/big"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/interop"
)

// logBuffer collects log lines from several goroutines.
type logBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *logBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *logBuffer) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

// count returns the number of log lines containing s.
func (l *logBuffer) count(s string) int {
	n := 0
	for _, line := range strings.Split(l.String(), "\n") {
		if strings.Contains(line, s) {
			n++
		}
	}
	return n
}

func waitUntil(t *testing.T, what string, within time.Duration, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(within)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %s waiting for %s", within, what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// mosquitto is a broker started for one test.
type mosquitto struct {
	url string
}

// startMosquitto runs mosquitto with the given listener lines (the listener
// itself is added) and the user plenum:secret with the ACL line.
func startMosquitto(t *testing.T, dir string, tlsLines string, acl string) *mosquitto {
	t.Helper()
	paths := interop.Need(t, "mosquitto", "mosquitto", "mosquitto_passwd")
	pw := filepath.Join(dir, "passwd")
	if out, err := exec.Command(paths[1], "-c", "-b", pw, "plenum", "secret").CombinedOutput(); err != nil {
		t.Fatalf("mosquitto_passwd: %v\n%s", err, out)
	}
	os.Chmod(pw, 0o600)
	aclFile := filepath.Join(dir, "acl")
	if err := os.WriteFile(aclFile, []byte("user plenum\n"+acl+"\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	m := interop.StartMosquitto(t, paths[0], fmt.Sprintf("%sallow_anonymous false\npassword_file %s\nacl_file %s\n", tlsLines, pw, aclFile))
	scheme := "tcp"
	if tlsLines != "" {
		scheme = "ssl"
	}
	return &mosquitto{url: fmt.Sprintf("%s://%s", scheme, m.Addr)}
}

// makeCA returns a self-made CA's certificate and key.
func makeCA(t *testing.T, name string) (*x509.Certificate, *ecdsa.PrivateKey) {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: name},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
		IsCA: true, BasicConstraintsValid: true, KeyUsage: x509.KeyUsageCertSign | x509.KeyUsageDigitalSignature}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	cert, err := x509.ParseCertificate(der)
	if err != nil {
		t.Fatal(err)
	}
	return cert, key
}

func writePEM(t *testing.T, path, typ string, der []byte) {
	t.Helper()
	if err := os.WriteFile(path, pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der}), 0o600); err != nil {
		t.Fatal(err)
	}
}

// tlsListener writes a CA and a server certificate for 127.0.0.1 signed by
// it, and returns mosquitto's listener lines.
func tlsListener(t *testing.T, dir string) string {
	t.Helper()
	ca, caKey := makeCA(t, "broker test CA")
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{SerialNumber: big.NewInt(2), Subject: pkix.Name{CommonName: "127.0.0.1"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
		IPAddresses: []net.IP{net.IPv4(127, 0, 0, 1)}, KeyUsage: x509.KeyUsageDigitalSignature,
		ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, ca, &key.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	kder, err := x509.MarshalECPrivateKey(key)
	if err != nil {
		t.Fatal(err)
	}
	writePEM(t, filepath.Join(dir, "ca.pem"), "CERTIFICATE", ca.Raw)
	writePEM(t, filepath.Join(dir, "server.pem"), "CERTIFICATE", der)
	writePEM(t, filepath.Join(dir, "server.key"), "EC PRIVATE KEY", kder)
	return fmt.Sprintf("cafile %s\ncertfile %s\nkeyfile %s\n",
		filepath.Join(dir, "ca.pem"), filepath.Join(dir, "server.pem"), filepath.Join(dir, "server.key"))
}

func gauge(r pipeline.HealthReport, name string) float64 {
	if v, ok := r.Gauge(name); ok {
		return v
	}
	return -1
}

func counter(r pipeline.HealthReport, name string) uint64 { v, _ := r.Counter(name); return v }

// TestExternalBrokerRefusals runs the publisher against a real mosquitto
// that refuses it: a wrong password, a certificate from another CA, an ACL
// that denies publishing (and, as the control, one that allows it). Each
// refusal is logged once with its reason however often it repeats, shows
// in the health report, and counts the failures that can be counted.
func TestExternalBrokerRefusals(t *testing.T) {
	const readOnly = "topic read plenum/#"
	const readWrite = "topic readwrite plenum/#"
	for _, tc := range []struct {
		name     string
		tls      bool
		password string
		acl      string
		// logged once: the reason
		reason string
		// connected: up; confirmed: publish_confirmed
		connected, confirmed bool
	}{
		{name: "wrong password", password: "wrong", acl: readWrite, reason: "the broker refused the user name or password"},
		{name: "wrong CA", tls: true, password: "secret", acl: readWrite, reason: "the broker's certificate is not signed by the configured CA"},
		{name: "ACL denies publishing", password: "secret", acl: readOnly, reason: "the broker does not deliver this publisher's own status message", connected: true},
		{name: "allowed", password: "secret", acl: readWrite, connected: true, confirmed: true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			lines := ""
			var tc0 *tls.Config
			if tc.tls {
				lines = tlsListener(t, dir)
				other, _ := makeCA(t, "some other CA")
				pool := x509.NewCertPool()
				pool.AddCert(other)
				tc0 = &tls.Config{RootCAs: pool, MinVersion: tls.VersionTLS12}
			}
			b := startMosquitto(t, dir, lines, tc.acl)
			var logs logBuffer
			log := slog.New(slog.NewTextHandler(&logs, &slog.HandlerOptions{Level: slog.LevelInfo}))
			pl := pipeline.New(pipeline.NewRegistry(), nil, pipeline.Options{})
			p, err := New(Config{Broker: b.url, Vehicle: "v1", Username: "plenum", Password: tc.password, TLS: tc0,
				Logger: log, ConfirmWithin: 500 * time.Millisecond, AckWithin: 500 * time.Millisecond}, pl.Registry(), pl.Subscribe("mqtt", 16))
			if err != nil {
				t.Fatal(err)
			}
			ctx, cancel := context.WithCancel(context.Background())
			done := make(chan error, 1)
			go func() { done <- p.Run(ctx) }()
			defer func() {
				t.Logf("publisher log:\n%s", logs.String())
				cancel()
				if err := <-done; err != nil {
					t.Errorf("Run: %v", err)
				}
			}()

			if !tc.connected {
				// Several refused attempts, one line.
				waitUntil(t, "three refused connection attempts", 20*time.Second, func() bool {
					return counter(p.Report(), "connect_failures") >= 3
				})
				// A message to send while refused: its failure is counted.
				p.PublishSummary([]byte(`{"run":"R1"}`))
				waitUntil(t, "the unacknowledged publish counted", 10*time.Second, func() bool {
					return counter(p.Report(), "failed_publishes") >= 1
				})
				r := p.Report()
				if r.Up {
					t.Error("report says up while the broker refuses the connection")
				}
				if n := logs.count(tc.reason); n != 1 {
					t.Errorf("reason %q logged %d times, want once per burst:\n%s", tc.reason, n, logs.String())
				}
				if n := logs.count("mqtt connected"); n != 0 {
					t.Errorf("logged %d times that it connected:\n%s", n, logs.String())
				}
				return
			}
			waitUntil(t, "connected", 10*time.Second, p.Connected)
			if tc.confirmed {
				waitUntil(t, "its status read back", 10*time.Second, p.Confirmed)
				if r := p.Report(); gauge(r, "publish_confirmed") != 1 || !r.Up {
					t.Errorf("report %+v", r)
				}
				if n := logs.count("does not deliver"); n != 0 {
					t.Errorf("warned about delivery on an allowed broker:\n%s", logs.String())
				}
				return
			}
			waitUntil(t, "the unconfirmed connection counted", 10*time.Second, func() bool {
				return counter(p.Report(), "unconfirmed_connections") >= 1
			})
			r := p.Report()
			if !r.Up || gauge(r, "publish_confirmed") != 0 {
				t.Errorf("report %+v, want up and publish_confirmed 0", r)
			}
			if n := logs.count(tc.reason); n != 1 {
				t.Errorf("reason %q logged %d times, want once:\n%s", tc.reason, n, logs.String())
			}
		})
	}
}
