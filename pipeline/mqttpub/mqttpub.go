// Package mqttpub publishes the pipeline over MQTT with paho.
//
// Topic layout, under <prefix>/<vehicle>/ (prefix "plenum" by default):
//
//	status            retained; {"state":"online"|"offline",...}; "offline" is also the last will
//	ch/<channel>      one channel's latest value, at most MaxRate per channel, QoS 0:
//	                  {"v":101.3,"unit":"pascals","q":"ok","t":"2026-12-01T22:00:00.123Z"}
//	snapshot          every SnapshotEvery, all fresh channels in one JSON object, QoS 0
//	events            every event (lag measurement, warning raised or cleared, run start/end), QoS 1
//	warning/<rule>    retained while a warning is active; an empty retained message clears it
//	run/summary       retained; the summary of the last recorded run
//
// With an Outbox, events, warnings and summaries are kept on disk until the
// broker acknowledges them, and sent in order after an outage or a restart.
//
// Live values are latest-value: while the broker is away they are coalesced
// and the newest is sent on reconnect; nothing queues up without bound.
//
// # What can be seen of a broker's refusals
//
// The publisher speaks MQTT 3.1.1. A refused connection (bad user name or
// password, not authorised, a certificate the configured CA does not
// verify, nothing listening) is reported by the client library: it is
// counted (connect_failures), logged once per burst with its reason, and
// Report's Up is false. A broker's ACL refusal of a publish is not: in
// 3.1.1 the broker acknowledges a refused QoS 1 publish as if it had taken
// it and silently drops a refused QoS 0 one. So after each connect the
// publisher subscribes to its own status topic and waits for its "online"
// message (which carries the connection's start time) to come back; if it
// does not within Config.ConfirmWithin, it logs that the broker does not
// deliver what it publishes (an ACL that refuses its publishes, or one that
// does not let it read its own status topic) and reports the gauge
// publish_confirmed 0. Publishes that fail or are not acknowledged in time
// are counted in failed_publishes.
package mqttpub

import (
	"bytes"
	"context"
	"crypto/tls"
	"crypto/x509"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"math"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"
	"github.com/eclipse/paho.mqtt.golang/packets"

	"github.com/plenum-engine/plenum/pipeline"
)

// Config configures the publisher.
type Config struct {
	Broker        string // e.g. tcp://127.0.0.1:1883 or ssl://host:8883
	ClientID      string // one per daemon
	Username      string
	Password      string
	TLS           *tls.Config
	Prefix        string // default "plenum"
	Vehicle       string // topic segment identifying the car or cell
	MaxRate       float64
	SnapshotEvery time.Duration
	Version       string
	Logger        *slog.Logger
	// Outbox, when set, carries events, warnings and summaries: they are
	// kept on disk until the broker acknowledges them (QoS 1), in order,
	// across broker outages and restarts.
	Outbox *Outbox
	// OnCommand, when set, receives every message on
	// <prefix>/<vehicle>/cmd/<suffix> (subscribed at QoS 1 on each connect).
	// What it returns is published at QoS 1 on <prefix>/<vehicle>/reply/<suffix>.
	// It runs on the MQTT client's goroutine and must not block for long.
	// Who may publish commands is the broker's business: the embedded broker
	// lets only users with command rights write there.
	OnCommand func(suffix string, payload []byte) []byte
	// ConfirmWithin is how long after connecting the publisher waits to
	// read its own "online" status back before it warns that the broker
	// does not deliver what it publishes; default 5 s.
	ConfirmWithin time.Duration
	// AckWithin is how long a QoS 1 publish may wait for the broker's
	// acknowledgement before it is counted as failed; default 10 s.
	AckWithin time.Duration
}

