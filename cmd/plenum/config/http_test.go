package config

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestHTTPSection: TLS files and users of the http section are checked
// (a login without TLS only on loopback, naming the key and saying why)
// and converted into the listener's Config with the passwords read.
func TestHTTPSection(t *testing.T) {
	dir := t.TempDir()
	pw := filepath.Join(dir, "pw")
	if err := os.WriteFile(pw, []byte("desk pass\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	base := "vehicle: shop\nengine: {displacement_l: 2, volumetric_efficiency: 0.9}\n"
	user := "users: [{name: desk, password_file: " + pw + "}]"
	for _, c := range []struct {
		name, http string
		want       []string // in the error; none: accepted
	}{
		{"users on the LAN without TLS", "http: {listen: 0.0.0.0:9108, " + user + "}", []string{"http.users", "plain HTTP", "base64"}},
		{"users on loopback without TLS", "http: {listen: 127.0.0.1:9108, " + user + "}", nil},
		{"users with TLS", "http: {listen: 0.0.0.0:9108, tls_cert_file: /etc/c.pem, tls_key_file: /etc/k.pem, " + user + "}", nil},
		{"a certificate without a key", "http: {listen: 0.0.0.0:9108, tls_cert_file: /etc/c.pem}", []string{"http.tls_cert_file", "tls_key_file"}},
		{"a user without a password file", "http: {users: [{name: desk}]}", []string{"http.users[0].password_file", "required"}},
		{"a user twice", "http: {users: [{name: a, password_file: x}, {name: a, password_file: y}]}", []string{"http.users", "twice"}},
	} {
		_, err := Parse("p.yaml", []byte(base+c.http+"\n"))
		if len(c.want) == 0 && err != nil {
			t.Errorf("%s: %v", c.name, err)
		}
		for _, w := range c.want {
			if err == nil || !strings.Contains(err.Error(), w) {
				t.Errorf("%s: %v, want %q", c.name, err, w)
			}
		}
	}
	cfg, err := Parse("p.yaml", []byte(base+"http: {listen: 127.0.0.1:9108, "+user+"}\n"))
	if err != nil {
		t.Fatal(err)
	}
	hc, err := cfg.HTTPServer()
	if err != nil || len(hc.Users) != 1 || hc.Users[0].Name != "desk" || hc.Users[0].Password != "desk pass" || hc.TokenPaths[0] != "/api/" {
		t.Fatalf("%+v, %v", hc, err)
	}
	cfg.HTTP.Users[0].PasswordFile = filepath.Join(dir, "gone")
	if _, err := cfg.HTTPServer(); err == nil || !strings.Contains(err.Error(), "password_file") {
		t.Errorf("a missing password file: %v", err)
	}
}
