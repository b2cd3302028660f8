// Package fleet follows other vehicles through a shared MQTT broker, for the
// console's wall view: one tile per vehicle of a workshop.
//
// A Follower subscribes on the broker to what other Plenum daemons publish
// under <prefix>/<vehicle>/ (see pipeline/mqttpub for the payloads):
//
//	status          retained; online (with since) or offline (also the last will)
//	snapshot        every fresh channel, about once a second
//	events          warnings raised and cleared, turbo-lag measurements, runs
//	warning/<rule>  retained while the warning is active; empty clears it
//
// and keeps, per vehicle, its status and since when, the latest snapshot and
// its time, the active warnings, the last events (bounded) and when a live
// message last arrived. A vehicle from which nothing live arrived for
// StaleAfter is stale, judged by the injected clock: a tile that stopped
// updating must never look live. Retained messages (a status or warning the
// broker kept) tell what a vehicle last said, not that it is there: a
// vehicle known only from them is stale from the start.
//
// The follower skips this daemon's own vehicle (Config.Self): the console
// shows it from its own pipeline, fresher and without the broker.
//
// Everything is bounded: at most MaxVehicles vehicles (when full, the
// vehicle heard from least recently is forgotten if it is stale, else the
// newcomer is dropped and counted), EventsKept events and 64 warnings per
// vehicle, and payloads of at most 64 KiB. A malformed payload is counted
// and logged once per burst, never fatal. While the broker is away the
// client reconnects with backoff (paho's auto-reconnect), logged once per
// burst, and resubscribes on each connection.
package fleet

import (
	"context"
	"crypto/tls"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"sort"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"

	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/mqttpub"
)

// Defaults and fixed bounds.
const (
	DefaultStaleAfter  = 5 * time.Second
	DefaultMaxVehicles = 64
	DefaultEventsKept  = 20
	// MaxWarnings bounds the active warnings kept per vehicle.
	MaxWarnings = 64
	// MaxPayload is the largest payload read; larger ones are malformed.
	MaxPayload = 64 << 10
	// burstGap is the quiet time after which a malformed payload or a
	// refused vehicle is logged again.
	burstGap = 30 * time.Second
)

// Config configures a Follower.
type Config struct {
	Broker   string // e.g. tcp://broker.workshop.lan:1883 or ssl://…:8883
	ClientID string // default "plenum-follow-<Self>" (or "plenum-follow")
	Username string
	Password string
	TLS      *tls.Config
	Prefix   string // the first topic segment; default "plenum"
	// Self is this daemon's vehicle: its messages are skipped.
	Self string
	// StaleAfter is how long a vehicle may stay silent before it is stale;
	// default 5 s.
	StaleAfter time.Duration
	// MaxVehicles bounds the vehicles followed; default 64.
	MaxVehicles int
	// EventsKept is how many of each vehicle's last events are kept;
	// default 20.
	EventsKept int
	// Clock judges staleness and stamps arrivals; default the system clock.
	Clock  clock.Clock
	Logger *slog.Logger
}

// Vehicle is what is known of one vehicle followed.
type Vehicle struct {
	Name string
	// State is the last status: "online", "offline", or "" before any
	// status (or after its retained status was cleared).
	State string
	// Since is when that status began: the online message's since, or when
	// the follower learned that the vehicle went offline.
	Since   time.Time
	Version string
	// Heard is when a live (not retained) message last arrived from the
	// vehicle; zero when only retained ones did.
	Heard time.Time
	// Stale is true when nothing live arrived for StaleAfter.
	Stale bool
	// Snapshot is the latest snapshot's channels, taken at SnapshotTime.
	Snapshot     map[string]mqttpub.Value
	SnapshotTime time.Time
	// Warnings are the active warnings by rule, sorted by rule.
	Warnings []Warning
	// Events are the last events, oldest first.
	Events []mqttpub.EventPayload
}

// Warning is one active warning: the raise event kept on warning/<rule>.
type Warning struct {
	Rule  string
	Event mqttpub.EventPayload
}

// Stats are the follower's counters.
type Stats struct {
	// Messages counts the messages read (this daemon's own included).
	Messages atomic.Uint64
	// Malformed counts payloads that could not be read: not JSON, a
	// missing or unknown field, too large, or a topic that is no vehicle's.
	Malformed atomic.Uint64
	// Dropped counts messages not kept because a bound was reached: a
	// vehicle beyond MaxVehicles, a warning beyond MaxWarnings.
	Dropped atomic.Uint64
	// ConnectFailures counts failed connection attempts; Lost counts
	// connections lost after they were made.
	ConnectFailures, Lost atomic.Uint64
}

