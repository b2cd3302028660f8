package broker

import (
	"context"
	"log/slog"
	"net"
	"net/url"
	"strings"
	"sync"
	"testing"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"

	"github.com/plenum-engine/plenum/pipeline"
)

func counter(r pipeline.HealthReport, name string) uint64 { v, _ := r.Counter(name); return v }

// shop is an embedded broker as the daemon runs it: the daemon's publisher
// connected with its reserved client ID and its will, a read-only user and
// a user with command rights watching everything.
type shop struct {
	b      *Broker
	addr   string
	daemon paho.Client
	watch  *inbox // op's view of plenum/#, command and reply topics included
}

func newShop(t *testing.T, cfg Config) *shop {
	t.Helper()
	cfg.Anonymous = true
	cfg.DaemonClientID = "plenum-car"
	cfg.Users = append(cfg.Users, User{Name: "dash", Password: "pw"}, User{Name: "op", Password: "pw2", Commands: true})
	s := &shop{b: start(t, cfg)}
	s.addr = s.b.Addr().String()
	user, pass := s.b.Credentials()
	var err error
	s.daemon, err = connectOpts(t, paho.NewClientOptions().AddBroker("tcp://"+s.addr).SetClientID("plenum-car").
		SetUsername(user).SetPassword(pass).SetCleanSession(true).
		SetWill("plenum/car/status", `{"state":"offline"}`, 1, true))
	if err != nil {
		t.Fatalf("daemon refused: %v", err)
	}
	s.daemon.Publish("plenum/car/status", 1, true, `{"state":"online"}`).WaitTimeout(2 * time.Second)
	// A real active critical warning, retained as the daemon does.
	s.daemon.Publish("plenum/car/warning/coolant_hot", 1, true, `{"kind":"warning_raised","severity":"critical"}`).WaitTimeout(2 * time.Second)
	op := mustConnect(t, s.addr, "op-desk", "op", "pw2")
	s.watch = subscribe(t, op, "plenum/#")
	return s
}

// killedPaho connects a paho client with a will and returns a function that
// closes its TCP connection abruptly (no DISCONNECT), as a killed process
// would.
func killedPaho(t *testing.T, addr, id, user, pass, topic, payload string, retain bool) (kill func(), err error) {
	t.Helper()
	var mu sync.Mutex
	var conn net.Conn
	o := paho.NewClientOptions().AddBroker("tcp://"+addr).SetClientID(id).SetUsername(user).SetPassword(pass).
		SetWill(topic, payload, 1, retain).
		SetCustomOpenConnectionFn(func(u *url.URL, _ paho.ClientOptions) (net.Conn, error) {
			c, err := net.Dial("tcp", u.Host)
			mu.Lock()
			conn = c
			mu.Unlock()
			return c, err
		})
	if _, err := connectOpts(t, o); err != nil {
		return nil, err
	}
	return func() {
		mu.Lock()
		defer mu.Unlock()
		conn.Close()
	}, nil
}

