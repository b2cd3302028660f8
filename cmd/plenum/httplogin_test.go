package main

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"io"
	"math/big"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
)

// TestDemoTLSLogin: with http.tls_cert_file, tls_key_file and users, the
// demo prints https addresses; the console, its stream and the metrics
// need the login; an action passes with its control token alone and is
// refused with a wrong one.
func TestDemoTLSLogin(t *testing.T) {
	dir := t.TempDir()
	key, _ := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	tmpl := &x509.Certificate{SerialNumber: big.NewInt(7), Subject: pkix.Name{CommonName: "plenum shop test"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour), IPAddresses: []net.IP{net.ParseIP("127.0.0.1")},
		KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	kder, _ := x509.MarshalECPrivateKey(key)
	certFile, keyFile, pwFile := filepath.Join(dir, "cert.pem"), filepath.Join(dir, "key.pem"), filepath.Join(dir, "desk-pw")
	os.WriteFile(certFile, pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der}), 0o644)
	os.WriteFile(keyFile, pem.EncodeToMemory(&pem.Block{Type: "EC PRIVATE KEY", Bytes: kder}), 0o600)
	os.WriteFile(pwFile, []byte("correct horse\n"), 0o600)
	cert, _ := x509.ParseCertificate(der)
	pool := x509.NewCertPool()
	pool.AddCert(cert)

	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	addr, _, done := startDemo(t, ctx, 4, func(c *config.Config) {
		c.HTTP.TLSCertFile, c.HTTP.TLSKeyFile = certFile, keyFile
		c.HTTP.Users = []config.HTTPUser{{Name: "desk", PasswordFile: pwFile}}
		c.Record.Dir, c.Record.ControlToken = t.TempDir(), "tok-9"
	})
	client := &http.Client{Timeout: 5 * time.Second, Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: pool}}}
	do := func(method, path, user, pass, bearer string) (int, string, http.Header) {
		t.Helper()
		rctx, rcancel := context.WithTimeout(ctx, 5*time.Second)
		defer rcancel()
		req, _ := http.NewRequestWithContext(rctx, method, "https://"+addr+path, nil)
		if user != "" {
			req.SetBasicAuth(user, pass)
		}
		if bearer != "" {
			req.Header.Set("Authorization", "Bearer "+bearer)
		}
		resp, err := client.Do(req)
		if err != nil {
			t.Fatalf("%s %s: %v", method, path, err)
		}
		defer resp.Body.Close()
		var b []byte
		if resp.Header.Get("Content-Type") == "text/event-stream" {
			b = make([]byte, 64)
			n, _ := io.ReadAtLeast(resp.Body, b, 20)
			b = b[:n]
		} else {
			b, _ = io.ReadAll(resp.Body)
		}
		return resp.StatusCode, string(b), resp.Header
	}
	for _, c := range []struct {
		method, path, user, pass, bearer string
		code                             int
		body                             string
	}{
		{"GET", "/console/wall", "", "", "", 401, "log in"},
		{"GET", "/console/wall", "desk", "wrong", "", 401, "log in"},
		{"GET", "/console/wall", "desk", "correct horse", "", 200, "<!doctype html>"},
		{"GET", "/console/stream", "desk", "correct horse", "", 200, "retry: 1000"},
		{"GET", "/metrics", "", "", "", 401, "log in"},
		{"GET", "/metrics", "desk", "correct horse", "", 200, "plenum_"},
		{"POST", "/api/runs/stop", "", "", "wrong", 401, "unauthorized: send the token"},
		{"POST", "/api/runs/stop", "", "", "", 401, "log in"},
	} {
		code, body, _ := do(c.method, c.path, c.user, c.pass, c.bearer)
		if code != c.code || !strings.Contains(body, c.body) {
			t.Errorf("%s %s (user %q, bearer %q): %d %.80q, want %d with %q", c.method, c.path, c.user, c.bearer, code, body, c.code, c.body)
		}
	}
	// The token alone stops the run the demo started, and starts another.
	for _, verb := range []string{"stop", "start"} {
		if code, body, _ := do("POST", "/api/runs/"+verb, "", "", "tok-9"); code != 200 {
			t.Errorf("%s with the token: %d %s", verb, code, body)
		}
	}
	cancel()
	if err := <-done; err != nil {
		t.Errorf("daemon: %v", err)
	}
}