// Stats are the publisher's counters.
type Stats struct {
	Published, Coalesced atomic.Uint64
	// Failed counts publishes that failed: not encodable, refused by the
	// client (not connected), or not acknowledged by the broker in time
	// (outbox messages stay queued and are retried).
	Failed atomic.Uint64
	// ConnectFailures counts connection attempts the broker refused or
	// that failed (network, TLS, CONNACK refusal).
	ConnectFailures atomic.Uint64
	// Lost counts connections lost after they were established.
	Lost atomic.Uint64
	// Unconfirmed counts connections on which the publisher's own status
	// message did not come back within ConfirmWithin.
	Unconfirmed atomic.Uint64
}

// Publisher forwards one pipeline subscription to MQTT.
type Publisher struct {
	cfg    Config
	reg    *pipeline.Registry
	sub    *pipeline.Subscription
	client paho.Client
	log    *slog.Logger
	stats  Stats
	now    func() time.Time
	store  *pipeline.Store

	// conn is the state of the connection, for once-per-burst logging and
	// the confirmation of delivery; guarded by its mutex.
	conn struct {
		sync.Mutex
		failing   bool          // connection attempts are failing
		reason    string        // the reason last logged in this burst
		attempts  uint64        // failed attempts in this burst
		online    []byte        // this connection's "online" payload
		epoch     uint64        // counts connections
		confirmed bool          // the online payload came back on this connection
		back      chan struct{} // closed when it does
		silent    bool          // the last connection was not confirmed (logged)
		pubFail   bool          // publishes are failing (logged)
	}
}

// New prepares a publisher reading sub. Call Run to connect and publish.
func New(cfg Config, reg *pipeline.Registry, sub *pipeline.Subscription) (*Publisher, error) {
	if cfg.Prefix == "" {
		cfg.Prefix = "plenum"
	}
	if cfg.Vehicle == "" {
		return nil, errors.New("mqtt: vehicle must be set")
	}
	if !validSegment(cfg.Vehicle) {
		return nil, fmt.Errorf("mqtt: vehicle %q must not contain '/', '+', '#' or spaces", cfg.Vehicle)
	}
	if cfg.MaxRate <= 0 {
		cfg.MaxRate = 10
	}
	if cfg.SnapshotEvery <= 0 {
		cfg.SnapshotEvery = time.Second
	}
	if cfg.ClientID == "" {
		cfg.ClientID = "plenum-" + cfg.Vehicle
	}
	if cfg.ConfirmWithin <= 0 {
		cfg.ConfirmWithin = 5 * time.Second
	}
	if cfg.AckWithin <= 0 {
		cfg.AckWithin = 10 * time.Second
	}
	log := cfg.Logger
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	p := &Publisher{cfg: cfg, reg: reg, sub: sub, log: log, now: time.Now}
	opts := ClientOptions(cfg.Broker, cfg.ClientID, cfg.Username, cfg.Password, cfg.TLS).
		SetWriteTimeout(5*time.Second).
		SetBinaryWill(p.Topic("status"), p.statusPayload("offline", time.Time{}), 1, true).
		SetOnConnectHandler(p.onConnect).
		SetConnectionNotificationHandler(p.onNotification).
		SetConnectionLostHandler(func(_ paho.Client, err error) {
			p.stats.Lost.Add(1)
			log.Warn("mqtt connection lost; live values are coalesced until it returns", "err", err)
		})
	p.client = paho.NewClient(opts)
	return p, nil
}

// onConnect runs on every (re)connection: it publishes "online", subscribes
// to the commands and to its own status topic to confirm delivery. Handlers
// must not block: it publishes and subscribes without waiting.
func (p *Publisher) onConnect(c paho.Client) {
	online := p.statusPayload("online", p.now())
	p.conn.Lock()
	p.conn.epoch++
	epoch := p.conn.epoch
	p.conn.online, p.conn.confirmed = online, false
	back := make(chan struct{})
	p.conn.back = back
	p.conn.pubFail = false
	if p.conn.failing {
		p.log.Info("mqtt connected after failed attempts", "broker", p.cfg.Broker, "failed_attempts", p.conn.attempts)
	} else {
		p.log.Info("mqtt connected", "broker", p.cfg.Broker)
	}
	p.conn.failing, p.conn.reason, p.conn.attempts = false, "", 0
	p.conn.Unlock()
	stok := c.Subscribe(p.Topic("status"), 1, p.onStatus)
	p.watch(c.Publish(p.Topic("status"), 1, true, online), p.Topic("status"))
	if p.cfg.OnCommand != nil {
		tok := c.Subscribe(p.Topic("cmd/#"), 1, p.onCommand)
		go func() {
			if tok.WaitTimeout(10*time.Second) && tok.Error() != nil {
				p.log.Error("mqtt: cannot subscribe to the command topics", "err", tok.Error())
			}
			if st, ok := tok.(*paho.SubscribeToken); ok {
				for topic, code := range st.Result() {
					if code >= 0x80 {
						p.log.Error("mqtt: the broker refused the command subscription", "topic", topic, "code", code)
					}
				}
			}
		}()
	}
	go p.confirm(epoch, back, stok)
}

