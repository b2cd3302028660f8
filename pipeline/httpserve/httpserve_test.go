package httpserve

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
	"io"
	"math/big"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

// selfSigned writes a self-made certificate for 127.0.0.1 and its key, and
// returns the pool a client trusts it with.
func selfSigned(t *testing.T) (certFile, keyFile string, pool *x509.CertPool) {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{
		SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "plenum test"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
		KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth},
		IPAddresses: []net.IP{net.ParseIP("127.0.0.1")},
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	kder, err := x509.MarshalECPrivateKey(key)
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	certFile, keyFile = filepath.Join(dir, "cert.pem"), filepath.Join(dir, "key.pem")
	os.WriteFile(certFile, pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der}), 0o644)
	os.WriteFile(keyFile, pem.EncodeToMemory(&pem.Block{Type: "EC PRIVATE KEY", Bytes: kder}), 0o600)
	c, _ := x509.ParseCertificate(der)
	pool = x509.NewCertPool()
	pool.AddCert(c)
	return certFile, keyFile, pool
}

// TestLoginOverTLS: with users and a self-made certificate, every page
// needs the login; a POST with a bearer token under a token path reaches
// its handler without it; a client that does not trust the certificate,
// and plain HTTP, get nothing.
func TestLoginOverTLS(t *testing.T) {
	certFile, keyFile, pool := selfSigned(t)
	h := http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		io.WriteString(w, "reached "+r.Method+" "+r.URL.Path+" with "+r.Header.Get("Authorization"))
	})
	s, err := New(Config{Addr: "127.0.0.1:0", CertFile: certFile, KeyFile: keyFile, TokenPaths: []string{"/api/"},
		Users: []User{{"desk", "s3cret pass"}, {"wall", "other"}}}, h)
	if err != nil {
		t.Fatal(err)
	}
	if err := s.Listen(); err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- s.Run(ctx) }()
	defer func() {
		cancel()
		if err := <-done; err != nil {
			t.Error(err)
		}
	}()
	if !strings.HasPrefix(s.URL(), "https://127.0.0.1:") {
		t.Fatalf("URL %s", s.URL())
	}
	client := &http.Client{Timeout: 5 * time.Second, Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: pool}}}
	for _, c := range []struct {
		name, method, path, user, pass, bearer string
		code                                   int
	}{
		{"no login", "GET", "/console/wall", "", "", "", 401},
		{"wrong password", "GET", "/console/wall", "desk", "guess", "", 401},
		{"unknown user", "GET", "/metrics", "guest", "s3cret pass", "", 401},
		{"a page", "GET", "/console/wall", "desk", "s3cret pass", "", 200},
		{"the stream", "GET", "/console/stream", "wall", "other", "", 200},
		{"the metrics", "GET", "/metrics", "wall", "other", "", 200},
		{"another user's password", "GET", "/metrics", "wall", "s3cret pass", "", 401},
		{"an action with the token", "POST", "/api/runs/start", "", "", "tok", 200},
		{"an action without the token", "POST", "/api/runs/start", "", "", "", 401},
		{"a read of the API with a bearer", "GET", "/api/runs/", "", "", "tok", 401},
		{"a bearer elsewhere", "POST", "/console/stream", "", "", "tok", 401},
	} {
		req, _ := http.NewRequest(c.method, s.URL()+c.path, nil)
		if c.user != "" {
			req.SetBasicAuth(c.user, c.pass)
		}
		if c.bearer != "" {
			req.Header.Set("Authorization", "Bearer "+c.bearer)
		}
		resp, err := client.Do(req)
		if err != nil {
			t.Fatalf("%s: %v", c.name, err)
		}
		b, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		if resp.StatusCode != c.code {
			t.Errorf("%s: %s %q, want %d", c.name, resp.Status, b, c.code)
		}
		if c.code == 401 && !strings.HasPrefix(resp.Header.Get("WWW-Authenticate"), `Basic realm="plenum"`) {
			t.Errorf("%s: WWW-Authenticate %q", c.name, resp.Header.Get("WWW-Authenticate"))
		}
		if c.bearer != "" && c.code == 200 && !strings.Contains(string(b), "with Bearer tok") {
			t.Errorf("%s: the handler got %q, not the token", c.name, b)
		}
	}
	// A client that does not trust the certificate gets no answer.
	if _, err := (&http.Client{Timeout: 5 * time.Second}).Get(s.URL() + "/metrics"); err == nil || !strings.Contains(err.Error(), "certificate") {
		t.Errorf("an untrusting client: %v", err)
	}
	// Plain HTTP gets no page.
	resp, err := (&http.Client{Timeout: 5 * time.Second}).Get("http://" + s.Addr().String() + "/metrics")
	if err == nil {
		b, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		if resp.StatusCode == 200 {
			t.Errorf("plain HTTP: %s %q", resp.Status, b)
		}
	}
}

