package console

import (
	"bytes"
	"encoding/json"
	"math"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/plenum-engine/plenum/pipeline"
)

// staleAfter is how long the page waits for any message before it shows
// "connection lost"; the heartbeat is sent well within it.
const staleAfter = 2 * time.Second

// recentEvents is how many events other than warnings a snapshot carries.
const recentEvents = 20

// hub turns the pipeline subscription into per-browser message queues.
// Its loop owns the coalescing state; mu guards the clients and what
// a snapshot needs from past events.
type hub struct {
	cfg      Config
	store    *pipeline.Store
	sub      *pipeline.Subscription
	chans    []pipeline.Channel
	interval time.Duration // 1/Rate
	tick     time.Duration

	// the loop's own state, one entry per channel
	pending   []bool
	latest    []pipeline.Sample
	has       []bool
	lastSent  []time.Time
	staleSent []bool
	lastBeat  time.Time
	samples   []pipeline.Sample
	events    []pipeline.Event
	out       []valueJSON
	ids       []int // the channels a flush sends
	staleOut  []int

	mu       sync.Mutex
	clients  map[*client]struct{}
	views    map[string]*view // by unit override ("" the configured units)
	seq      uint64
	warnings map[string]eventJSON // active, by rule name
	order    []string             // active warnings in the order raised
	recent   []eventJSON
	curRun   string
	runKnown bool
	stopped  bool

	nclients        atomic.Int32 // len(clients), read by the loop without the lock
	running         atomic.Bool
	taken           atomic.Uint64 // samples taken from the subscription (tests wait on it)
	sent            atomic.Uint64
	droppedClients  atomic.Uint64
	droppedMessages atomic.Uint64
}

type client struct {
	q    chan []byte
	gone chan struct{}
	view *view
}

// view is the browsers that read values in the same units: their
// formatter, how many they are, and the frame of the current flush.
type view struct {
	f     Formatter
	n     int
	frame []byte
}

func newHub(cfg Config, p Pipeline) *hub {
	chans := p.Registry().Channels()
	n := len(chans)
	iv := time.Duration(float64(time.Second) / cfg.Rate)
	return &hub{
		cfg: cfg, store: p.Store(), sub: p.Subscribe("console", cfg.SubscriptionSize), chans: chans,
		interval: iv, tick: max(iv/4, time.Millisecond),
		pending: make([]bool, n), latest: make([]pipeline.Sample, n), has: make([]bool, n),
		lastSent: make([]time.Time, n), staleSent: make([]bool, n),
		clients: map[*client]struct{}{}, views: map[string]*view{}, warnings: map[string]eventJSON{},
	}
}

// Messages, as JSON in the data lines of the stream.

type channelJSON struct {
	ID          int    `json:"id"`
	Name        string `json:"name"`
	Quantity    string `json:"quantity"`
	Unit        string `json:"unit"`
	Canonical   string `json:"canonical_unit"`
	Origin      string `json:"origin"`
	MaxAgeMS    int64  `json:"max_age_ms"`
	Description string `json:"description,omitempty"`
}

type valueJSON struct {
	C int      `json:"c"`           // channel ID
	V *float64 `json:"v"`           // canonical value, null when not finite
	X string   `json:"x"`           // display text
	U string   `json:"u"`           // display unit
	Q string   `json:"q"`           // quality
	T int64    `json:"t"`           // sample time, Unix ms
	S bool     `json:"s,omitempty"` // older than the channel's maximum age
}

type eventJSON struct {
	Kind     string             `json:"kind"`
	Name     string             `json:"name"`
	Severity string             `json:"severity,omitempty"`
	Start    int64              `json:"start"`
	End      int64              `json:"end"`
	Acked    bool               `json:"acked,omitempty"`
	Fields   map[string]float64 `json:"fields,omitempty"`
	// Text holds the fields for people: the name without its unit, the
	// value in the configured display units ("boost final": "110 kPa").
	Text map[string]string `json:"text,omitempty"`
	Tags map[string]string `json:"tags,omitempty"`
}

type snapshotJSON struct {
	T           int64         `json:"t"`
	Vehicle     string        `json:"vehicle"`
	Run         string        `json:"run"`
	RateHz      float64       `json:"rate_hz"`
	HeartbeatMS int64         `json:"heartbeat_ms"`
	LostAfterMS int64         `json:"lost_after_ms"`
	Controls    controlsJSON  `json:"controls"`
	Channels    []channelJSON `json:"channels"`
	Values      []valueJSON   `json:"values"`
	Warnings    []eventJSON   `json:"warnings"`
	Events      []eventJSON   `json:"events"`
}