// TestWillAttacks: a client that may not publish to a topic cannot publish
// to it through its will either. Each attack sets a will, and if admitted
// drops its connection without a DISCONNECT; the will must never reach a
// subscriber nor the retained store.
func TestWillAttacks(t *testing.T) {
	const (
		raw4 = iota
		raw5
		killed
	)
	// A will cannot be empty (the broker refuses that as a protocol
	// violation), so the "cleared" is a clear event in the warning's place.
	const cleared = `{"kind":"warning_cleared","severity":"critical"}`
	cases := []struct {
		name          string
		client        int
		user, pass    string
		topic         string
		payload       string
		retain        bool
		wantDelivered bool
	}{
		{"fake value on ch", raw4, "", "", "plenum/car/ch/manifold_pressure", `{"v":400000,"unit":"pascals","q":"ok"}`, false, false},
		{"fake value on ch from a paho client", killed, "", "", "plenum/car/ch/lambda", `{"v":1.4,"unit":"ratio","q":"ok"}`, false, false},
		{"retained fake warning", raw5, "", "", "plenum/car/warning/oil_pressure_low", `{"kind":"warning_raised","severity":"critical"}`, true, false},
		{"retained cleared over an active warning", killed, "", "", "plenum/car/warning/coolant_hot", cleared, true, false},
		{"retained cleared from a read-only user", raw4, "dash", "pw", "plenum/car/warning/coolant_hot", cleared, true, false},
		{"false offline status", raw4, "", "", "plenum/car/status", `{"state":"offline"}`, true, false},
		{"cmd/run/stop", raw4, "", "", "plenum/car/cmd/run/stop", `{"request":"x"}`, false, false},
		{"cmd/run/stop from a paho client", killed, "", "", "plenum/car/cmd/run/stop", `{"request":"x"}`, false, false},
		{"cmd/run/start", raw5, "", "", "plenum/car/cmd/run/start", `{"request":"y","label":"fake"}`, false, false},
		{"cmd/run/start from a read-only user", killed, "dash", "pw", "plenum/car/cmd/run/start", `{"request":"y"}`, false, false},
		{"a will with a wildcard topic", raw4, "", "", "plenum/car/ch/#", "x", false, false},
		// The control: the same rules let a user with command rights leave
		// a command as its will, so a refused will above is the rule's doing.
		{"command user's will on cmd", killed, "op", "pw2", "plenum/car/cmd/run/stop", `{"request":"z"}`, false, true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			s := newShop(t, Config{})
			id := "attacker"
			admitted := false
			switch tc.client {
			case raw4, raw5:
				v := byte(4)
				if tc.client == raw5 {
					v = 5
				}
				conn, code := rawConnect(t, s.addr, v, id, tc.user, tc.pass, tc.topic, tc.payload, tc.retain)
				if admitted = code == 0; admitted {
					conn.Close()
				}
			case killed:
				kill, err := killedPaho(t, s.addr, id, tc.user, tc.pass, tc.topic, tc.payload, tc.retain)
				if admitted = err == nil; admitted {
					kill()
				}
			}
			if admitted != tc.wantDelivered {
				t.Errorf("connection with a will on %s admitted = %v, want %v", tc.topic, admitted, tc.wantDelivered)
			}
			if admitted {
				waitGone(t, s.b, id)
			}
			// What a subscriber saw, and what a newcomer is handed as retained.
			fresh := subscribe(t, mustConnect(t, s.addr, "newcomer", "", ""), "plenum/car/#")
			before := sentinel(t, s.daemon, s.watch, fresh)
			var m msg
			delivered := false
			for _, x := range before[0] {
				if x.topic == tc.topic && x.payload == tc.payload && !x.retained { // the watcher was there before the will
					m, delivered = x, true
				}
			}
			if delivered != tc.wantDelivered {
				t.Errorf("will on %s delivered = %v (%v), want %v", tc.topic, delivered, m, tc.wantDelivered)
			}
			if !tc.wantDelivered {
				if got := counter(s.b.Report(), "refused_wills"); got != 1 {
					t.Errorf("refused_wills = %d, want 1", got)
				}
			}
			retained := map[string]string{}
			for _, m := range before[1] {
				if m.retained {
					retained[m.topic] = m.payload
				}
			}
			if !tc.wantDelivered {
				want := map[string]string{
					"plenum/car/status":              `{"state":"online"}`,
					"plenum/car/warning/coolant_hot": `{"kind":"warning_raised","severity":"critical"}`,
				}
				for topic, p := range want {
					if retained[topic] != p {
						t.Errorf("retained %s = %q, want the daemon's %q", topic, retained[topic], p)
					}
				}
				if len(retained) != len(want) {
					t.Errorf("retained messages %v, want only the daemon's", retained)
				}
			}
		})
	}
}