// TestNoUsersPlain: without users the handler is served as it is, over
// plain HTTP.
func TestNoUsersPlain(t *testing.T) {
	s, err := New(Config{Addr: "127.0.0.1:0"}, http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) { io.WriteString(w, "open") }))
	if err != nil {
		t.Fatal(err)
	}
	if err := s.Listen(); err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	go s.Run(ctx)
	resp, err := http.Get(s.URL() + "/anything")
	if err != nil {
		t.Fatal(err)
	}
	b, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if resp.StatusCode != 200 || string(b) != "open" || !strings.HasPrefix(s.URL(), "http://") {
		t.Errorf("%s %q at %s", resp.Status, b, s.URL())
	}
}

// TestCheck: the rules of the configuration.
func TestCheck(t *testing.T) {
	u := []User{{"desk", "pw"}}
	for _, c := range []struct {
		name string
		cfg  Config
		want string // "" accepted
	}{
		{"users on every interface without TLS", Config{Addr: "0.0.0.0:9108", Users: u}, ErrLoginWithoutTLS.Error()},
		{"users on a LAN address without TLS", Config{Addr: "192.168.1.20:9108", Users: u}, "base64"},
		{"users on all interfaces (empty host) without TLS", Config{Addr: ":9108", Users: u}, "loopback"},
		{"users on 127.0.0.1", Config{Addr: "127.0.0.1:9108", Users: u}, ""},
		{"users on ::1", Config{Addr: "[::1]:9108", Users: u}, ""},
		{"users on localhost", Config{Addr: "localhost:9108", Users: u}, ""},
		{"users with TLS", Config{Addr: "0.0.0.0:9108", CertFile: "c", KeyFile: "k", Users: u}, ""},
		{"a certificate without its key", Config{Addr: "0.0.0.0:9108", CertFile: "c"}, "both"},
		{"a name twice", Config{Addr: "127.0.0.1:1", Users: []User{{"a", "x"}, {"a", "y"}}}, "twice"},
		{"a colon in a name", Config{Addr: "127.0.0.1:1", Users: []User{{"a:b", "x"}}}, "':'"},
		{"an empty password", Config{Addr: "127.0.0.1:1", Users: []User{{"a", ""}}}, "empty password"},
	} {
		err := c.cfg.Check()
		switch {
		case c.want == "" && err != nil:
			t.Errorf("%s: refused: %v", c.name, err)
		case c.want != "" && (err == nil || !strings.Contains(err.Error(), c.want)):
			t.Errorf("%s: %v, want an error with %q", c.name, err, c.want)
		}
	}
	if err := (Config{Addr: "0.0.0.0:1", Users: []User{{"a", "b"}}}).Check(); !errors.Is(err, ErrLoginWithoutTLS) {
		t.Errorf("not ErrLoginWithoutTLS: %v", err)
	}
	if _, err := New(Config{Addr: "127.0.0.1:0", CertFile: "/nonexistent.pem", KeyFile: "/nonexistent.key"}, http.NotFoundHandler()); err == nil {
		t.Error("New loaded a certificate that is not there")
	}
}
