package broker

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"net"
	"sync"
	"testing"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"
	"github.com/mochi-mqtt/server/v2/packets"
)

func connect(t *testing.T, addr, id, user, pass string) (paho.Client, error) {
	t.Helper()
	return connectOpts(t, paho.NewClientOptions().AddBroker("tcp://"+addr).SetClientID(id).
		SetUsername(user).SetPassword(pass))
}

func connectOpts(t *testing.T, o *paho.ClientOptions) (paho.Client, error) {
	t.Helper()
	// One protocol version, so that a refusal is one connection attempt.
	c := paho.NewClient(o.SetAutoReconnect(false).SetConnectRetry(false).SetProtocolVersion(4))
	tok := c.Connect()
	if !tok.WaitTimeout(5 * time.Second) {
		t.Fatal("connect timed out")
	}
	if tok.Error() == nil {
		t.Cleanup(func() { c.Disconnect(50) })
	}
	return c, tok.Error()
}

func mustConnect(t *testing.T, addr, id, user, pass string) paho.Client {
	t.Helper()
	c, err := connect(t, addr, id, user, pass)
	if err != nil {
		t.Fatalf("%s (%q) refused: %v", id, user, err)
	}
	return c
}

func start(t *testing.T, cfg Config) *Broker {
	t.Helper()
	cfg.Addr = "127.0.0.1:0"
	if cfg.Prefix == "" {
		cfg.Prefix = "plenum"
	}
	b, err := Start(context.Background(), cfg)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { b.Close() })
	return b
}

// msg is one delivered message.
type msg struct {
	topic    string
	payload  string
	retained bool
}

// inbox keeps what one subscriber received, in order.
type inbox struct {
	mu   sync.Mutex
	msgs []msg
	more chan struct{}
}

func subscribe(t *testing.T, c paho.Client, filter string) *inbox {
	t.Helper()
	in := &inbox{more: make(chan struct{}, 1)}
	tok := c.Subscribe(filter, 1, func(_ paho.Client, m paho.Message) {
		in.mu.Lock()
		in.msgs = append(in.msgs, msg{m.Topic(), string(m.Payload()), m.Retained()})
		in.mu.Unlock()
		select {
		case in.more <- struct{}{}:
		default:
		}
	})
	if !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("subscribe %s: %v", filter, tok.Error())
	}
	if st, ok := tok.(*paho.SubscribeToken); ok && st.Result()[filter] >= 0x80 {
		t.Fatalf("subscription to %s refused", filter)
	}
	// The broker queues the retained messages after the SUBACK, on the
	// same connection's goroutine: once a later request is acknowledged,
	// they are queued ahead of anything published from now on.
	if tok := c.Unsubscribe("barrier/none"); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("unsubscribe barrier: %v", tok.Error())
	}
	return in
}

// waitFor waits until a message on topic arrives and returns everything
// received before it.
func (in *inbox) waitFor(t *testing.T, topic string) []msg {
	t.Helper()
	deadline := time.After(5 * time.Second)
	for {
		in.mu.Lock()
		for i, m := range in.msgs {
			if m.topic == topic {
				before := append([]msg(nil), in.msgs[:i]...)
				in.mu.Unlock()
				return before
			}
		}
		in.mu.Unlock()
		select {
		case <-in.more:
		case <-deadline:
			t.Fatalf("no message on %s", topic)
		}
	}
}

// sentinel publishes from the daemon on a fresh data topic and waits for it
// at every inbox: the broker delivers in order, so whatever was fanned out
// before the sentinel was published has arrived by then. It returns, per
// inbox, what arrived before the sentinel.
func sentinel(t *testing.T, daemon paho.Client, ins ...*inbox) [][]msg {
	t.Helper()
	sentinelN++
	topic := fmt.Sprintf("plenum/car/ch/sentinel_%d", sentinelN)
	if tok := daemon.Publish(topic, 1, false, "s"); !tok.WaitTimeout(5*time.Second) || tok.Error() != nil {
		t.Fatalf("sentinel publish: %v", tok.Error())
	}
	out := make([][]msg, len(ins))
	for i, in := range ins {
		out[i] = in.waitFor(t, topic)
	}
	return out
}

var sentinelN int

func find(ms []msg, topic string) (msg, bool) {
	for _, m := range ms {
		if m.topic == topic {
			return m, true
		}
	}
	return msg{}, false
}

// waitGone waits until the broker has let go of a client: its will, if
// any, has then been fanned out.
func waitGone(t *testing.T, b *Broker, id string) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for {
		if _, ok := b.srv.Clients.Get(id); !ok {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("client %s still attached", id)
		}
		time.Sleep(5 * time.Millisecond) // polling a condition
	}
}