// TestCommandTopicsReadOnlyWithRights: commands carry the control token and
// replies the run's result, so only the daemon and users with command
// rights may read them; a wider subscription is granted without them.
func TestCommandTopicsReadOnlyWithRights(t *testing.T) {
	s := newShop(t, Config{})
	for _, who := range []struct{ id, user, pass string }{{"anon", "", ""}, {"dash-screen", "dash", "pw"}} {
		c := mustConnect(t, s.addr, who.id, who.user, who.pass)
		for _, f := range []string{"plenum/car/cmd/#", "plenum/+/cmd/run/start", "plenum/car/reply/#", "plenum/+/reply/run/stop"} {
			tok := c.Subscribe(f, 1, func(paho.Client, paho.Message) {})
			if !tok.WaitTimeout(5 * time.Second) {
				t.Fatal("subscribe timed out")
			}
			if code := tok.(*paho.SubscribeToken).Result()[f]; code < 0x80 {
				t.Errorf("%s may subscribe to %s (granted QoS %d)", who.id, f, code)
			}
		}
	}
	if got := counter(s.b.Report(), "refused_subscriptions"); got != 8 {
		t.Errorf("refused_subscriptions = %d, want 8", got)
	}

	anon := subscribe(t, mustConnect(t, s.addr, "anon-all", "", ""), "#")
	dash := subscribe(t, mustConnect(t, s.addr, "dash-all", "dash", "pw"), "plenum/#")
	op := mustConnect(t, s.addr, "op-cmd", "op", "pw2")
	op.Publish("plenum/car/cmd/run/start", 1, false, `{"request":"a1","token":"secret-token"}`).WaitTimeout(2 * time.Second)
	op.Publish("plenum/car/cmd/run/stop", 1, true, `{"request":"a2","token":"secret-token"}`).WaitTimeout(2 * time.Second)
	// op's publishes are handled in order: this acknowledgement means the
	// two above have been fanned out.
	op.Publish("plenum/car/cmd/barrier", 1, false, "").WaitTimeout(2 * time.Second)
	s.daemon.Publish("plenum/car/reply/run/start", 1, false, `{"request":"a1","ok":true}`).WaitTimeout(2 * time.Second)
	late := subscribe(t, mustConnect(t, s.addr, "anon-late", "", ""), "plenum/#")

	before := sentinel(t, s.daemon, s.watch, anon, dash, late)
	for _, topic := range []string{"plenum/car/cmd/run/start", "plenum/car/cmd/run/stop", "plenum/car/reply/run/start"} {
		if _, ok := find(before[0], topic); !ok {
			t.Errorf("a user with command rights did not receive %s", topic)
		}
		for i, name := range []string{"anonymous on #", "read-only user on plenum/#", "anonymous newcomer (retained)"} {
			if m, ok := find(before[i+1], topic); ok {
				t.Errorf("%s received %s: %q", name, topic, m.payload)
			}
		}
	}
	if _, ok := find(before[1], "plenum/car/status"); !ok {
		t.Error("anonymous reader on # does not receive data topics")
	}
}

// TestDaemonClientIDCannotBeTaken: no other client can connect with the
// daemon's client ID or with the ID of another user's session, so the
// daemon's publisher stays connected and no false "offline" is published.
func TestDaemonClientIDCannotBeTaken(t *testing.T) {
	s := newShop(t, Config{})
	opDesk := mustConnect(t, s.addr, "desk-1", "op", "pw2")
	for _, a := range []struct{ id, user, pass string }{
		{"plenum-car", "", ""}, {"plenum-car", "dash", "pw"}, {"plenum-car", "op", "pw2"}, {"desk-1", "", ""}, {"desk-1", "dash", "pw"},
	} {
		if _, err := connect(t, s.addr, a.id, a.user, a.pass); err == nil {
			t.Errorf("%q connected with client ID %s", a.user, a.id)
		}
	}
	if _, code := rawConnect(t, s.addr, 5, "plenum-car", "", "", "", "", false); code != 0x85 {
		t.Errorf("MQTT 5 takeover of the daemon's ID: CONNACK 0x%02x, want 0x85 (client identifier not valid)", code)
	}
	if got := counter(s.b.Report(), "refused_connections"); got != 6 {
		t.Errorf("refused_connections = %d, want 6", got)
	}
	if !s.daemon.IsConnectionOpen() || !opDesk.IsConnectionOpen() {
		t.Fatal("a session was knocked off")
	}
	before := sentinel(t, s.daemon, s.watch)
	for _, m := range before[0] {
		if m.topic == "plenum/car/status" && strings.Contains(m.payload, "offline") {
			t.Errorf("false offline status: %v", m)
		}
	}

	// The ID stays reserved while the daemon is away.
	s.daemon.Disconnect(50)
	waitGone(t, s.b, "plenum-car")
	if _, err := connect(t, s.addr, "plenum-car", "", ""); err == nil {
		t.Error("anonymous client took the daemon's ID while the daemon was away")
	}
	// The daemon itself gets back in, and may replace a half-open session
	// of its own.
	user, pass := s.b.Credentials()
	d1 := mustConnect(t, s.addr, "plenum-car", user, pass)
	d2 := mustConnect(t, s.addr, "plenum-car", user, pass)
	_ = d1
	sentinel(t, d2, s.watch)
}