// vehicle is the follower's own record of one vehicle.
type vehicle struct {
	name         string
	state        string
	since        time.Time
	version      string
	heard        time.Time
	snapshot     map[string]mqttpub.Value
	snapshotTime time.Time
	warnings     map[string]mqttpub.EventPayload
	events       []mqttpub.EventPayload // ring of EventsKept, oldest at head
	head         int
	stale        bool // as of the last sweep, for change notices
}

// Follower follows other vehicles through a shared broker.
type Follower struct {
	cfg    Config
	clk    clock.Clock
	log    *slog.Logger
	client paho.Client
	stats  Stats

	mu        sync.Mutex
	vehicles  map[string]*vehicle
	changed   chan struct{} // closed at the next change
	malformAt time.Time     // last malformed payload, for once-per-burst logging
	dropAt    time.Time     // last drop, likewise

	conn struct {
		sync.Mutex
		failing  bool
		reason   string
		attempts uint64
	}
}

// New prepares a follower; Run connects and follows.
func New(cfg Config) (*Follower, error) {
	if cfg.Broker == "" {
		return nil, errors.New("fleet: the broker must be set")
	}
	if cfg.Prefix == "" {
		cfg.Prefix = "plenum"
	}
	if strings.ContainsAny(cfg.Prefix, "+#") || strings.HasPrefix(cfg.Prefix, "/") || strings.HasSuffix(cfg.Prefix, "/") {
		return nil, fmt.Errorf("fleet: prefix %q must not contain '+' or '#' nor begin or end with '/'", cfg.Prefix)
	}
	if cfg.StaleAfter <= 0 {
		cfg.StaleAfter = DefaultStaleAfter
	}
	if cfg.MaxVehicles <= 0 {
		cfg.MaxVehicles = DefaultMaxVehicles
	}
	if cfg.EventsKept <= 0 {
		cfg.EventsKept = DefaultEventsKept
	}
	if cfg.ClientID == "" {
		cfg.ClientID = "plenum-follow"
		if cfg.Self != "" {
			cfg.ClientID += "-" + cfg.Self
		}
	}
	log := cfg.Logger
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	f := &Follower{cfg: cfg, clk: clock.Or(cfg.Clock), log: log, vehicles: map[string]*vehicle{}, changed: make(chan struct{})}
	opts := mqttpub.ClientOptions(cfg.Broker, cfg.ClientID, cfg.Username, cfg.Password, cfg.TLS).
		SetOnConnectHandler(f.onConnect).
		SetConnectionNotificationHandler(f.onNotification).
		SetConnectionLostHandler(func(_ paho.Client, err error) {
			f.stats.Lost.Add(1)
			log.Warn("follow: connection to the shared broker lost; reconnecting", "broker", cfg.Broker, "err", err)
		})
	f.client = paho.NewClient(opts)
	return f, nil
}

// Topics returns the subscriptions the follower makes.
func (f *Follower) Topics() []string {
	p := f.cfg.Prefix
	return []string{p + "/+/status", p + "/+/snapshot", p + "/+/events", p + "/+/warning/+"}
}

func (f *Follower) onConnect(c paho.Client) {
	f.conn.Lock()
	if f.conn.failing {
		f.log.Info("follow: connected to the shared broker after failed attempts", "broker", f.cfg.Broker, "failed_attempts", f.conn.attempts)
	} else {
		f.log.Info("follow: connected to the shared broker", "broker", f.cfg.Broker)
	}
	f.conn.failing, f.conn.reason, f.conn.attempts = false, "", 0
	f.conn.Unlock()
	filters := map[string]byte{}
	for _, t := range f.Topics() {
		filters[t] = 0
	}
	tok := c.SubscribeMultiple(filters, func(_ paho.Client, m paho.Message) {
		f.handle(m.Topic(), m.Payload(), m.Retained())
	})
	go func() {
		if tok.WaitTimeout(10*time.Second) && tok.Error() != nil {
			f.log.Error("follow: cannot subscribe on the shared broker", "err", tok.Error())
			return
		}
		if st, ok := tok.(*paho.SubscribeToken); ok {
			for topic, code := range st.Result() {
				if code >= 0x80 {
					f.log.Error("follow: the shared broker refused a subscription (its ACL?)", "topic", topic, "code", code)
				}
			}
		}
	}()
	f.notify()
}

