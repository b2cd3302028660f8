package main

import (
	"bytes"
	"context"
	"crypto/subtle"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/url"
	"os"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/plenum-engine/plenum/cmd/plenum/config"
	"github.com/plenum-engine/plenum/derive"
	"github.com/plenum-engine/plenum/pipeline"
	"github.com/plenum-engine/plenum/pipeline/record"
)

// runs owns the recorder subscription and the run being recorded. Runs
// start at once (one per daemon lifetime) or on command; every sample
// between start and stop is recorded, and at the stop the summary is written
// and published.
type runs struct {
	cfg     *config.Config
	reg     *pipeline.Registry
	sub     *pipeline.Subscription
	log     *slog.Logger
	publish func([]byte) // the run summary, at least once
	emit    func(pipeline.Event)
	store   *pipeline.Store  // latest values, for the conditions at the start; may be nil
	forward record.Forwarder // the push backlog; nil: none

	// What the recorder failed to keep: samples its subscription dropped
	// and points the disk refused. A rise raises recorder_behind.
	lossSeen   uint64
	lostClosed uint64 // Lost() of runs already closed
	lossRaised bool
	lossSince  time.Time

	mu   sync.Mutex // guards cur for the HTTP handlers; the Run goroutine writes
	cur  *record.Recorder
	err  error
	auto bool // the current run was started by the pull trigger
}

// startRequest is what a start command may carry.
type startRequest struct {
	Label, Notes string
	Entered      record.Conditions // values entered with the command win over sensors
}

// conditionField is one ambient condition: its key in run.json and MQTT
// commands, its form field on the HTTP API (in the units people read off a
// weather station), the channel that measures it, and the range accepted.
type conditionField struct {
	name, form, channel string
	dst                 **float64
	scale               float64 // form units × scale = canonical units
	min, max            float64 // canonical units: what the ambient channels accept
}

// conditionFields lists the fields of c: the one table the start command's
// parsing, checking and sensor lookup share.
func conditionFields(c *record.Conditions) []conditionField {
	return []conditionField{
		{"pressure_pa", "pressure_kpa", "baro_pressure", &c.PressurePa, 1000, 50000, 110000},
		{"temperature_c", "temperature_c", "ambient_temp", &c.TemperatureC, 1, -40, 60},
		{"relative_humidity", "humidity_percent", "ambient_humidity", &c.RelativeHumidity, 0.01, 0, 1},
	}
}

// conditions fills the ambient conditions at the start: entered values
// first, then the latest fresh values of the ambient channels.
func (r *runs) conditions(entered record.Conditions, now time.Time) record.Conditions {
	c := entered
	fromSensors := false
	if r.store != nil {
		for _, f := range conditionFields(&c) {
			if *f.dst != nil {
				continue
			}
			id, ok := r.reg.Lookup(f.channel)
			if !ok {
				continue
			}
			if v := r.store.Get(id); v.Fresh(now, 30*time.Second) {
				x := v.Value
				*f.dst, fromSensors = &x, true
			}
		}
	}
	switch {
	case !entered.Empty() && fromSensors:
		c.Source = "sensors+entered"
	case !entered.Empty():
		c.Source = "entered"
	case fromSensors:
		c.Source = "sensors"
	}
	return c
}

// start opens a new run.
func (r *runs) start(req startRequest) (string, error) {
	r.mu.Lock()
	defer r.mu.Unlock()
	if r.cur != nil {
		return "", fmt.Errorf("run %s is already being recorded", r.cur.ID())
	}
	now := time.Now()
	id := now.UTC().Format("20060102T150405.000Z")
	rec, err := record.Open(record.Config{Dir: r.cfg.Record.Dir, Run: id, Vehicle: r.cfg.Vehicle, Label: req.Label, Notes: req.Notes,
		SyncEvery: time.Duration(r.cfg.Record.SyncEvery), RotateBytes: int64(r.cfg.Record.RotateMB) << 20, ConfigYAML: r.cfg.Raw,
		Conditions: r.conditions(req.Entered, now), Forward: r.forward}, r.reg)
	if err != nil {
		return "", err
	}
	r.cur = rec
	r.emit(pipeline.Event{Kind: "run_started", Name: id, Start: time.Now(), Tags: map[string]string{"label": req.Label}})
	return id, nil
}