type controlsJSON struct {
	Enabled bool   `json:"enabled"`
	Start   string `json:"start"`
	Stop    string `json:"stop"`
	Ack     string `json:"ack"`
}

func ms(t time.Time) int64 {
	if t.IsZero() {
		return 0
	}
	return t.UnixMilli()
}

func (h *hub) value(f Formatter, s pipeline.Sample, stale bool) valueJSON {
	ch := h.chans[s.Channel]
	text, unit := f.Format(ch, s.Value)
	v := valueJSON{C: int(s.Channel), X: text, U: unit, Q: s.Quality.String(), T: ms(s.Time), S: stale}
	if !math.IsNaN(s.Value) && !math.IsInf(s.Value, 0) {
		x := s.Value
		v.V = &x
	}
	return v
}

func toEventJSON(e pipeline.Event, f Formatter) eventJSON {
	j := eventJSON{Kind: e.Kind, Name: e.Name, Start: ms(e.Start), End: ms(e.End), Tags: e.Tags}
	if e.Tags != nil {
		j.Severity = e.Tags["severity"]
	}
	for k, v := range e.Fields {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			continue
		}
		if j.Fields == nil {
			j.Fields, j.Text = map[string]float64{}, map[string]string{}
		}
		j.Fields[k] = v
		if f != nil && k != "active" {
			name, text := fieldText(f, k, v)
			j.Text[name] = text
		}
	}
	return j
}

// fieldText names an event field for people and gives its value in display
// units, by the unit its name ends in: boost_final_pascals is "boost
// final", shown as a boost pressure; t90_seconds is "t90" in seconds.
func fieldText(f Formatter, field string, v float64) (name, text string) {
	for _, u := range []struct{ suffix, channel string }{
		{"_pascals", "boost_pressure"}, {"_rpm", "engine_speed"},
	} {
		if n, ok := strings.CutSuffix(field, u.suffix); ok {
			ch, _ := pipeline.Catalogued(u.channel)
			t, unit := f.Format(ch, v)
			return strings.ReplaceAll(n, "_", " "), strings.TrimSpace(t + " " + unit)
		}
	}
	if n, ok := strings.CutSuffix(field, "_seconds"); ok {
		return strings.ReplaceAll(n, "_", " "), strconv.FormatFloat(v, 'f', 2, 64) + " s"
	}
	if n, ok := strings.CutSuffix(field, "_ratio"); ok {
		return strings.ReplaceAll(n, "_", " "), strconv.FormatFloat(100*v, 'f', 1, 64) + " %"
	}
	return strings.ReplaceAll(field, "_", " "), strconv.FormatFloat(v, 'g', 4, 64)
}

// loop is the loop: it drains the subscription, sends what the rate allows,
// and on each tick sends what was held back, stale flags and heartbeats.
func (h *hub) loop(done <-chan struct{}) {
	h.running.Store(true)
	defer h.stop()
	h.lastBeat = h.cfg.Clock.Now()
	tick := h.cfg.Clock.After(h.tick)
	for {
		select {
		case <-done:
			return
		case <-h.sub.C():
			h.samples, h.events = h.sub.Drain(h.samples[:0], h.events[:0])
			h.take(h.cfg.Clock.Now())
		case <-tick:
			h.onTick(h.cfg.Clock.Now())
			tick = h.cfg.Clock.After(h.tick)
		}
	}
}

// take handles one drain: values first (as far as the rate allows), then
// each event at once.
func (h *hub) take(now time.Time) {
	for _, s := range h.samples {
		if int(s.Channel) >= len(h.chans) {
			continue
		}
		h.latest[s.Channel], h.has[s.Channel], h.pending[s.Channel] = s, true, true
		h.staleSent[s.Channel] = false
	}
	h.flush(now)
	h.taken.Add(uint64(len(h.samples)))
	for _, e := range h.events {
		h.event(e)
	}
}

// flush sends, in one message, every pending value whose channel's last
// send is at least one interval old: one encoding per view (unit choice),
// the same message id for all.
func (h *hub) flush(now time.Time) {
	h.ids = h.ids[:0]
	for id, p := range h.pending {
		if !p || now.Sub(h.lastSent[id]) < h.interval {
			continue
		}
		h.pending[id], h.lastSent[id] = false, now
		h.ids = append(h.ids, id)
	}
	if len(h.ids) == 0 || h.nclients.Load() == 0 { // with nobody watching, keep the state only
		return
	}
	h.mu.Lock()
	defer h.mu.Unlock()
	if len(h.clients) == 0 {
		return
	}
	h.seq++
	for _, v := range h.views {
		h.out = h.out[:0]
		for _, id := range h.ids {
			h.out = append(h.out, h.value(v.f, h.latest[id], false))
		}
		v.frame = encodeFrame(h.seq, "values", struct {
			T int64       `json:"t"`
			V []valueJSON `json:"v"`
		}{ms(now), h.out})
	}
	for c := range h.clients {
		select {
		case c.q <- c.view.frame:
		default:
			h.dropLocked(c)
		}
	}
}