// onStatus receives the publisher's own status topic: the "online" message
// of this connection coming back confirms that the broker delivers what the
// publisher sends.
func (p *Publisher) onStatus(_ paho.Client, m paho.Message) {
	p.conn.Lock()
	defer p.conn.Unlock()
	if p.conn.confirmed || !bytes.Equal(m.Payload(), p.conn.online) {
		return
	}
	p.conn.confirmed = true
	close(p.conn.back)
	if p.conn.silent {
		p.log.Info("mqtt: the broker delivers this publisher's messages again")
		p.conn.silent = false
	}
}

// confirm waits ConfirmWithin for the connection epoch's "online" message
// to come back, and warns once per burst when it does not.
func (p *Publisher) confirm(epoch uint64, back <-chan struct{}, stok paho.Token) {
	t := time.NewTimer(p.cfg.ConfirmWithin)
	defer t.Stop()
	refused := ""
	if stok.WaitTimeout(p.cfg.ConfirmWithin) {
		if err := stok.Error(); err != nil {
			refused = err.Error()
		} else if st, ok := stok.(*paho.SubscribeToken); ok {
			for _, code := range st.Result() {
				if code >= 0x80 {
					refused = fmt.Sprintf("the broker refused the subscription to %s (code %#x)", p.Topic("status"), code)
				}
			}
		}
	}
	select {
	case <-back:
		return
	case <-t.C:
	}
	p.conn.Lock()
	defer p.conn.Unlock()
	if p.conn.epoch != epoch || p.conn.confirmed || !p.client.IsConnectionOpen() {
		return
	}
	p.stats.Unconfirmed.Add(1)
	if p.conn.silent {
		return // logged once for this burst
	}
	p.conn.silent = true
	args := []any{"broker", p.cfg.Broker, "topic", p.Topic("status"), "waited", p.cfg.ConfirmWithin}
	if refused != "" {
		args = append(args, "subscription", refused)
	}
	p.log.Warn("mqtt: connected, but the broker does not deliver this publisher's own status message back to it: "+
		"its ACL probably refuses what Plenum publishes (MQTT 3.1.1 brokers acknowledge or drop a refused publish without saying so), "+
		"or does not let Plenum read its own status topic", args...)
}

// onNotification counts failed connection attempts and logs the reason once
// per burst (and again when the reason changes).
func (p *Publisher) onNotification(_ paho.Client, n paho.ConnectionNotification) {
	f, ok := n.(paho.ConnectionNotificationFailed)
	if !ok {
		return
	}
	p.stats.ConnectFailures.Add(1)
	reason := explainConnectError(f.Reason)
	p.conn.Lock()
	defer p.conn.Unlock()
	p.conn.attempts++
	if p.conn.failing && p.conn.reason == reason {
		return
	}
	p.conn.failing, p.conn.reason = true, reason
	p.log.Warn("mqtt: cannot connect to the broker; retrying in the background (logged again when the reason changes or once connected)",
		"broker", p.cfg.Broker, "reason", reason)
}