// stop closes the current run and publishes its summary.
func (r *runs) stop() (record.Summary, error) {
	r.mu.Lock()
	defer r.mu.Unlock()
	if r.cur == nil {
		return record.Summary{}, errors.New("no run is being recorded")
	}
	rec := r.cur
	r.cur, r.auto = nil, false
	err := rec.Close()
	r.lostClosed += rec.Lost()
	if n := rec.ForwardFailures(); n > 0 {
		r.log.Error("push: blocks of this run were refused by the push backlog; they are in the run's files but were not pushed", "run", rec.ID(), "blocks", n)
	}
	sum := rec.Summary()
	r.publish(sum.JSON())
	r.emit(pipeline.Event{Kind: "run_ended", Name: rec.ID(), Start: sum.Start, End: sum.End,
		Fields: map[string]float64{"samples": float64(sum.Samples), "turbo_lag_events": float64(sum.LagEvents), "warnings_raised": float64(sum.WarningsRaised)}})
	return sum, err
}

// Run records until ctx is done, then closes the current run.
func (r *runs) Run(ctx context.Context) {
	tick := time.NewTicker(max(10*time.Millisecond, time.Duration(r.cfg.Record.SyncEvery)))
	if r.cfg.Record.SyncEvery == 0 {
		tick.Reset(200 * time.Millisecond)
	}
	defer tick.Stop()
	var buf []pipeline.Sample
	var evs []pipeline.Event
	var trig derive.PullTrigger
	thrID, haveThr := r.reg.Lookup("throttle_position")
	rpmID, haveRPM := r.reg.Lookup("engine_speed")
	useTrig := r.cfg.Record.AutoTrigger && haveThr && haveRPM
	thr, rpm := 0.0, 0.0
	trigger := func() {
		for _, s := range buf {
			if s.Quality != pipeline.OK || (s.Channel != thrID && s.Channel != rpmID) {
				continue
			}
			if s.Channel == thrID {
				thr = s.Value
			} else {
				rpm = s.Value
			}
			start, end := trig.Update(s.Time, thr, rpm)
			switch {
			case start && r.current() == "":
				if id, err := r.start(startRequest{Label: "pull", Notes: "started by the wide-open-throttle trigger"}); err != nil {
					r.log.Error("auto trigger: cannot start a run", "err", err)
				} else {
					r.mu.Lock()
					r.auto = true
					r.mu.Unlock()
					r.log.Info("pull detected: recording", "run", id)
				}
			case end:
				r.mu.Lock()
				auto := r.auto && r.cur != nil
				r.mu.Unlock()
				if auto {
					if _, err := r.stop(); err != nil {
						r.log.Error("auto trigger: closing the run", "err", err)
					}
				}
			}
		}
	}
	drain := func() {
		buf, evs = r.sub.Drain(buf[:0], evs[:0])
		r.mu.Lock()
		if r.cur != nil {
			for _, s := range buf {
				r.cur.Write(s)
			}
			for _, e := range evs {
				r.cur.WriteEvent(e)
			}
		}
		r.mu.Unlock()
		if useTrig {
			trigger()
		}
	}
	for {
		select {
		case <-ctx.Done():
			drain()
			if _, err := r.stop(); err != nil && r.current() != "" {
				r.log.Error("closing the run", "err", err)
			}
			return
		case <-r.sub.C():
			drain()
		case <-tick.C:
			r.watchLoss(time.Now())
			r.mu.Lock()
			if r.cur != nil {
				if err := r.cur.Sync(); err != nil && r.err == nil {
					r.err = err
					r.log.Error("recorder cannot write; samples of this run are being lost", "err", err)
				}
			}
			r.mu.Unlock()
		}
	}
}

// watchLoss says loudly when the recorder cannot keep up: a
// recorder_behind warning (raised at the first loss, cleared after 5 s
// without any) and an error log once per burst. The counts stay in
// plenum_consumer_dropped_samples_total{consumer="recorder"}.
func (r *runs) watchLoss(now time.Time) {
	r.mu.Lock()
	lost := r.sub.Dropped() + r.lostClosed
	if r.cur != nil {
		lost += r.cur.Lost()
	}
	r.mu.Unlock()
	switch {
	case lost > r.lossSeen:
		if !r.lossRaised {
			r.log.Error("the recorder is not keeping up: samples are being lost", "lost", lost-r.lossSeen)
			r.emit(pipeline.Event{Kind: "warning_raised", Name: "recorder_behind", Start: now, End: now,
				Tags: map[string]string{"severity": "critical"}, Fields: map[string]float64{"active": 1, "lost_samples": float64(lost - r.lossSeen)}})
			r.lossRaised = true
		}
		r.lossSeen, r.lossSince = lost, now
	case r.lossRaised && now.Sub(r.lossSince) >= 5*time.Second:
		r.emit(pipeline.Event{Kind: "warning_cleared", Name: "recorder_behind", Start: r.lossSince, End: now,
			Tags: map[string]string{"severity": "critical"}, Fields: map[string]float64{"active": 0}})
		r.lossRaised = false
	}
}