func (f *Follower) onNotification(_ paho.Client, n paho.ConnectionNotification) {
	fl, ok := n.(paho.ConnectionNotificationFailed)
	if !ok {
		return
	}
	f.stats.ConnectFailures.Add(1)
	reason := "unknown"
	if fl.Reason != nil {
		reason = fl.Reason.Error()
	}
	f.conn.Lock()
	defer f.conn.Unlock()
	f.conn.attempts++
	if f.conn.failing && f.conn.reason == reason {
		return
	}
	f.conn.failing, f.conn.reason = true, reason
	f.log.Warn("follow: cannot connect to the shared broker; retrying in the background (logged again when the reason changes or once connected)",
		"broker", f.cfg.Broker, "reason", reason)
}

// Run connects (retrying in the background while the broker is away) and
// follows until ctx ends; it returns nil then. It also watches the clock so
// that a vehicle turning stale is announced on Changes.
func (f *Follower) Run(ctx context.Context) error {
	tok := f.client.Connect()
	select {
	case <-tok.Done():
		if err := tok.Error(); err != nil {
			return fmt.Errorf("follow: connect %s: %w", f.cfg.Broker, err)
		}
	case <-time.After(100 * time.Millisecond):
	}
	defer f.client.Disconnect(250)
	f.watch(ctx)
	return nil
}

// watch sweeps for vehicles turning stale a few times per StaleAfter until
// ctx ends.
func (f *Follower) watch(ctx context.Context) {
	every := f.cfg.StaleAfter / 10
	if every < 10*time.Millisecond {
		every = 10 * time.Millisecond
	}
	for {
		select {
		case <-ctx.Done():
			return
		case <-f.clk.After(every):
			f.sweep()
		}
	}
}

// sweep announces vehicles that turned stale or fresh since the last sweep.
func (f *Follower) sweep() {
	now := f.clk.Now()
	f.mu.Lock()
	defer f.mu.Unlock()
	changed := false
	for _, v := range f.vehicles {
		if s := f.isStale(v, now); s != v.stale {
			v.stale, changed = s, true
		}
	}
	if changed {
		f.notifyLocked()
	}
}

func (f *Follower) isStale(v *vehicle, now time.Time) bool {
	return v.heard.IsZero() || now.Sub(v.heard) >= f.cfg.StaleAfter
}

// Changes returns a channel that is closed at the next change: a message
// taken, a vehicle turning stale, a (re)connection. Call it again after
// each close; any number of readers may wait on it.
func (f *Follower) Changes() <-chan struct{} {
	f.mu.Lock()
	defer f.mu.Unlock()
	return f.changed
}

func (f *Follower) notify() {
	f.mu.Lock()
	defer f.mu.Unlock()
	f.notifyLocked()
}

func (f *Follower) notifyLocked() {
	close(f.changed)
	f.changed = make(chan struct{})
}

// handle takes one message; it runs on the MQTT client's goroutine.
func (f *Follower) handle(topic string, payload []byte, retained bool) {
	f.stats.Messages.Add(1)
	rest, ok := strings.CutPrefix(topic, f.cfg.Prefix+"/")
	name, kind, ok2 := strings.Cut(rest, "/")
	if !ok || !ok2 || name == "" {
		f.malformed(topic, "not a vehicle's topic")
		return
	}
	if name == f.cfg.Self {
		return
	}
	if len(payload) > MaxPayload {
		f.malformed(topic, fmt.Sprintf("payload of %d bytes, more than %d", len(payload), MaxPayload))
		return
	}
	now := f.clk.Now()
	var apply func(v *vehicle) (bool, error)
	switch {
	case kind == "status":
		apply = func(v *vehicle) (bool, error) { return true, f.takeStatus(v, payload, now) }
	case kind == "snapshot":
		apply = func(v *vehicle) (bool, error) { return true, takeSnapshot(v, payload) }
	case kind == "events":
		apply = func(v *vehicle) (bool, error) { return true, f.takeEvent(v, payload) }
	case strings.HasPrefix(kind, "warning/"):
		rule := strings.TrimPrefix(kind, "warning/")
		if rule == "" || strings.Contains(rule, "/") {
			f.malformed(topic, "no warning rule in the topic")
			return
		}
		apply = func(v *vehicle) (bool, error) { return takeWarning(v, rule, payload) }
	default:
		f.malformed(topic, "not a topic the follower reads")
		return
	}
	f.mu.Lock()
	defer f.mu.Unlock()
	v := f.vehicleLocked(name, now)
	if v == nil {
		f.droppedLocked(now, "follow: more vehicles than max_vehicles, none of them stale; this one is not shown", "vehicle", name)
		return
	}
	kept, err := apply(v)
	if err != nil {
		f.malformedLocked(now, topic, err.Error())
		if v.state == "" && v.heard.IsZero() && v.snapshot == nil && len(v.warnings) == 0 && len(v.events) == 0 {
			delete(f.vehicles, name) // a vehicle known from nothing but a bad payload
		}
		return
	}
	if !kept {
		f.droppedLocked(now, "follow: more active warnings than the follower keeps for a vehicle", "vehicle", name, "rule", strings.TrimPrefix(kind, "warning/"))
	}
	if !retained {
		v.heard = now
	}
	v.stale = f.isStale(v, now)
	f.notifyLocked()
}

