// Package broker runs the embedded MQTT broker that Plenum starts when no
// external broker is configured. Access is deny-all except what its hook
// allows: the daemon's own publisher (a per-start secret) may write under the
// topic prefix; configured users, and anonymous clients when allowed, may only
// read, apart from users given command rights on the command topics.
package broker

import (
	"bytes"
	"context"
	"crypto/rand"
	"crypto/subtle"
	"crypto/tls"
	"encoding/hex"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"strings"
	"sync"
	"time"

	mqtt "github.com/mochi-mqtt/server/v2"
	"github.com/mochi-mqtt/server/v2/listeners"
	"github.com/mochi-mqtt/server/v2/packets"
)

// User is a broker account for a dashboard or a command client.
type User struct {
	Name     string
	Password string
	// Commands allows publishing to the command topics (…/cmd/#).
	Commands bool
}

// Config configures the embedded broker.
type Config struct {
	Addr      string // TCP listen address, e.g. 127.0.0.1:1883
	TLS       *tls.Config
	Users     []User
	Anonymous bool   // allow read-only clients without credentials
	Prefix    string // topic prefix the daemon publishes under, e.g. "plenum"
	Secret    string // the daemon publisher's password; empty: a random one per start
	Logger    *slog.Logger
}

// Broker is a running embedded broker.
type Broker struct {
	srv       *mqtt.Server
	addr      net.Addr
	ownUser   string
	ownSecret string
	closeOnce sync.Once
	closeErr  error
}

// Start listens on cfg.Addr and serves until Close or ctx is done.
func Start(ctx context.Context, cfg Config) (*Broker, error) {
	if cfg.Prefix == "" {
		cfg.Prefix = "plenum"
	}
	log := cfg.Logger
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	secret := make([]byte, 16)
	if _, err := rand.Read(secret); err != nil {
		return nil, fmt.Errorf("broker: secret: %w", err)
	}
	b := &Broker{ownUser: "plenum-daemon", ownSecret: hex.EncodeToString(secret)}
	if cfg.Secret != "" {
		b.ownSecret = cfg.Secret
	}
	srv := mqtt.New(&mqtt.Options{Logger: log.With("component", "broker"), InlineClient: false})
	h := &hook{b: b, cfg: cfg}
	if err := srv.AddHook(h, nil); err != nil {
		return nil, fmt.Errorf("broker: hook: %w", err)
	}
	// Listen ourselves so that an address in use is reported here, and ":0" works.
	ln, err := net.Listen("tcp", cfg.Addr)
	if err != nil {
		return nil, fmt.Errorf("broker: listen %s: %w", cfg.Addr, err)
	}
	b.addr = ln.Addr()
	ln.Close()
	tcp := listeners.NewTCP(listeners.Config{ID: "tcp", Address: b.addr.String(), TLSConfig: cfg.TLS})
	if err := srv.AddListener(tcp); err != nil {
		return nil, fmt.Errorf("broker: listener %s: %w", b.addr, err)
	}
	if err := srv.Serve(); err != nil {
		return nil, fmt.Errorf("broker: serve: %w", err)
	}
	b.srv = srv
	go func() {
		<-ctx.Done()
		b.Close()
	}()
	return b, nil
}

// Addr is the address the broker listens on.
func (b *Broker) Addr() net.Addr { return b.addr }

// Credentials returns the username and per-start password of the daemon's own
// publisher, the only client allowed to publish data topics.
func (b *Broker) Credentials() (user, password string) { return b.ownUser, b.ownSecret }

// Close stops the broker once; later calls return the first result. It gives
// up waiting after two seconds.
func (b *Broker) Close() error {
	b.closeOnce.Do(func() {
		done := make(chan error, 1)
		go func() { done <- b.srv.Close() }()
		select {
		case b.closeErr = <-done:
		case <-time.After(2 * time.Second):
			b.closeErr = errors.New("broker: close timed out")
		}
	})
	return b.closeErr
}

type hook struct {
	mqtt.HookBase
	b   *Broker
	cfg Config
}

func (h *hook) ID() string { return "plenum-access" }

func (h *hook) Provides(x byte) bool {
	return bytes.Contains([]byte{mqtt.OnConnectAuthenticate, mqtt.OnACLCheck}, []byte{x})
}

func eq(a, b string) bool { return subtle.ConstantTimeCompare([]byte(a), []byte(b)) == 1 }

func (h *hook) OnConnectAuthenticate(cl *mqtt.Client, pk packets.Packet) bool {
	user, pass := string(pk.Connect.Username), string(pk.Connect.Password)
	if user == "" {
		return h.cfg.Anonymous
	}
	if user == h.b.ownUser {
		return eq(pass, h.b.ownSecret)
	}
	for _, u := range h.cfg.Users {
		if u.Name == user {
			return eq(pass, u.Password)
		}
	}
	return false
}

func (h *hook) OnACLCheck(cl *mqtt.Client, topic string, write bool) bool {
	user := string(cl.Properties.Username)
	if !write {
		return true // every authenticated client may read
	}
	if user == h.b.ownUser {
		return strings.HasPrefix(topic, h.cfg.Prefix+"/")
	}
	for _, u := range h.cfg.Users {
		if u.Name == user && u.Commands {
			parts := strings.Split(topic, "/")
			return len(parts) >= 3 && parts[0] == h.cfg.Prefix && parts[2] == "cmd"
		}
	}
	return false
}
