// Package console is the live console the daemon serves on its own HTTP
// listener: three views of one embedded page set (/console/driver,
// /console/cell, /console/wall) and the live stream that feeds them
// (/console/stream).
//
// # Why server-sent events
//
// The stream is server-sent events (SSE), not WebSocket. The data flows one
// way, from the daemon to the browser; the few control actions (start or stop
// a run, acknowledge a warning) are ordinary authorised POSTs to the existing
// HTTP API. SSE is plain HTTP (one long GET with text/event-stream), so it
// passes every proxy that passes the rest of the listener and needs no
// upgrade handshake; the browser's EventSource reconnects by itself and
// sends Last-Event-ID; and both ends are a few lines of standard library
// and standard browser API, with no library on either side.
//
// # What the stream sends
//
// On connect, and so on every reconnect whatever Last-Event-ID says, a
// "snapshot": the channels, the latest fresh values, the active warnings,
// the recent events and the current run. The console holds latest values
// only, so a fresh snapshot is the right resumption. Then:
//   - "values": the channels that changed, each at most Config.Rate times a
//     second (default 10 Hz); a value held back by the rate is sent once its
//     interval has passed, so the last value always arrives;
//   - "warning" and "event": at once, as the pipeline emits them;
//   - "stale": channels whose latest value became older than their maximum
//     age (the page greys them out and says so);
//   - "heartbeat": every Config.Heartbeat (default 1 s), so that a page that
//     hears nothing for 2 s shows "connection lost" and every value as stale.
//
// Every value carries its sample time and every message the server's time,
// so the page judges a value's age by the daemon's clock, not its own.
//
// Each browser has a bounded queue. The stream never blocks the pipeline
// (its subscription drops and counts like any consumer's) and a browser
// that falls behind is disconnected and counted (Report: clients,
// dropped_clients, dropped_messages); its EventSource reconnects and starts
// again from a snapshot.
package console

import (
	"context"
	"embed"
	"io/fs"
	"log/slog"
	"net/http"
	"time"

	"github.com/plenum-engine/plenum/drivers/clock"
	"github.com/plenum-engine/plenum/pipeline"
)

// AckPath is the control API path that acknowledges a latched warning
// (POST, form field "rule", bearer token), served by pipeline/runs; the
// page reads it from the snapshot.
const AckPath = "/api/warnings/acknowledge"

// StartPath and StopPath are pipeline/runs' run commands.
const (
	StartPath = "/api/runs/start"
	StopPath  = "/api/runs/stop"
)

// Formatter turns a canonical value into the text and unit a person reads.
// People, over the display-units layer, implements it.
type Formatter interface {
	Format(ch pipeline.Channel, v float64) (text, unit string)
}

// Overrider is a Formatter that takes a browser's unit choices: units is
// the compact form of pipeline/display ("pressure=bar,power=hp_mech").
type Overrider interface {
	Override(units string) (Formatter, error)
}

// UnitsParam is the streams' query parameter with a browser's unit
// choices, e.g. /console/stream?units=pressure%3Dbar%2Cpower%3Dhp_mech.
const UnitsParam = "units"

// Pipeline is what the console needs of the pipeline.
type Pipeline interface {
	Registry() *pipeline.Registry
	Store() *pipeline.Store
	Subscribe(name string, size int) *pipeline.Subscription
}

// Config tunes the console. The zero value works: 10 Hz, a 1 s heartbeat,
// queues of 256 messages, the system clock and canonical units.
type Config struct {
	// Vehicle names this daemon's vehicle (the wall view's tile).
	Vehicle string
	// Rate is the most values per second sent for one channel (default 10).
	Rate float64
	// Heartbeat is the interval of heartbeats (default 1 s).
	Heartbeat time.Duration
	// QueueSize bounds each browser's queue, in messages (default 256).
	QueueSize int
	// SubscriptionSize is the pipeline subscription's ring, in samples
	// (default 16384).
	SubscriptionSize int
	// WriteTimeout bounds one write to a browser (default 5 s); a browser
	// that cannot take a write in that time is disconnected.
	WriteTimeout time.Duration
	// Formatter gives display text and units (default People with the
	// metric units).
	Formatter Formatter
	// CurrentRun returns the run being recorded, "" for none (optional).
	CurrentRun func() string
	// Controls tells the page whether control commands are enabled at all
	// (a control token is configured).
	Controls bool
	// Fleet is the follower of other vehicles whose tiles the wall view
	// shows beside this vehicle's (optional).
	Fleet Fleet
	// Clock is the console's time (default the system clock).
	Clock clock.Clock
	// Logger logs disconnections (default slog.Default()).
	Logger *slog.Logger
}