// vehicleLocked returns the record of name, making one if there is room
// (forgetting the stale vehicle heard from least recently when full); nil
// when there is none.
func (f *Follower) vehicleLocked(name string, now time.Time) *vehicle {
	if v, ok := f.vehicles[name]; ok {
		return v
	}
	if len(f.vehicles) >= f.cfg.MaxVehicles {
		var oldest *vehicle
		for _, v := range f.vehicles {
			if f.isStale(v, now) && (oldest == nil || v.heard.Before(oldest.heard) || (v.heard.Equal(oldest.heard) && v.name < oldest.name)) {
				oldest = v
			}
		}
		if oldest == nil {
			return nil
		}
		delete(f.vehicles, oldest.name)
		f.log.Info("follow: forgot a stale vehicle to make room for another (max_vehicles)", "forgot", oldest.name, "vehicle", name)
	}
	v := &vehicle{name: name, warnings: map[string]mqttpub.EventPayload{}}
	f.vehicles[name] = v
	return v
}

func (f *Follower) takeStatus(v *vehicle, payload []byte, now time.Time) error {
	if len(payload) == 0 {
		v.state, v.since, v.version = "", time.Time{}, "" // the retained status was cleared
		return nil
	}
	var st mqttpub.Status
	if err := json.Unmarshal(payload, &st); err != nil {
		return fmt.Errorf("status is not JSON: %w", err)
	}
	switch st.State {
	case "online":
		since := now
		if st.Since != "" {
			t, err := time.Parse(time.RFC3339Nano, st.Since)
			if err != nil {
				return fmt.Errorf("status since %q is not an RFC 3339 time", st.Since)
			}
			since = t
		}
		v.since = since
	case "offline":
		if v.state != "offline" {
			v.since = now
		}
	default:
		return fmt.Errorf("status state %q is neither online nor offline", st.State)
	}
	v.state, v.version = st.State, st.Version
	return nil
}

func takeSnapshot(v *vehicle, payload []byte) error {
	var sn mqttpub.Snapshot
	if err := json.Unmarshal(payload, &sn); err != nil {
		return fmt.Errorf("snapshot is not JSON: %w", err)
	}
	t, err := time.Parse(time.RFC3339Nano, sn.T)
	if err != nil {
		return fmt.Errorf("snapshot time %q is not an RFC 3339 time", sn.T)
	}
	if sn.Channels == nil {
		sn.Channels = map[string]mqttpub.Value{}
	}
	v.snapshot, v.snapshotTime = sn.Channels, t
	return nil
}

func readEvent(payload []byte) (mqttpub.EventPayload, error) {
	var ep mqttpub.EventPayload
	if err := json.Unmarshal(payload, &ep); err != nil {
		return ep, fmt.Errorf("event is not JSON: %w", err)
	}
	if ep.Kind == "" {
		return ep, errors.New("event has no kind")
	}
	return ep, nil
}

func (f *Follower) takeEvent(v *vehicle, payload []byte) error {
	ep, err := readEvent(payload)
	if err != nil {
		return err
	}
	if len(v.events) < f.cfg.EventsKept {
		v.events = append(v.events, ep)
		return nil
	}
	v.events[v.head] = ep
	v.head = (v.head + 1) % len(v.events)
	return nil
}

// takeWarning sets or (empty payload) clears a warning; kept is false when
// the warning was dropped for the bound.
func takeWarning(v *vehicle, rule string, payload []byte) (kept bool, err error) {
	if len(payload) == 0 {
		delete(v.warnings, rule)
		return true, nil
	}
	ep, err := readEvent(payload)
	if err != nil {
		return true, err
	}
	if _, ok := v.warnings[rule]; !ok && len(v.warnings) >= MaxWarnings {
		return false, nil
	}
	v.warnings[rule] = ep
	return true, nil
}