// explainConnectError turns a connection error into one line naming what
// to check.
func explainConnectError(err error) string {
	var unknownCA x509.UnknownAuthorityError
	var verify *tls.CertificateVerificationError
	var hostname x509.HostnameError
	switch {
	case err == nil:
		return "unknown"
	case errors.Is(err, packets.ErrorRefusedBadUsernameOrPassword), errors.Is(err, packets.ErrorRefusedNotAuthorised):
		return "the broker refused the user name or password (" + err.Error() + ")"
	case errors.Is(err, packets.ErrorRefusedIDRejected):
		return "the broker refused the client ID (" + err.Error() + ")"
	case errors.As(err, &unknownCA):
		return "the broker's certificate is not signed by the configured CA: " + unknownCA.Error()
	case errors.As(err, &hostname):
		return "the broker's certificate does not name this host: " + hostname.Error()
	case errors.As(err, &verify):
		return "the broker's certificate does not verify: " + verify.Err.Error()
	}
	return err.Error()
}

// watch counts a publish that fails, or is not acknowledged within
// AckWithin, without blocking the caller.
func (p *Publisher) watch(tok paho.Token, topic string) {
	go func() {
		if !tok.WaitTimeout(p.cfg.AckWithin) {
			p.publishFailed(topic, fmt.Errorf("not acknowledged within %s", p.cfg.AckWithin))
			return
		}
		if err := tok.Error(); err != nil {
			p.publishFailed(topic, err)
			return
		}
		p.publishOK()
	}()
}

// publishFailed counts a failed publish and logs the first of a burst.
func (p *Publisher) publishFailed(topic string, err error) {
	p.stats.Failed.Add(1)
	p.conn.Lock()
	defer p.conn.Unlock()
	if p.conn.pubFail {
		return
	}
	p.conn.pubFail = true
	p.log.Warn("mqtt: a publish failed; counted in plenum_mqtt_failed_publishes_total, logged again after publishes succeed", "topic", topic, "err", err)
}

// publishOK ends a burst of publish failures.
func (p *Publisher) publishOK() {
	p.conn.Lock()
	defer p.conn.Unlock()
	if p.conn.pubFail {
		p.conn.pubFail = false
		p.log.Info("mqtt: publishes succeed again")
	}
}

// onCommand hands a command message to Config.OnCommand and publishes its
// reply.
func (p *Publisher) onCommand(c paho.Client, m paho.Message) {
	suffix, ok := strings.CutPrefix(m.Topic(), p.Topic("cmd/"))
	if !ok || suffix == "" {
		return
	}
	if reply := p.cfg.OnCommand(suffix, m.Payload()); reply != nil {
		c.Publish(p.Topic("reply/"+suffix), 1, false, reply)
	}
}

func validSegment(s string) bool {
	for _, r := range s {
		if r == '/' || r == '+' || r == '#' || r == ' ' || r == 0 {
			return false
		}
	}
	return s != ""
}

// Topic returns the full topic for a suffix under this vehicle.
func (p *Publisher) Topic(suffix string) string {
	return p.cfg.Prefix + "/" + p.cfg.Vehicle + "/" + suffix
}

// Stats returns the publisher's counters.
func (p *Publisher) Stats() *Stats { return &p.stats }

// ClientOptions are Plenum's MQTT client settings, shared by the publisher
// and the fleet follower: MQTT 3.1.1 only (without it a refused CONNECT is
// retried as 3.1 and the broker's reason is lost behind "unacceptable
// protocol version"), a clean session, and reconnection with backoff.
func ClientOptions(broker, clientID, username, password string, tc *tls.Config) *paho.ClientOptions {
	return paho.NewClientOptions().
		AddBroker(broker).
		SetClientID(clientID).
		SetUsername(username).
		SetPassword(password).
		SetTLSConfig(tc).
		SetProtocolVersion(4).
		SetCleanSession(true).
		SetAutoReconnect(true).
		SetConnectRetry(true).
		SetConnectRetryInterval(time.Second).
		SetMaxReconnectInterval(10 * time.Second).
		SetConnectTimeout(5 * time.Second)
}

// Connected reports whether the client is connected to the broker.
func (p *Publisher) Connected() bool { return p.client.IsConnectionOpen() }