func (r *runs) current() string {
	r.mu.Lock()
	defer r.mu.Unlock()
	if r.cur == nil {
		return ""
	}
	return r.cur.ID()
}

// handler serves GET /api/runs/current and, when a control token is set,
// POST /api/runs/start and /api/runs/stop.
func (r *runs) handler() http.Handler {
	mux := http.NewServeMux()
	mux.HandleFunc("GET /api/runs/current", func(w http.ResponseWriter, _ *http.Request) {
		json.NewEncoder(w).Encode(map[string]string{"run": r.current()})
	})
	authed := func(h http.HandlerFunc) http.HandlerFunc {
		return func(w http.ResponseWriter, req *http.Request) {
			tok := r.cfg.Record.ControlToken
			if tok == "" {
				http.Error(w, "run commands are off: set record.control_token to enable them", http.StatusForbidden)
				return
			}
			if subtle.ConstantTimeCompare([]byte(req.Header.Get("Authorization")), []byte("Bearer "+tok)) != 1 {
				http.Error(w, "unauthorized", http.StatusUnauthorized)
				return
			}
			h(w, req)
		}
	}
	mux.HandleFunc("POST /api/runs/start", authed(func(w http.ResponseWriter, req *http.Request) {
		sr := startRequest{Label: req.FormValue("label"), Notes: req.FormValue("notes")}
		if err := parseEntered(req, &sr.Entered); err != nil {
			http.Error(w, err.Error(), http.StatusBadRequest)
			return
		}
		id, err := r.start(sr)
		if err != nil {
			http.Error(w, err.Error(), http.StatusConflict)
			return
		}
		json.NewEncoder(w).Encode(map[string]string{"run": id})
	}))
	mux.HandleFunc("POST /api/runs/stop", authed(func(w http.ResponseWriter, _ *http.Request) {
		sum, err := r.stop()
		if err != nil && sum.Run == "" {
			http.Error(w, err.Error(), http.StatusConflict)
			return
		}
		w.Write(sum.JSON())
	}))
	return mux
}

// checkConditions refuses entered conditions outside what the ambient
// channels accept (50–110 kPa, −40–60 °C, 0–1).
func checkConditions(c record.Conditions) error {
	for _, f := range conditionFields(&c) {
		if v := *f.dst; v != nil && !(*v >= f.min && *v <= f.max) {
			return fmt.Errorf("%s: %g is outside %g–%g", f.name, *v, f.min, f.max)
		}
	}
	return nil
}

// parseEntered reads the optional form fields pressure_kpa, temperature_c
// and humidity_percent: conditions read off a weather station.
func parseEntered(req *http.Request, c *record.Conditions) error {
	for _, f := range conditionFields(c) {
		s := req.FormValue(f.form)
		if s == "" {
			continue
		}
		v, err := strconv.ParseFloat(s, 64)
		x := v * f.scale
		if err != nil || !(x >= f.min && x <= f.max) {
			return fmt.Errorf("%s: %q is not a number between %g and %g", f.form, s, f.min/f.scale, f.max/f.scale)
		}
		*f.dst = &x
	}
	return nil
}