func (f *Follower) malformed(topic, why string) {
	now := f.clk.Now()
	f.mu.Lock()
	defer f.mu.Unlock()
	f.malformedLocked(now, topic, why)
}

// malformedLocked counts a malformed message and logs the first of a burst
// (malformed messages less than burstGap apart).
func (f *Follower) malformedLocked(now time.Time, topic, why string) {
	n := f.stats.Malformed.Add(1)
	first := f.malformAt.IsZero() || now.Sub(f.malformAt) >= burstGap
	f.malformAt = now
	if first {
		f.log.Warn("follow: a message from the shared broker cannot be read; it is skipped (counted in plenum_fleet_malformed_messages_total, logged again after a quiet spell)",
			"topic", topic, "reason", why, "malformed_so_far", n)
	}
}

func (f *Follower) droppedLocked(now time.Time, msg string, args ...any) {
	f.stats.Dropped.Add(1)
	first := f.dropAt.IsZero() || now.Sub(f.dropAt) >= burstGap
	f.dropAt = now
	if first {
		f.log.Warn(msg+" (counted in plenum_fleet_dropped_messages_total, logged again after a quiet spell)", args...)
	}
}

// Vehicles returns a copy of every vehicle followed, sorted by name, with
// Stale judged at the clock's present.
func (f *Follower) Vehicles() []Vehicle {
	now := f.clk.Now()
	f.mu.Lock()
	defer f.mu.Unlock()
	out := make([]Vehicle, 0, len(f.vehicles))
	for _, v := range f.vehicles {
		c := Vehicle{Name: v.name, State: v.state, Since: v.since, Version: v.version, Heard: v.heard,
			Stale: f.isStale(v, now), SnapshotTime: v.snapshotTime}
		if v.snapshot != nil {
			c.Snapshot = make(map[string]mqttpub.Value, len(v.snapshot))
			for k, x := range v.snapshot {
				c.Snapshot[k] = x
			}
		}
		for rule, ep := range v.warnings {
			c.Warnings = append(c.Warnings, Warning{Rule: rule, Event: copyEvent(ep)})
		}
		sort.Slice(c.Warnings, func(i, j int) bool { return c.Warnings[i].Rule < c.Warnings[j].Rule })
		for i := range v.events {
			c.Events = append(c.Events, copyEvent(v.events[(v.head+i)%len(v.events)]))
		}
		out = append(out, c)
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Name < out[j].Name })
	return out
}

func copyEvent(e mqttpub.EventPayload) mqttpub.EventPayload {
	if e.Fields != nil {
		m := make(map[string]float64, len(e.Fields))
		for k, v := range e.Fields {
			m[k] = v
		}
		e.Fields = m
	}
	if e.Tags != nil {
		m := make(map[string]string, len(e.Tags))
		for k, v := range e.Tags {
			m[k] = v
		}
		e.Tags = m
	}
	return e
}

// Stats returns the follower's counters.
func (f *Follower) Stats() *Stats { return &f.stats }

// Connected reports whether the follower is connected to the broker.
func (f *Follower) Connected() bool { return f.client.IsConnectionOpen() }

// Report gives the follower's health (kind "fleet", name "follow"): Up
// while connected; the counters messages, malformed_messages,
// dropped_messages, connect_failures and lost_connections; the gauges
// vehicles and stale_vehicles.
func (f *Follower) Report() pipeline.HealthReport {
	vs := f.Vehicles()
	stale := 0
	for _, v := range vs {
		if v.Stale {
			stale++
		}
	}
	return pipeline.HealthReport{Kind: "fleet", Name: "follow", Up: f.Connected(),
		Counters: []pipeline.NamedCount{
			{Name: "messages", Value: f.stats.Messages.Load()},
			{Name: "malformed_messages", Value: f.stats.Malformed.Load()},
			{Name: "dropped_messages", Value: f.stats.Dropped.Load()},
			{Name: "connect_failures", Value: f.stats.ConnectFailures.Load()},
			{Name: "lost_connections", Value: f.stats.Lost.Load()},
		},
		Gauges: []pipeline.NamedValue{
			{Name: "vehicles", Value: float64(len(vs))},
			{Name: "stale_vehicles", Value: float64(stale)},
		}}
}