// Confirmed reports whether the publisher's own status message came back
// on the current connection: the broker delivers what it publishes.
func (p *Publisher) Confirmed() bool {
	p.conn.Lock()
	defer p.conn.Unlock()
	return p.conn.confirmed && p.client.IsConnectionOpen()
}

// Report gives the publisher's health: Up while connected; the counters
// published_messages, coalesced_values, failed_publishes, connect_failures,
// lost_connections and unconfirmed_connections; the gauge
// publish_confirmed, 1 while the broker is seen to deliver what the
// publisher sends (see the package doc).
func (p *Publisher) Report() pipeline.HealthReport {
	confirmed := 0.0
	if p.Confirmed() {
		confirmed = 1
	}
	return pipeline.HealthReport{Kind: "mqtt", Name: "publisher", Up: p.Connected(), Counters: []pipeline.NamedCount{
		{Name: "published_messages", Value: p.stats.Published.Load()},
		{Name: "coalesced_values", Value: p.stats.Coalesced.Load()},
		{Name: "failed_publishes", Value: p.stats.Failed.Load()},
		{Name: "connect_failures", Value: p.stats.ConnectFailures.Load()},
		{Name: "lost_connections", Value: p.stats.Lost.Load()},
		{Name: "unconfirmed_connections", Value: p.stats.Unconfirmed.Load()},
	}, Gauges: []pipeline.NamedValue{{Name: "publish_confirmed", Value: confirmed}}}
}

// statusPayload is the status message; since, when not zero, is when the
// connection was made (it makes each connection's "online" message unique,
// so that the publisher can recognise its own coming back).
func (p *Publisher) statusPayload(state string, since time.Time) []byte {
	m := Status{State: state, Vehicle: p.cfg.Vehicle, Version: p.cfg.Version, Notice: "advisory only, not a safety system"}
	if !since.IsZero() {
		m.Since = since.UTC().Format(time.RFC3339Nano)
	}
	b, _ := json.Marshal(m)
	return b
}

// Status is the JSON payload of the retained status topic; the last will
// is the same with State "offline" and no Since. Its fields are in the
// order of their names.
type Status struct {
	Notice  string `json:"notice"`
	Since   string `json:"since,omitempty"` // RFC 3339: when this connection was made
	State   string `json:"state"`           // "online" or "offline"
	Vehicle string `json:"vehicle"`
	Version string `json:"version"`
}

// Snapshot is the JSON payload of the snapshot topic: every fresh channel
// by name, at time T (RFC 3339).
type Snapshot struct {
	Channels map[string]Value `json:"channels"`
	T        string           `json:"t"`
}

// Value is the JSON payload of a channel topic.
type Value struct {
	V       float64 `json:"v"`
	Unit    string  `json:"unit"`
	Quality string  `json:"q"`
	Time    string  `json:"t"`
}

type latest struct {
	s       pipeline.Sample
	pending bool
	sentAt  time.Time
}