// TestRefusalsLoggedOncePerBurst: each refusal is counted; the first of a
// burst is logged at once with who, which topic and why, the repeats are
// summed into one line after the interval.
func TestRefusalsLoggedOncePerBurst(t *testing.T) {
	var clock struct {
		sync.Mutex
		now time.Time
	}
	clock.now = time.Date(2026, 12, 1, 22, 0, 0, 0, time.UTC)
	now := func() time.Time { clock.Lock(); defer clock.Unlock(); return clock.now }
	logs := &capture{}
	s := newShop(t, Config{Logger: slog.New(logs), LogEvery: time.Minute, Now: now})

	anon := mustConnect(t, s.addr, "anon-pub", "", "")
	publish := func(n int) {
		for i := 0; i < n; i++ {
			anon.Publish("plenum/car/ch/lambda", 0, false, "0.5").WaitTimeout(time.Second)
		}
	}
	waitCount := func(name string, want uint64) {
		t.Helper()
		deadline := time.Now().Add(5 * time.Second)
		for counter(s.b.Report(), name) < want {
			if time.Now().After(deadline) {
				t.Fatalf("%s = %d, want %d", name, counter(s.b.Report(), name), want)
			}
			time.Sleep(5 * time.Millisecond) // polling a condition
		}
	}
	publish(5)
	waitCount("refused_publishes", 5)
	if got := logs.matching("broker refused a publish"); len(got) != 1 {
		t.Fatalf("refusal log lines %v, want one for the burst", got)
	} else {
		for _, want := range []string{"user=anonymous", "topic=plenum/car/ch/lambda", "client=anon-pub", "why="} {
			if !strings.Contains(got[0], want) {
				t.Errorf("log line %q lacks %s", got[0], want)
			}
		}
	}
	clock.Lock()
	clock.now = clock.now.Add(61 * time.Second)
	clock.Unlock()
	publish(1)
	waitCount("refused_publishes", 6)
	if got := logs.matching("broker refused a publish (repeated)"); len(got) != 1 || !strings.Contains(got[0], "repeats=4") {
		t.Errorf("summary lines %v, want one with repeats=4", got)
	}
	if got := logs.matching("broker refused a publish"); len(got) != 3 {
		t.Errorf("refusal log lines %v, want first, summary, first of the next burst", got)
	}

	for i := 0; i < 3; i++ {
		if _, err := connect(t, s.addr, "guess", "dash", "guess"); err == nil {
			t.Fatal("wrong password accepted")
		}
	}
	if got := counter(s.b.Report(), "refused_connections"); got != 3 {
		t.Errorf("refused_connections = %d, want 3", got)
	}
	if got := logs.matching("broker refused a connection"); len(got) != 1 || !strings.Contains(got[0], "user=dash") || !strings.Contains(got[0], "wrong password") {
		t.Errorf("connection refusal lines %v, want one naming the user and why", got)
	}
	// The broker library's own line per refused connection is not logged.
	if got := logs.containing("error="); len(got) != 0 {
		t.Errorf("per-refusal library lines logged: %v", got)
	}
	s.b.Close()
	if got := logs.matching("broker refused a connection (repeated)"); len(got) != 1 || !strings.Contains(got[0], "repeats=2") {
		t.Errorf("summary at Close %v, want repeats=2", got)
	}
}

// capture keeps the text of every warning and error logged.
type capture struct {
	mu    sync.Mutex
	lines []string
}

func (c *capture) Enabled(_ context.Context, l slog.Level) bool { return l >= slog.LevelWarn }

func (c *capture) Handle(_ context.Context, r slog.Record) error {
	var b strings.Builder
	b.WriteString(r.Message)
	r.Attrs(func(a slog.Attr) bool { b.WriteString(" " + a.String()); return true })
	c.mu.Lock()
	c.lines = append(c.lines, b.String())
	c.mu.Unlock()
	return nil
}

func (c *capture) WithAttrs(as []slog.Attr) slog.Handler { return &capture2{c, as} }

func (c *capture) WithGroup(string) slog.Handler { return c }

// capture2 is a capture with attributes, writing into the same lines.
type capture2 struct {
	root  *capture
	attrs []slog.Attr
}

func (c *capture2) Enabled(ctx context.Context, l slog.Level) bool { return c.root.Enabled(ctx, l) }
func (c *capture2) Handle(_ context.Context, r slog.Record) error {
	r2 := r.Clone()
	r2.AddAttrs(c.attrs...)
	return c.root.Handle(context.Background(), r2)
}
func (c *capture2) WithAttrs(as []slog.Attr) slog.Handler {
	return &capture2{c.root, append(append([]slog.Attr(nil), c.attrs...), as...)}
}
func (c *capture2) WithGroup(string) slog.Handler { return c }

// matching returns the lines that start with prefix.
func (c *capture) matching(prefix string) []string {
	return c.filter(func(l string) bool { return strings.HasPrefix(l, prefix) })
}

// containing returns the lines that contain s.
func (c *capture) containing(s string) []string {
	return c.filter(func(l string) bool { return strings.Contains(l, s) })
}

func (c *capture) filter(keep func(string) bool) []string {
	c.mu.Lock()
	defer c.mu.Unlock()
	var out []string
	for _, l := range c.lines {
		if keep(l) {
			out = append(out, l)
		}
	}
	return out
}
