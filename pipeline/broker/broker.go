// Package broker runs the embedded MQTT broker that Plenum starts when no
// external broker is configured. Access is deny-all except what its hook
// allows: the daemon's own publisher (a per-start secret) may write under the
// topic prefix; configured users, and anonymous clients when allowed, may only
// read, apart from users given command rights on the command topics. Wills
// are checked by the same rules as publishes when a client connects; the
// command and reply topics are readable only by the daemon and by users with
// command rights; a session belongs to the user who opened it, and the
// daemon's client ID to the daemon alone. Every refusal is counted (Report)
// and logged once per burst.
package broker

import (
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
	"sync/atomic"
	"time"

	mqtt "github.com/mochi-mqtt/server/v2"
	"github.com/mochi-mqtt/server/v2/listeners"
	"github.com/mochi-mqtt/server/v2/packets"

	"github.com/plenum-engine/plenum/pipeline"
)

// User is a broker account for a dashboard or a command client.
type User struct {
	Name     string
	Password string
	// Commands allows publishing to the command topics (…/cmd/#) and
	// reading the command and reply topics (…/cmd/#, …/reply/#).
	Commands bool
}

// Config configures the embedded broker.
type Config struct {
	Addr      string // TCP listen address, e.g. 127.0.0.1:1883
	TLS       *tls.Config
	Users     []User
	Anonymous bool   // allow read-only clients without credentials; false refuses them at connect
	Prefix    string // topic prefix the daemon publishes under, e.g. "plenum"
	Secret    string // the daemon publisher's password; empty: a random one per start
	// DaemonClientID is the client ID the daemon's publisher connects with:
	// only the daemon's credentials may connect with it, so that no other
	// client can knock the publisher off. Empty: no ID is reserved (a
	// connected session still cannot be taken over by another user).
	DaemonClientID string
	Logger         *slog.Logger
	// LogEvery is the burst interval of the refusal log: the first refusal
	// of a kind by one user is logged at once, repeats within the interval
	// are summed into one line (default one minute).
	LogEvery time.Duration
	// Now is the refusal log's clock (default time.Now).
	Now func() time.Time
}

// Broker is a running embedded broker.
type Broker struct {
	srv       *mqtt.Server
	addr      net.Addr
	ownUser   string
	ownSecret string
	closeOnce sync.Once
	closeErr  error
	up        atomic.Bool
	burst     *burstLog

	refusedConnections   atomic.Uint64
	refusedWills         atomic.Uint64
	refusedPublishes     atomic.Uint64
	refusedSubscriptions atomic.Uint64
}

