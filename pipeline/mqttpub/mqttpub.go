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
package mqttpub

import (
	"context"
	"crypto/tls"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"math"
	"strings"
	"sync/atomic"
	"time"

	paho "github.com/eclipse/paho.mqtt.golang"

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
}

// Stats are the publisher's counters.
type Stats struct {
	Published, Coalesced, Failed atomic.Uint64
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
	log := cfg.Logger
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	p := &Publisher{cfg: cfg, reg: reg, sub: sub, log: log, now: time.Now}
	opts := paho.NewClientOptions().
		AddBroker(cfg.Broker).
		SetClientID(cfg.ClientID).
		SetUsername(cfg.Username).
		SetPassword(cfg.Password).
		SetTLSConfig(cfg.TLS).
		SetCleanSession(true).
		SetAutoReconnect(true).
		SetConnectRetry(true).
		SetConnectRetryInterval(time.Second).
		SetMaxReconnectInterval(10*time.Second).
		SetConnectTimeout(5*time.Second).
		SetWriteTimeout(5*time.Second).
		SetBinaryWill(p.Topic("status"), p.statusPayload("offline"), 1, true).
		SetOnConnectHandler(func(c paho.Client) {
			// Handlers must not block: publish without waiting.
			c.Publish(p.Topic("status"), 1, true, p.statusPayload("online"))
			if cfg.OnCommand != nil {
				tok := c.Subscribe(p.Topic("cmd/#"), 1, p.onCommand)
				go func() {
					if tok.WaitTimeout(10*time.Second) && tok.Error() != nil {
						log.Error("mqtt: cannot subscribe to the command topics", "err", tok.Error())
					}
					if st, ok := tok.(*paho.SubscribeToken); ok {
						for topic, code := range st.Result() {
							if code >= 0x80 {
								log.Error("mqtt: the broker refused the command subscription", "topic", topic, "code", code)
							}
						}
					}
				}()
			}
			log.Info("mqtt connected", "broker", cfg.Broker)
		}).
		SetConnectionLostHandler(func(_ paho.Client, err error) {
			log.Warn("mqtt connection lost; live values are coalesced until it returns", "err", err)
		})
	p.client = paho.NewClient(opts)
	return p, nil
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

// Connected reports whether the client is connected to the broker.
func (p *Publisher) Connected() bool { return p.client.IsConnectionOpen() }

// Report gives the publisher's health: connected, and its counts of
// messages published, live values coalesced and publishes that failed.
func (p *Publisher) Report() pipeline.HealthReport {
	return pipeline.HealthReport{Kind: "mqtt", Name: "publisher", Up: p.Connected(), Counters: []pipeline.NamedCount{
		{Name: "published_messages", Value: p.stats.Published.Load()},
		{Name: "coalesced_values", Value: p.stats.Coalesced.Load()},
		{Name: "failed_publishes", Value: p.stats.Failed.Load()},
	}}
}

func (p *Publisher) statusPayload(state string) []byte {
	b, _ := json.Marshal(map[string]string{"state": state, "vehicle": p.cfg.Vehicle, "version": p.cfg.Version,
		"notice": "advisory only, not a safety system"})
	return b
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
				t := p.client.Publish(p.Topic("status"), 1, true, p.statusPayload("offline"))
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
				p.client.Publish(p.Topic("ch/"+c.Name), 0, false, payload)
				p.stats.Published.Add(1)
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
	payload, err := json.Marshal(map[string]any{"t": now.UTC().Format(time.RFC3339Nano), "channels": vals})
	if err != nil {
		p.stats.Failed.Add(1)
		return
	}
	p.client.Publish(p.Topic("snapshot"), 0, false, payload)
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
	p.client.Publish(topic, 1, retain, payload)
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
		if !tok.WaitTimeout(wait) || tok.Error() != nil {
			return // retried later
		}
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
