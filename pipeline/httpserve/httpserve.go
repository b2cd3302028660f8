// Package httpserve is the daemon's HTTP listener: plain HTTP or TLS, with
// an optional login (HTTP basic authentication, RFC 7617) in front of every
// page, the console's stream and the metrics, serving until its context
// ends.
//
// A login sends its password with every request, only base64-encoded:
// anyone who can watch the network can read it. So users are refused
// without TLS, unless the listener is on a loopback address, where no
// other machine can see the traffic.
//
// Control actions keep their own credential, the control token, sent by
// the caller as "Authorization: Bearer …". A POST under one of
// Config.TokenPaths that carries a bearer token passes without the login,
// for the handler there to check the token: the token is the stronger
// credential, and it is what `plenum run-start` and the console's buttons
// send. Every other request, and a POST there without a bearer token,
// needs the login.
package httpserve

import (
	"context"
	"crypto/sha256"
	"crypto/subtle"
	"crypto/tls"
	"errors"
	"fmt"
	"net"
	"net/http"
	"strings"
	"time"
)

// User is one login.
type User struct {
	Name     string
	Password string
}

// Config configures the listener.
type Config struct {
	// Addr is host:port.
	Addr string
	// CertFile and KeyFile are a PEM certificate (with its chain) and key;
	// both set: TLS.
	CertFile, KeyFile string
	// Users, when any, must log in (basic authentication).
	Users []User
	// TokenPaths are path prefixes where a POST carrying a bearer token
	// skips the login; the handler there checks the token.
	TokenPaths []string
	// Realm names the login (default "plenum").
	Realm string
}

// ErrLoginWithoutTLS refuses users on a plain-HTTP listener that is not
// on a loopback address.
var ErrLoginWithoutTLS = errors.New("a login needs TLS (tls_cert_file and tls_key_file) unless the listener is on a loopback address: " +
	"basic authentication sends the password with every request, only base64-encoded, so anyone on the network could read it")

// Loopback reports whether addr (host:port) listens on a loopback address
// only: localhost, 127.0.0.0/8 or ::1. An empty host (every interface) is
// not.
func Loopback(addr string) bool {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return false
	}
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// TLS reports whether the listener serves TLS.
func (c Config) TLS() bool { return c.CertFile != "" || c.KeyFile != "" }

// Check checks the rules of the configuration without reading a file.
func (c Config) Check() error {
	if (c.CertFile == "") != (c.KeyFile == "") {
		return errors.New("TLS needs both a certificate and its key")
	}
	if len(c.Users) > 0 && !c.TLS() && !Loopback(c.Addr) {
		return ErrLoginWithoutTLS
	}
	seen := map[string]bool{}
	for i, u := range c.Users {
		switch {
		case u.Name == "" || strings.ContainsAny(u.Name, ":\r\n"):
			return fmt.Errorf("user %d: a name is needed, without ':' (basic authentication separates name and password with it)", i)
		case seen[u.Name]:
			return fmt.Errorf("user %q is given twice", u.Name)
		case u.Password == "":
			return fmt.Errorf("user %q has an empty password", u.Name)
		}
		seen[u.Name] = true
	}
	return nil
}

// Server is the listener, built by New, bound by Listen, served by Run.
type Server struct {
	cfg   Config
	tls   *tls.Config
	users map[[32]byte]bool // SHA-256 of "name:password"
	ln    net.Listener
	srv   *http.Server
}

// New checks cfg and loads its certificate; it opens nothing.
func New(cfg Config, h http.Handler) (*Server, error) {
	if err := cfg.Check(); err != nil {
		return nil, err
	}
	if cfg.Realm == "" {
		cfg.Realm = "plenum"
	}
	s := &Server{cfg: cfg, users: map[[32]byte]bool{}}
	if cfg.TLS() {
		cert, err := tls.LoadX509KeyPair(cfg.CertFile, cfg.KeyFile)
		if err != nil {
			return nil, fmt.Errorf("TLS certificate and key: %w", err)
		}
		s.tls = &tls.Config{Certificates: []tls.Certificate{cert}, MinVersion: tls.VersionTLS12}
	}
	for _, u := range cfg.Users {
		s.users[sha256.Sum256([]byte(u.Name+":"+u.Password))] = true
	}
	s.srv = &http.Server{Handler: s.Handler(h), ReadHeaderTimeout: 5 * time.Second, TLSConfig: s.tls}
	return s, nil
}

// Handler wraps h with the login (h itself without users).
func (s *Server) Handler(h http.Handler) http.Handler {
	if len(s.users) == 0 {
		return h
	}
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if s.tokenPath(r) || s.loggedIn(r) {
			h.ServeHTTP(w, r)
			return
		}
		w.Header().Set("WWW-Authenticate", `Basic realm="`+s.cfg.Realm+`", charset="UTF-8"`)
		http.Error(w, "log in: this listener needs a user name and password (http.users)", http.StatusUnauthorized)
	})
}

func (s *Server) tokenPath(r *http.Request) bool {
	if r.Method != http.MethodPost || !strings.HasPrefix(r.Header.Get("Authorization"), "Bearer ") {
		return false
	}
	for _, p := range s.cfg.TokenPaths {
		if strings.HasPrefix(r.URL.Path, p) {
			return true
		}
	}
	return false
}

func (s *Server) loggedIn(r *http.Request) bool {
	name, pw, ok := r.BasicAuth()
	if !ok {
		return false
	}
	sum := sha256.Sum256([]byte(name + ":" + pw))
	found := 0
	for k := range s.users { // compare with every user, in constant time each
		found |= subtle.ConstantTimeCompare(k[:], sum[:])
	}
	return found == 1
}

// Listen binds the address.
func (s *Server) Listen() error {
	ln, err := net.Listen("tcp", s.cfg.Addr)
	if err != nil {
		return err
	}
	if s.tls != nil {
		ln = tls.NewListener(ln, s.tls)
	}
	s.ln = ln
	return nil
}

// Addr is the bound address (after Listen).
func (s *Server) Addr() net.Addr { return s.ln.Addr() }

// URL is the listener's base URL, https:// with TLS (after Listen).
func (s *Server) URL() string {
	if s.tls != nil {
		return "https://" + s.ln.Addr().String()
	}
	return "http://" + s.ln.Addr().String()
}

// Close closes the listener of a server that will not Run.
func (s *Server) Close() error { return s.ln.Close() }

// Run serves on the bound listener until ctx ends, then shuts the server
// down, giving requests in flight a second.
func (s *Server) Run(ctx context.Context) error {
	errc := make(chan error, 1)
	go func() { errc <- s.srv.Serve(s.ln) }()
	select {
	case err := <-errc:
		return fmt.Errorf("http: %w", err)
	case <-ctx.Done():
	}
	sctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), time.Second)
	defer cancel()
	s.srv.Shutdown(sctx)
	return nil
}