func (c *Config) defaults() {
	if c.Rate <= 0 {
		c.Rate = 10
	}
	if c.Heartbeat <= 0 {
		c.Heartbeat = time.Second
	}
	if c.QueueSize <= 0 {
		c.QueueSize = 256
	}
	if c.SubscriptionSize <= 0 {
		c.SubscriptionSize = 1 << 14
	}
	if c.WriteTimeout <= 0 {
		c.WriteTimeout = 5 * time.Second
	}
	if c.Formatter == nil {
		c.Formatter = People{}
	}
	c.Clock = clock.Or(c.Clock)
	if c.Logger == nil {
		c.Logger = slog.Default()
	}
}

//go:embed assets
var assets embed.FS

// Server is the console: the stream's hub and the HTTP handler. Build it
// with New, serve Handler, and Run it for the stream's lifetime.
type Server struct {
	cfg  Config
	hub  *hub
	done chan struct{} // closed when Run returns
}

// New subscribes to p and returns the console.
func New(cfg Config, p Pipeline) *Server {
	cfg.defaults()
	return &Server{cfg: cfg, hub: newHub(cfg, p), done: make(chan struct{})}
}

// Run feeds the stream until ctx ends, then disconnects every browser.
func (s *Server) Run(ctx context.Context) error {
	defer close(s.done)
	s.hub.loop(ctx.Done())
	return nil
}

// Report says how the console is doing: kind "console"; up while the
// stream runs; gauge clients (browsers connected); counters
// dropped_clients (browsers disconnected for falling behind),
// dropped_messages (messages those browsers did not get) and
// sent_messages.
func (s *Server) Report() pipeline.HealthReport {
	return s.hub.report()
}

var views = map[string]string{
	"driver": "assets/driver.html",
	"cell":   "assets/cell.html",
	"wall":   "assets/wall.html",
}

// Handler serves /console/ (an index of the views), /console/driver,
// /console/cell, /console/wall, /console/static/…, /console/stream and
// /console/fleet (the vehicles followed, for the wall view) and
// /console/units (the unit choices a browser may make).
// Mount it at "/console/".
func (s *Server) Handler() http.Handler {
	mux := http.NewServeMux()
	static, _ := fs.Sub(assets, "assets")
	mux.Handle("GET /console/static/", http.StripPrefix("/console/static/", noCache(http.FileServerFS(static))))
	mux.HandleFunc("GET /console/stream", func(w http.ResponseWriter, r *http.Request) {
		if f, ok := s.formatter(w, r); ok {
			s.hub.serve(w, r, r.URL.Query().Get(UnitsParam), f)
		}
	})
	mux.HandleFunc("GET "+FleetPath, s.serveFleet)
	mux.HandleFunc("GET "+UnitsPath, s.serveUnits)
	page := func(file string) http.HandlerFunc {
		return func(w http.ResponseWriter, r *http.Request) {
			b, err := assets.ReadFile(file)
			if err != nil {
				http.Error(w, err.Error(), http.StatusInternalServerError)
				return
			}
			w.Header().Set("Content-Type", "text/html; charset=utf-8")
			w.Header().Set("Cache-Control", "no-cache")
			w.Header().Set("Content-Security-Policy", "default-src 'self'; img-src 'self' data:; style-src 'self'; script-src 'self'; connect-src 'self'")
			w.Write(b)
		}
	}
	for name, file := range views {
		mux.HandleFunc("GET /console/"+name, page(file))
	}
	mux.HandleFunc("GET /console/{$}", page("assets/index.html"))
	return mux
}

// formatter is the formatter of one browser's stream: the configured
// units with the browser's override; a bad override is refused with a 400
// naming the item.
func (s *Server) formatter(w http.ResponseWriter, r *http.Request) (Formatter, bool) {
	q := r.URL.Query().Get(UnitsParam)
	if q == "" {
		return s.cfg.Formatter, true
	}
	o, ok := s.cfg.Formatter.(Overrider)
	if !ok {
		http.Error(w, "units: this console's units cannot be overridden", http.StatusBadRequest)
		return nil, false
	}
	f, err := o.Override(q)
	if err != nil {
		http.Error(w, "units: "+err.Error(), http.StatusBadRequest)
		return nil, false
	}
	return f, true
}

func noCache(h http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Cache-Control", "no-cache")
		h.ServeHTTP(w, r)
	})
}