// Run connects (retrying in the background while the broker is away) and
// publishes until ctx is done, then publishes "offline" and disconnects.
func (p *Publisher) Run(ctx context.Context) error {
	tok := p.client.Connect()
	// With connect-retry on, Connect returns at once and keeps trying.
	select {
	case <-tok.Done():
		if err := tok.Error(); err != nil {
			return fmt.Errorf("mqtt connect %s: %w", p.cfg.Broker, err)
		}
	case <-time.After(100 * time.Millisecond):
	}
	drained := make(chan struct{})
	if p.cfg.Outbox != nil {
		go func() { defer close(drained); p.drainOutbox(ctx) }()
	} else {
		close(drained)
	}
	minGap := time.Duration(float64(time.Second) / p.cfg.MaxRate)
	tick := time.NewTicker(minGap)
	defer tick.Stop()
	snap := time.NewTicker(p.cfg.SnapshotEvery)
	defer snap.Stop()
	var vals []latest
	var buf []pipeline.Sample
	var evs []pipeline.Event
	chans := p.reg.Channels()
	for {
		select {
		case <-ctx.Done():
			p.flushEvents(p.sub, evs)
			<-drained
			if p.cfg.Outbox != nil {
				// What the shutdown itself queued (a run's summary): hand it to a
				// connected broker now rather than at the next start.
				p.publishOutbox(time.Now().Add(time.Second))
			}
			if p.client.IsConnectionOpen() {
				t := p.client.Publish(p.Topic("status"), 1, true, p.statusPayload("offline", time.Time{}))
				t.WaitTimeout(time.Second)
			}
			p.client.Disconnect(250)
			return nil
		case <-p.sub.C():
			buf, evs = p.sub.Drain(buf[:0], evs[:0])
			for _, s := range buf {
				for int(s.Channel) >= len(vals) {
					vals = append(vals, latest{})
				}
				if vals[s.Channel].pending {
					p.stats.Coalesced.Add(1)
				}
				vals[s.Channel].s = s
				vals[s.Channel].pending = true
			}
			for _, e := range evs {
				p.publishEvent(e)
			}
		case <-tick.C:
			if !p.client.IsConnectionOpen() {
				continue // coalesce while away
			}
			if len(chans) < len(vals) {
				chans = p.reg.Channels()
			}
			now := p.now()
			for i := range vals {
				l := &vals[i]
				if !l.pending || now.Sub(l.sentAt) < minGap {
					continue
				}
				c := chans[i]
				payload, err := json.Marshal(valueOf(c, l.s))
				if err != nil {
					p.stats.Failed.Add(1)
					continue
				}
				p.publish0(p.Topic("ch/"+c.Name), payload)
				l.pending = false
				l.sentAt = now
			}
		case <-snap.C:
			if !p.client.IsConnectionOpen() {
				continue
			}
			p.publishSnapshot()
		}
	}
}

func (p *Publisher) flushEvents(sub *pipeline.Subscription, evs []pipeline.Event) {
	_, evs = sub.Drain(nil, evs[:0])
	for _, e := range evs {
		p.publishEvent(e)
	}
}

func valueOf(c pipeline.Channel, s pipeline.Sample) Value {
	v := s.Value
	if math.IsNaN(v) || math.IsInf(v, 0) {
		v = 0
	}
	return Value{V: v, Unit: string(c.Unit), Quality: s.Quality.String(), Time: s.Time.UTC().Format(time.RFC3339Nano)}
}

func (p *Publisher) publishSnapshot() {
	now := p.now()
	chans := p.reg.Channels()
	vals := make(map[string]Value, len(chans))
	var snap []pipeline.Value
	for i, v := range p.storeSnapshot(snap) {
		if i >= len(chans) || !v.Fresh(now, chans[i].Age()) {
			continue
		}
		vals[chans[i].Name] = valueOf(chans[i], pipeline.Sample{Value: v.Value, Time: v.Time, Quality: v.Quality})
	}
	payload, err := json.Marshal(Snapshot{T: now.UTC().Format(time.RFC3339Nano), Channels: vals})
	if err != nil {
		p.stats.Failed.Add(1)
		return
	}
	p.publish0(p.Topic("snapshot"), payload)
}

// publish0 publishes at QoS 0 and counts it; a publish the client refused at
// once (not connected) is counted as failed. A QoS 0 message has no
// acknowledgement: whether the broker took it cannot be known.
func (p *Publisher) publish0(topic string, payload []byte) {
	tok := p.client.Publish(topic, 0, false, payload)
	select {
	case <-tok.Done():
		if err := tok.Error(); err != nil {
			p.publishFailed(topic, err)
			return
		}
	default:
	}
	p.stats.Published.Add(1)
}

// SetStore gives the publisher the latest-value store for snapshots.
func (p *Publisher) SetStore(st *pipeline.Store) { p.store = st }

func (p *Publisher) storeSnapshot(dst []pipeline.Value) []pipeline.Value {
	if p.store == nil {
		return nil
	}
	return p.store.Snapshot(dst)
}