// cmdRunControl is `plenum run-start` and `plenum run-stop`: they ask a
// running daemon's local HTTP API, with the control token from
// PLENUM_CONTROL_TOKEN or -token-file.
func cmdRunControl(verb string, args []string, stdout io.Writer) error {
	fs := flag.NewFlagSet("run-"+verb, flag.ContinueOnError)
	addr := fs.String("addr", "127.0.0.1:9108", "the daemon's HTTP address")
	tokenFile := fs.String("token-file", "", "file holding the control token (default: $PLENUM_CONTROL_TOKEN)")
	label := fs.String("label", "", "run label (run-start)")
	notes := fs.String("notes", "", "free-form notes (run-start)")
	pressure := fs.String("pressure-kpa", "", "ambient pressure read off a barometer, kPa (run-start; default: the sensor)")
	temp := fs.String("temperature-c", "", "ambient temperature, °C (run-start; default: the sensor)")
	hum := fs.String("humidity-percent", "", "relative humidity, % (run-start; default: the sensor)")
	if err := fs.Parse(args); err != nil {
		return usageError{err.Error()}
	}
	token := os.Getenv("PLENUM_CONTROL_TOKEN")
	if *tokenFile != "" {
		var err error
		if token, err = readSecret("run-"+verb+": -token-file", *tokenFile); err != nil {
			return err
		}
	}
	form := url.Values{"label": {*label}, "notes": {*notes}, "pressure_kpa": {*pressure}, "temperature_c": {*temp}, "humidity_percent": {*hum}}
	req, err := http.NewRequest(http.MethodPost, "http://"+*addr+"/api/runs/"+verb, strings.NewReader(form.Encode()))
	if err != nil {
		return err
	}
	req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	req.Header.Set("Authorization", "Bearer "+token)
	c := &http.Client{Timeout: 10 * time.Second}
	resp, err := c.Do(req)
	if err != nil {
		return fmt.Errorf("run-%s: %w", verb, err)
	}
	defer resp.Body.Close()
	body, _ := io.ReadAll(resp.Body)
	if resp.StatusCode != http.StatusOK {
		return fmt.Errorf("run-%s: %s: %s", verb, resp.Status, strings.TrimSpace(string(body)))
	}
	stdout.Write(body)
	return nil
}

// mqttCommand is the JSON payload of <prefix>/<vehicle>/cmd/run/start and
// …/cmd/run/stop. Every key is optional; token is required when
// record.control_token is set.
type mqttCommand struct {
	Request    string             `json:"request"` // echoed in the reply
	Token      string             `json:"token"`
	Label      string             `json:"label"`
	Notes      string             `json:"notes"`
	Conditions *record.Conditions `json:"conditions"` // entered conditions, SI units
}

// mqttReply is published on <prefix>/<vehicle>/reply/run/start|stop.
type mqttReply struct {
	Request string          `json:"request,omitempty"`
	OK      bool            `json:"ok"`
	Run     string          `json:"run,omitempty"`
	Error   string          `json:"error,omitempty"`
	Summary *record.Summary `json:"summary,omitempty"`
}

// parseCommand reads a command payload (empty: no keys) and checks its
// conditions.
func parseCommand(payload []byte) (mqttCommand, error) {
	var c mqttCommand
	if len(payload) == 0 {
		return c, nil
	}
	dec := json.NewDecoder(bytes.NewReader(payload))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&c); err != nil {
		return mqttCommand{}, fmt.Errorf("payload is not a JSON command: %w", err)
	}
	if dec.More() {
		return mqttCommand{}, errors.New("payload holds more than one JSON value")
	}
	if c.Conditions != nil {
		if err := checkConditions(*c.Conditions); err != nil {
			return mqttCommand{}, fmt.Errorf("conditions: %w", err)
		}
	}
	return c, nil
}

// command serves the MQTT command topics run/start and run/stop.
func (r *runs) command(suffix string, payload []byte) []byte {
	rep := mqttReply{}
	reply := func() []byte {
		b, _ := json.Marshal(rep) // plain strings and numbers: cannot fail
		return b
	}
	c, err := parseCommand(payload)
	if err != nil {
		rep.Error = fmt.Sprintf("cmd/%s: %v", suffix, err)
		return reply()
	}
	rep.Request = c.Request
	if tok := r.cfg.Record.ControlToken; tok != "" && subtle.ConstantTimeCompare([]byte(c.Token), []byte(tok)) != 1 {
		rep.Error = "unauthorized: the token does not match record.control_token"
		r.log.Warn("mqtt run command refused: bad token", "topic", suffix)
		return reply()
	}
	switch suffix {
	case "run/start":
		sr := startRequest{Label: c.Label, Notes: c.Notes}
		if c.Conditions != nil {
			sr.Entered = *c.Conditions
			sr.Entered.Source = ""
		}
		id, err := r.start(sr)
		if err != nil {
			rep.Error = err.Error()
			return reply()
		}
		r.log.Info("run started by MQTT command", "run", id)
		rep.OK, rep.Run = true, id
	case "run/stop":
		sum, err := r.stop()
		if sum.Run == "" {
			rep.Error = err.Error()
			return reply()
		}
		rep.OK, rep.Run, rep.Summary = err == nil, sum.Run, &sum
		if err != nil {
			rep.Error = err.Error()
		}
	default:
		rep.Error = fmt.Sprintf("unknown command %q: use run/start or run/stop", suffix)
	}
	return reply()
}