// rawConnect sends an MQTT CONNECT (protocol version 4 or 5) over plain TCP,
// with a will when willTopic is set, and returns the connection and the
// CONNACK's return code.
func rawConnect(t *testing.T, addr string, version byte, id, user, pass, willTopic, willPayload string, willRetain bool) (net.Conn, byte) {
	t.Helper()
	conn, err := net.Dial("tcp", addr)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	pk := packets.Packet{FixedHeader: packets.FixedHeader{Type: packets.Connect}, ProtocolVersion: version,
		Connect: packets.ConnectParams{ProtocolName: []byte("MQTT"), ClientIdentifier: id, Clean: true, Keepalive: 30}}
	if user != "" {
		pk.Connect.UsernameFlag, pk.Connect.Username = true, []byte(user)
		pk.Connect.PasswordFlag, pk.Connect.Password = true, []byte(pass)
	}
	if willTopic != "" {
		pk.Connect.WillFlag, pk.Connect.WillTopic, pk.Connect.WillPayload = true, willTopic, []byte(willPayload)
		pk.Connect.WillQos, pk.Connect.WillRetain = 1, willRetain
	}
	var buf bytes.Buffer
	if err := pk.ConnectEncode(&buf); err != nil {
		t.Fatal(err)
	}
	if _, err := conn.Write(buf.Bytes()); err != nil {
		t.Fatal(err)
	}
	conn.SetReadDeadline(time.Now().Add(5 * time.Second))
	hdr := make([]byte, 2)
	if _, err := io.ReadFull(conn, hdr); err != nil {
		t.Fatalf("no CONNACK: %v", err)
	}
	if hdr[0]>>4 != packets.Connack {
		t.Fatalf("not a CONNACK: %x", hdr)
	}
	body := make([]byte, hdr[1])
	if _, err := io.ReadFull(conn, body); err != nil {
		t.Fatalf("short CONNACK: %v", err)
	}
	conn.SetReadDeadline(time.Time{})
	return conn, body[1]
}

func TestAccessRules(t *testing.T) {
	b := start(t, Config{Anonymous: true,
		Users: []User{{Name: "dash", Password: "pw"}, {Name: "op", Password: "pw2", Commands: true}, {Name: "desk", Password: "pw3", Commands: true}}})
	addr := b.Addr().String()

	reader := mustConnect(t, addr, "reader", "", "")
	got := subscribe(t, reader, "plenum/#")
	// A client with command rights sees the command topics.
	desk := mustConnect(t, addr, "desk", "desk", "pw3")
	deskGot := subscribe(t, desk, "plenum/#")

	user, pass := b.Credentials()
	daemon := mustConnect(t, addr, "daemon", user, pass)
	daemon.Publish("plenum/car/ch/lambda", 1, false, "from-daemon").WaitTimeout(2 * time.Second)

	if _, err := connect(t, addr, "badpw", user, "wrong"); err == nil {
		t.Error("daemon user with a wrong password accepted")
	}
	if _, err := connect(t, addr, "dash-bad", "dash", "nope"); err == nil {
		t.Error("configured user with a wrong password accepted")
	}
	dash := mustConnect(t, addr, "dash", "dash", "pw")
	dash.Publish("plenum/car/ch/lambda", 1, false, "from-dash").WaitTimeout(time.Second)
	op := mustConnect(t, addr, "op", "op", "pw2")
	op.Publish("plenum/car/cmd/run", 1, false, "start").WaitTimeout(2 * time.Second)
	op.Publish("plenum/car/ch/lambda", 1, false, "from-op").WaitTimeout(time.Second)
	// op's QoS 1 publishes are handled in order: once this one is
	// acknowledged, the ones before it have been fanned out.
	op.Publish("plenum/car/cmd/barrier", 1, false, "").WaitTimeout(2 * time.Second)

	before := sentinel(t, daemon, got, deskGot)
	var lambda []string
	for _, m := range before[0] {
		if m.topic == "plenum/car/ch/lambda" {
			lambda = append(lambda, m.payload)
		}
	}
	if len(lambda) != 1 || lambda[0] != "from-daemon" {
		t.Errorf("lambda topic = %q: only the daemon may publish data", lambda)
	}
	if m, ok := find(before[1], "plenum/car/cmd/run"); !ok || m.payload != "start" {
		t.Errorf("a user with command rights could not publish a command: %v", before[1])
	}
	if m, ok := find(before[0], "plenum/car/cmd/run"); ok {
		t.Errorf("an anonymous reader received a command: %v", m)
	}
}

func TestAnonymousOff(t *testing.T) {
	b, err := Start(context.Background(), Config{Addr: "127.0.0.1:0"})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	if _, err := connect(t, b.Addr().String(), "anon", "", ""); err == nil {
		t.Fatal("anonymous client accepted with Anonymous off")
	}
	// Not even with a will on a topic it could never publish to.
	if _, code := rawConnect(t, b.Addr().String(), 4, "anon-will", "", "", "plenum/car/ch/lambda", "1", false); code == 0 {
		t.Fatal("anonymous client with a will accepted with Anonymous off")
	}
	if n := counter(b.Report(), "refused_connections"); n != 2 {
		t.Errorf("refused_connections = %d, want 2", n)
	}
	if err := b.Close(); err != nil {
		t.Fatal(err)
	}
	if err := b.Close(); err != nil {
		t.Fatal("second Close:", err)
	}
	if b.Report().Up {
		t.Error("closed broker reports up")
	}
}