func (h *hub) onTick(now time.Time) {
	h.flush(now)
	h.staleOut = h.staleOut[:0]
	for id, ok := range h.has {
		if ok && !h.staleSent[id] && now.Sub(h.latest[id].Time) > h.chans[id].Age() {
			h.staleSent[id] = true
			h.staleOut = append(h.staleOut, id)
		}
	}
	if len(h.staleOut) > 0 {
		h.broadcast("stale", struct {
			T int64 `json:"t"`
			C []int `json:"c"`
		}{ms(now), h.staleOut})
	}
	if now.Sub(h.lastBeat) >= h.cfg.Heartbeat {
		h.lastBeat = now
		h.broadcast("heartbeat", struct {
			T int64 `json:"t"`
		}{ms(now)})
	}
}

// event records what a snapshot needs and sends the event at once:
// warnings as "warning", the rest as "event".
func (h *hub) event(e pipeline.Event) {
	j := toEventJSON(e, h.cfg.Formatter)
	kind := "event"
	h.mu.Lock()
	switch e.Kind {
	case "warning_raised":
		kind = "warning"
		if _, ok := h.warnings[e.Name]; !ok {
			h.order = append(h.order, e.Name)
		}
		h.warnings[e.Name] = j
	case "warning_acknowledged":
		kind = "warning"
		if w, ok := h.warnings[e.Name]; ok {
			w.Acked = true
			h.warnings[e.Name] = w
			j.Acked = true
		}
	case "warning_cleared":
		kind = "warning"
		delete(h.warnings, e.Name)
		for i, n := range h.order {
			if n == e.Name {
				h.order = append(h.order[:i], h.order[i+1:]...)
				break
			}
		}
	case "run_started":
		h.curRun, h.runKnown = e.Name, true
	case "run_ended":
		if h.curRun == e.Name {
			h.curRun = ""
		}
		h.runKnown = true
	}
	if kind == "event" {
		h.recent = append(h.recent, j)
		if len(h.recent) > recentEvents {
			h.recent = h.recent[len(h.recent)-recentEvents:]
		}
	}
	h.broadcastLocked(kind, j)
	h.mu.Unlock()
}

func (h *hub) broadcast(event string, v any) {
	h.mu.Lock()
	h.broadcastLocked(event, v)
	h.mu.Unlock()
}

// broadcastLocked queues one message for every browser; one whose queue is
// full is disconnected and counted.
func (h *hub) broadcastLocked(event string, v any) {
	if len(h.clients) == 0 {
		return
	}
	m := h.frameLocked(event, v)
	for c := range h.clients {
		select {
		case c.q <- m:
		default:
			h.dropLocked(c)
		}
	}
}

func (h *hub) dropLocked(c *client) {
	h.removeLocked(c)
	h.droppedClients.Add(1)
	h.droppedMessages.Add(uint64(1 + len(c.q)))
	h.cfg.Logger.Warn("console: a browser fell behind the live stream and was disconnected; it will reconnect", "queue", cap(c.q))
}

// removeLocked takes c out of the clients and its view.
func (h *hub) removeLocked(c *client) {
	delete(h.clients, c)
	h.nclients.Store(int32(len(h.clients)))
	close(c.gone)
	for k, v := range h.views {
		if v == c.view {
			if v.n--; v.n == 0 {
				delete(h.views, k)
			}
		}
	}
}

// frameLocked encodes one server-sent event with the next id.
func (h *hub) frameLocked(event string, v any) []byte {
	h.seq++
	return encodeFrame(h.seq, event, v)
}

// encodeFrame encodes one server-sent event.
func encodeFrame(id uint64, event string, v any) []byte {
	var b bytes.Buffer
	b.WriteString("id: ")
	b.WriteString(strconv.FormatUint(id, 10))
	b.WriteString("\nevent: ")
	b.WriteString(event)
	b.WriteString("\ndata: ")
	if err := json.NewEncoder(&b).Encode(v); err != nil { // ends with \n
		b.WriteString(`{"error":"encoding"}` + "\n")
	}
	b.WriteString("\n")
	return b.Bytes()
}