// Start listens on cfg.Addr and serves until Close or ctx is done.
func Start(ctx context.Context, cfg Config) (*Broker, error) {
	if cfg.Prefix == "" {
		cfg.Prefix = "plenum"
	}
	if cfg.LogEvery <= 0 {
		cfg.LogEvery = time.Minute
	}
	if cfg.Now == nil {
		cfg.Now = time.Now
	}
	log := cfg.Logger
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	secret := make([]byte, 16)
	if _, err := rand.Read(secret); err != nil {
		return nil, fmt.Errorf("broker: secret: %w", err)
	}
	b := &Broker{ownUser: "plenum-daemon", ownSecret: hex.EncodeToString(secret),
		burst: &burstLog{log: log.With("component", "broker"), every: cfg.LogEvery, now: cfg.Now}}
	if cfg.Secret != "" {
		b.ownSecret = cfg.Secret
	}
	// The refusals are logged once per burst here; the broker library's own
	// line per refused connection or publish is left out.
	srv := mqtt.New(&mqtt.Options{Logger: slog.New(refusalFilter{log.With("component", "broker").Handler()}), InlineClient: false})
	h := &hook{b: b, srv: srv, cfg: cfg, users: make(map[string]User, len(cfg.Users))}
	for _, u := range cfg.Users {
		h.users[u.Name] = u
	}
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
	b.up.Store(true)
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

// Report says how the broker is doing: up while it serves, and what it has
// refused since it started — connections (bad credentials, anonymous access
// off, a client ID that belongs to someone else), wills on topics the client
// may not publish to, publishes and subscriptions the access rules deny.
func (b *Broker) Report() pipeline.HealthReport {
	r := pipeline.HealthReport{Kind: "broker", Name: "embedded", Up: b.up.Load(),
		Counters: []pipeline.NamedCount{
			{Name: "refused_connections", Value: b.refusedConnections.Load()},
			{Name: "refused_publishes", Value: b.refusedPublishes.Load()},
			{Name: "refused_subscriptions", Value: b.refusedSubscriptions.Load()},
			{Name: "refused_wills", Value: b.refusedWills.Load()},
		}}
	if b.srv != nil {
		r.Gauges = []pipeline.NamedValue{{Name: "clients", Value: float64(atomic.LoadInt64(&b.srv.Info.ClientsConnected))}}
	}
	return r
}

// Close stops the broker once; later calls return the first result. It gives
// up waiting after two seconds.
func (b *Broker) Close() error {
	b.closeOnce.Do(func() {
		b.up.Store(false)
		done := make(chan error, 1)
		go func() { done <- b.srv.Close() }()
		select {
		case b.closeErr = <-done:
		case <-time.After(2 * time.Second):
			b.closeErr = errors.New("broker: close timed out")
		}
		b.burst.flush()
	})
	return b.closeErr
}

// role is what a client may do.
type role int

const (
	roleNone    role = iota // not admitted
	roleReader              // reads data topics
	roleCommand             // also publishes commands, reads commands and replies
	roleDaemon              // the daemon's publisher: writes under the prefix
)

type hook struct {
	mqtt.HookBase
	b     *Broker
	srv   *mqtt.Server
	cfg   Config
	users map[string]User
}

func (h *hook) ID() string { return "plenum-access" }

func (h *hook) Provides(x byte) bool {
	switch x {
	case mqtt.OnConnect, mqtt.OnConnectAuthenticate, mqtt.OnACLCheck, mqtt.OnSubscribe:
		return true
	}
	return false
}

func eq(a, b string) bool { return subtle.ConstantTimeCompare([]byte(a), []byte(b)) == 1 }

// authenticate returns the role of a user with a password, and why none.
func (h *hook) authenticate(user, pass string) (role, string) {
	if user == "" {
		if h.cfg.Anonymous {
			return roleReader, ""
		}
		return roleNone, "anonymous access is off"
	}
	if user == h.b.ownUser {
		if eq(pass, h.b.ownSecret) {
			return roleDaemon, ""
		}
		return roleNone, "wrong password"
	}
	if u, ok := h.users[user]; ok {
		if !eq(pass, u.Password) {
			return roleNone, "wrong password"
		}
		if u.Commands {
			return roleCommand, ""
		}
		return roleReader, ""
	}
	return roleNone, "unknown user"
}

// roleOf returns the role of a connected client.
func (h *hook) roleOf(cl *mqtt.Client) role {
	user := string(cl.Properties.Username)
	switch {
	case user == "":
		return roleReader
	case user == h.b.ownUser:
		return roleDaemon
	case h.users[user].Commands:
		return roleCommand
	case h.users[user].Name != "":
		return roleReader
	}
	return roleNone
}

// OnConnect decides whether a client is admitted, before the session is
// set up, and answers a refusal with its reason code: the credentials, the
// client ID (the daemon's, or one whose session belongs to another user),
// and the will (the same rules as a publish).
func (h *hook) OnConnect(cl *mqtt.Client, pk packets.Packet) error {
	user := string(pk.Connect.Username)
	r, why := h.authenticate(user, string(pk.Connect.Password))
	code, kind := packets.ErrBadUsernameOrPassword, "connection"
	topic := ""
	switch {
	case r == roleNone:
	case h.cfg.DaemonClientID != "" && cl.ID == h.cfg.DaemonClientID && r != roleDaemon:
		code, why = packets.ErrClientIdentifierNotValid, "the client ID is the daemon's"
	case h.takesOver(cl.ID, user):
		code, why = packets.ErrClientIdentifierNotValid, "the client ID belongs to another user's session"
	case pk.Connect.WillFlag && !h.mayWrite(r, pk.Connect.WillTopic):
		code, kind, topic, why = packets.ErrNotAuthorized, "will", pk.Connect.WillTopic, "the will's topic is not one the client may publish to"
	default:
		return nil
	}
	if kind == "will" {
		h.b.refusedWills.Add(1)
	} else {
		h.b.refusedConnections.Add(1)
	}
	h.b.burst.refuse(kind, user, cl, topic, why)
	ack := code
	if code == packets.ErrNotAuthorized && cl.Properties.ProtocolVersion < 5 {
		ack = packets.ErrBadUsernameOrPassword // MQTT 3's "not authorized"
	}
	if err := h.srv.SendConnack(cl, ack, false, nil); err != nil {
		return fmt.Errorf("broker: refusing %s: %w", cl.ID, err)
	}
	return code
}

// takesOver reports whether a client connecting as user with this ID would
// take over a session opened by another user.
func (h *hook) takesOver(id, user string) bool {
	existing, ok := h.srv.Clients.Get(id)
	return ok && string(existing.Properties.Username) != user
}

// OnConnectAuthenticate repeats the credential check; OnConnect has already
// refused, counted and logged whoever fails it.
func (h *hook) OnConnectAuthenticate(cl *mqtt.Client, pk packets.Packet) bool {
	r, _ := h.authenticate(string(pk.Connect.Username), string(pk.Connect.Password))
	return r != roleNone
}

// OnSubscribe counts and logs the filters the access rules refuse; the
// refusal itself is OnACLCheck's.
func (h *hook) OnSubscribe(cl *mqtt.Client, pk packets.Packet) packets.Packet {
	r := h.roleOf(cl)
	for _, f := range pk.Filters {
		if !h.mayRead(r, f.Filter) {
			h.b.refusedSubscriptions.Add(1)
			h.b.burst.refuse("subscription", string(cl.Properties.Username), cl, f.Filter, "only users with command rights may read the command and reply topics")
		}
	}
	return pk
}

// OnACLCheck decides publishes (write), subscriptions and deliveries (read).
func (h *hook) OnACLCheck(cl *mqtt.Client, topic string, write bool) bool {
	r := h.roleOf(cl)
	if !write {
		return h.mayRead(r, topic)
	}
	if h.mayWrite(r, topic) {
		return true
	}
	h.b.refusedPublishes.Add(1)
	h.b.burst.refuse("publish", string(cl.Properties.Username), cl, topic, "the client may not publish to this topic")
	return false
}

// rest returns the topic levels below the prefix, or false for a topic
// outside it.
func (h *hook) rest(topic string) ([]string, bool) {
	r, ok := strings.CutPrefix(topic, h.cfg.Prefix+"/")
	if !ok {
		return nil, false
	}
	return strings.Split(r, "/"), true
}

// mayWrite: the daemon writes under the prefix, users with command rights
// under <prefix>/<vehicle>/cmd, nobody else anywhere.
func (h *hook) mayWrite(r role, topic string) bool {
	if topic == "" || strings.ContainsAny(topic, "+#") {
		return false
	}
	levels, ok := h.rest(topic)
	switch {
	case !ok:
		return false
	case r == roleDaemon:
		return true
	case r == roleCommand:
		return len(levels) >= 2 && levels[1] == "cmd"
	}
	return false
}

// mayRead: everyone admitted reads, apart from the command and reply topics,
// which only the daemon and users with command rights read. A filter that
// can only match those topics is refused; a wider one (plenum/#) is
// granted, and each delivery on a command or reply topic is then withheld
// by the same rule applied to the message's topic.
func (h *hook) mayRead(r role, filter string) bool {
	if r == roleDaemon || r == roleCommand {
		return true
	}
	if r == roleNone {
		return false
	}
	if s, ok := strings.CutPrefix(filter, "$share/"); ok {
		if _, f, ok := strings.Cut(s, "/"); ok {
			filter = f
		}
	}
	levels, ok := h.rest(filter)
	if !ok || len(levels) < 2 || levels[0] == "#" {
		return true
	}
	return levels[1] != "cmd" && levels[1] != "reply"
}