// EventPayload is the JSON payload of an event message.
type EventPayload struct {
	Kind   string             `json:"kind"`
	Name   string             `json:"name,omitempty"`
	Start  string             `json:"start"`
	End    string             `json:"end,omitempty"`
	Fields map[string]float64 `json:"fields,omitempty"`
	Tags   map[string]string  `json:"tags,omitempty"`
}

// EncodeEvent returns the JSON payload for e.
func EncodeEvent(e pipeline.Event) ([]byte, error) {
	ep := EventPayload{Kind: e.Kind, Name: e.Name, Start: e.Start.UTC().Format(time.RFC3339Nano), Tags: e.Tags}
	if !e.End.IsZero() {
		ep.End = e.End.UTC().Format(time.RFC3339Nano)
	}
	if len(e.Fields) > 0 {
		ep.Fields = make(map[string]float64, len(e.Fields))
		for k, v := range e.Fields {
			if !math.IsNaN(v) && !math.IsInf(v, 0) {
				ep.Fields[k] = v
			}
		}
	}
	return json.Marshal(ep)
}

func (p *Publisher) publishEvent(e pipeline.Event) {
	payload, err := EncodeEvent(e)
	if err != nil {
		p.stats.Failed.Add(1)
		p.log.Error("mqtt: encode event", "kind", e.Kind, "err", err)
		return
	}
	p.send(p.Topic("events"), false, payload)
	switch e.Kind {
	case "warning_raised":
		p.send(p.Topic("warning/"+e.Name), true, payload)
	case "warning_cleared":
		p.send(p.Topic("warning/"+e.Name), true, []byte{})
	}
}

// PublishSummary sends a run summary, retained, at least once.
func (p *Publisher) PublishSummary(payload []byte) { p.send(p.Topic("run/summary"), true, payload) }

// send publishes at QoS 1 through the outbox when there is one.
func (p *Publisher) send(topic string, retain bool, payload []byte) {
	if p.cfg.Outbox != nil {
		if _, err := p.cfg.Outbox.Append(topic, retain, payload); err != nil {
			p.stats.Failed.Add(1)
			p.log.Error("mqtt outbox: append failed; publishing directly", "err", err)
		} else {
			return
		}
	}
	p.watch(p.client.Publish(topic, 1, retain, payload), topic)
	p.stats.Published.Add(1)
}

// publishOutbox publishes the outbox in order while connected, one message
// at a time, acknowledging each once the broker has confirmed it, until it
// is empty, a publish fails or the deadline (if not zero) has passed.
func (p *Publisher) publishOutbox(deadline time.Time) {
	o := p.cfg.Outbox
	for p.client.IsConnectionOpen() && (deadline.IsZero() || time.Now().Before(deadline)) {
		m, ok := o.Head()
		if !ok {
			return
		}
		wait := 5 * time.Second
		if !deadline.IsZero() {
			wait = time.Until(deadline)
		}
		tok := p.client.Publish(m.Topic, 1, m.Retain, m.Payload)
		if !tok.WaitTimeout(wait) {
			p.publishFailed(m.Topic, fmt.Errorf("not acknowledged within %s; kept in the outbox and retried", wait.Round(time.Millisecond)))
			return
		}
		if err := tok.Error(); err != nil {
			p.publishFailed(m.Topic, fmt.Errorf("%w; kept in the outbox and retried", err))
			return
		}
		p.publishOK()
		if err := o.Ack(m.Seq); err != nil {
			p.log.Error("mqtt outbox: ack", "err", err)
		}
		p.stats.Published.Add(1)
	}
}

// drainOutbox publishes the outbox whenever it grows and every 250 ms, until
// ctx ends.
func (p *Publisher) drainOutbox(ctx context.Context) {
	o := p.cfg.Outbox
	tick := time.NewTicker(250 * time.Millisecond)
	defer tick.Stop()
	for {
		p.publishOutbox(time.Time{})
		select {
		case <-ctx.Done():
			return
		case <-o.C():
		case <-tick.C:
		}
	}
}