// join adds a browser reading values with f (the formatter of the unit
// override key, "" for the configured units), its queue starting with a
// snapshot; nil once the hub has stopped.
func (h *hub) join(key string, f Formatter) *client {
	now := h.cfg.Clock.Now()
	vals := h.store.Snapshot(nil)
	h.mu.Lock()
	defer h.mu.Unlock()
	if h.stopped {
		return nil
	}
	snap := snapshotJSON{
		T: ms(now), Vehicle: h.cfg.Vehicle, RateHz: h.cfg.Rate,
		HeartbeatMS: h.cfg.Heartbeat.Milliseconds(), LostAfterMS: staleAfter.Milliseconds(),
		Controls: controlsJSON{Enabled: h.cfg.Controls, Start: StartPath, Stop: StopPath, Ack: AckPath},
		Channels: make([]channelJSON, len(h.chans)),
		Values:   []valueJSON{}, Warnings: []eventJSON{}, Events: append([]eventJSON{}, h.recent...),
	}
	switch {
	case h.runKnown:
		snap.Run = h.curRun
	case h.cfg.CurrentRun != nil:
		snap.Run = h.cfg.CurrentRun()
	}
	for id, ch := range h.chans {
		_, unit := f.Format(ch, 0)
		snap.Channels[id] = channelJSON{ID: id, Name: ch.Name, Quantity: ch.Quantity, Unit: unit, Canonical: string(ch.Unit),
			Origin: ch.Origin.String(), MaxAgeMS: ch.Age().Milliseconds(), Description: ch.Description}
		if id < len(vals) && vals[id].Fresh(now, ch.Age()) {
			v := vals[id]
			snap.Values = append(snap.Values, h.value(f, pipeline.Sample{Channel: pipeline.ChannelID(id), Value: v.Value, Time: v.Time, Quality: v.Quality}, false))
		}
	}
	for _, n := range h.order {
		snap.Warnings = append(snap.Warnings, h.warnings[n])
	}
	v := h.views[key]
	if v == nil {
		v = &view{f: f}
		h.views[key] = v
	}
	v.n++
	c := &client{q: make(chan []byte, h.cfg.QueueSize), gone: make(chan struct{}), view: v}
	c.q <- h.frameLocked("snapshot", snap)
	h.clients[c] = struct{}{}
	h.nclients.Store(int32(len(h.clients)))
	return c
}

func (h *hub) leave(c *client) {
	h.mu.Lock()
	if _, ok := h.clients[c]; ok {
		h.removeLocked(c)
	}
	h.mu.Unlock()
}

// stop disconnects every browser and refuses new ones.
func (h *hub) stop() {
	h.running.Store(false)
	h.mu.Lock()
	h.stopped = true
	for c := range h.clients {
		h.removeLocked(c)
	}
	h.mu.Unlock()
}

func (h *hub) report() pipeline.HealthReport {
	h.mu.Lock()
	n := len(h.clients)
	h.mu.Unlock()
	return pipeline.HealthReport{
		Kind: "console", Name: "console", Up: h.running.Load(),
		Counters: []pipeline.NamedCount{
			{Name: "dropped_clients", Value: h.droppedClients.Load()},
			{Name: "dropped_messages", Value: h.droppedMessages.Load()},
			{Name: "sent_messages", Value: h.sent.Load()},
		},
		Gauges: []pipeline.NamedValue{{Name: "clients", Value: float64(n)}},
	}
}

// serve is the stream's handler: the snapshot, then every message queued
// for this browser, until it goes, falls behind or the hub stops.
func (h *hub) serve(w http.ResponseWriter, r *http.Request, key string, f Formatter) {
	c := h.join(key, f)
	if c == nil {
		http.Error(w, "the console is stopping", http.StatusServiceUnavailable)
		return
	}
	defer h.leave(c)
	rc := http.NewResponseController(w)
	hd := w.Header()
	hd.Set("Content-Type", "text/event-stream")
	hd.Set("Cache-Control", "no-store")
	hd.Set("X-Accel-Buffering", "no")
	w.WriteHeader(http.StatusOK)
	// Reconnect after one second when the connection drops.
	if _, err := w.Write([]byte("retry: 1000\n\n")); err != nil {
		return
	}
	for {
		select {
		case m := <-c.q:
			rc.SetWriteDeadline(time.Now().Add(h.cfg.WriteTimeout))
			if _, err := w.Write(m); err != nil {
				return
			}
			n := uint64(1)
		more:
			for {
				select {
				case m := <-c.q:
					if _, err := w.Write(m); err != nil {
						return
					}
					n++
				default:
					break more
				}
			}
			if err := rc.Flush(); err != nil {
				return
			}
			h.sent.Add(n)
		case <-c.gone:
			return
		case <-r.Context().Done():
			return
		}
	}
}
